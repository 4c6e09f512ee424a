"""Surface reflectance of one sensor adjusted to another's, with published cross-sensor coefficients.

A series can mix dates of several sensors (Landsat 7 ETM+, Landsat 8/9 OLI,
Sentinel-2 MSI). Their bands differ in width and position, so the same
surface on the same day gives slightly different reflectance, and an index
computed from one sensor is offset from the other's. Each date is brought
to a reference sensor (OLI) band by band with a linear adjustment,
``reference = slope · sensor + intercept``, from the published tables:

* **ETM+ → OLI**: Roy et al. (2016), "Characterization of Landsat-7 to
  Landsat-8 reflective wavelength and normalized difference vegetation index
  continuity", Remote Sensing of Environment 185: 57–70, Table 2, the
  ordinary-least-squares (OLS) functions for surface reflectance.
* **MSI → OLI**: Claverie et al. (2018), "The Harmonized Landsat and
  Sentinel-2 surface reflectance data set", Remote Sensing of Environment
  219: 145–161, the bandpass adjustment (as listed in the HLS v1.4 user
  guide). Its NIR coefficient is for MSI band 8A (narrow NIR, 865 nm), the
  band the product reader gives the ``nir`` role; the broad band 8
  (``nir_broad``) has none. One set serves every MSI unit (Sentinel-2A, B
  and C): unit-specific sets published later are not used.

The values are those in the project's check-value table
(``check_values.md``, "Cross-sensor harmonisation"), which
``tests/test_reference_harmonise.py`` checks this module against.

Rules:

* Sensors are named as the product reader names them (``landsat_oli``,
  ``landsat_etm``, ``sentinel2_msi``); :func:`canonical_sensor` maps common
  spellings (``oli``, ``etm+``, ``msi``, STAC instrument and platform names)
  onto them.
* Landsat 9's OLI-2 is treated as OLI: same band design, and both are
  ``landsat_oli`` (no published OLI-2 → OLI adjustment is applied).
* Dates of the reference sensor are left unchanged.
* Band roles without a published coefficient (``coastal``, the red-edge
  bands, ``nir_broad``, anything else) pass through unchanged.
* Only OLI is a reference: the tables run towards it, and inverting a
  least-squares fit is not the fit the other way round.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from plantation.errors import ConfigError, RegionError

#: Sensor names, as :mod:`plantation.imagery.products` records them.
OLI, ETM, MSI = "landsat_oli", "landsat_etm", "sentinel2_msi"

#: Band role → (slope, intercept) of OLI = slope · ETM+ + intercept, surface reflectance (Roy et al. 2016, Table 2, OLS).
ETM_TO_OLI: dict[str, tuple[float, float]] = {
    "blue": (0.8474, 0.0003),
    "green": (0.8483, 0.0088),
    "red": (0.9047, 0.0061),
    "nir": (0.8462, 0.0412),
    "swir1": (0.8937, 0.0254),
    "swir2": (0.9071, 0.0172),
}

#: Band role → (slope, offset) of OLI-like = slope · MSI + offset (Claverie et al. 2018, HLS bandpass adjustment; nir is MSI band 8A).
MSI_TO_OLI: dict[str, tuple[float, float]] = {
    "blue": (0.9778, -0.004),
    "green": (1.0053, -0.0009),
    "red": (0.9765, 0.0009),
    "nir": (0.9983, -0.0001),
    "swir1": (0.9987, -0.0011),
    "swir2": (1.003, -0.0012),
}

#: Reference sensor → source sensor → band role → (slope, intercept).
TABLES: dict[str, dict[str, dict[str, tuple[float, float]]]] = {OLI: {ETM: ETM_TO_OLI, MSI: MSI_TO_OLI}}

#: Other spellings of the sensors (lower case): short names, Landsat 9's OLI-2,
#: STAC ``instruments`` (joined by ``+``) and ``platform`` values, product prefixes.
ALIASES: dict[str, str] = {
    "oli": OLI,
    "oli2": OLI,
    "oli-2": OLI,
    "oli+tirs": OLI,
    "oli+tirs2": OLI,
    "oli2+tirs2": OLI,
    "landsat_oli2": OLI,
    "landsat-8": OLI,
    "landsat-9": OLI,
    "landsat_8": OLI,
    "landsat_9": OLI,
    "lc08": OLI,
    "lc09": OLI,
    "etm": ETM,
    "etm+": ETM,
    "landsat-7": ETM,
    "landsat_7": ETM,
    "le07": ETM,
    "msi": MSI,
    "sentinel-2": MSI,
    "sentinel-2a": MSI,
    "sentinel-2b": MSI,
    "sentinel-2c": MSI,
    "sentinel2": MSI,
    "s2a": MSI,
    "s2b": MSI,
    "s2c": MSI,
}

#: The name of a date whose sensor nobody named (a GeoTIFF folder or cube without ``region.sensors``).
UNNAMED = ""


def canonical_sensor(name: str) -> str:
    """The sensor's name as the reader records it: an alias mapped (``oli`` → ``landsat_oli``), any other name lower-cased and stripped."""
    key = str(name).strip().lower()
    return ALIASES.get(key, key)


def describe(sensor: str) -> str:
    """A sensor's name for a message (``unnamed`` for :data:`UNNAMED`)."""
    return sensor if sensor else "unnamed"


def reference_sensor(name: str) -> str:
    """The canonical reference sensor.

    Raises:
        ConfigError: no published table runs towards it.
    """
    ref = canonical_sensor(name)
    if ref not in TABLES:
        raise ConfigError(f"region.harmonise.reference: {name!r} has no published coefficients towards it; use oli (Landsat 8/9 OLI)")
    return ref


def coefficients(sensors: Sequence[str], bands: Sequence[str], reference: str = OLI) -> tuple[np.ndarray, np.ndarray]:
    """Slope and intercept of every date and band: reference = slope · reflectance + intercept.

    Args:
        sensors: (dates,) each date's sensor (any spelling :func:`canonical_sensor` knows).
        bands: band roles in the array's band order.
        reference: the sensor every date is brought to (OLI).

    Returns:
        (slope, intercept), float32 arrays (dates, bands): 1 and 0 for the
        reference sensor's dates and for band roles without a coefficient.

    Raises:
        ConfigError: the reference has no table.
        RegionError: a date's sensor is unnamed or has no table towards the
            reference.
    """
    ref = reference_sensor(reference)
    table = TABLES[ref]
    slope = np.ones((len(sensors), len(bands)), np.float32)
    intercept = np.zeros((len(sensors), len(bands)), np.float32)
    for i, s in enumerate(sensors):
        sensor = canonical_sensor(s)
        if sensor == ref:
            continue
        if sensor == UNNAMED:
            raise RegionError(f"date {i + 1}: its sensor is not named, so it cannot be harmonised to {ref}; name it with region.sensors")
        if sensor not in table:
            raise RegionError(f"date {i + 1}: sensor {sensor!r} has no published adjustment to {ref}; known: {sorted([ref, *table])}")
        for j, band in enumerate(bands):
            if band in table[sensor]:
                slope[i, j], intercept[i, j] = table[sensor][band]
    return slope, intercept


def harmonise(reflectance: np.ndarray, sensors: Sequence[str], bands: Sequence[str], reference: str = OLI) -> np.ndarray:
    """Every date's reflectance as the reference sensor would see it.

    Args:
        reflectance: float (dates, bands, y, x) unitless surface reflectance;
            NaN stays NaN.
        sensors: (dates,) each date's sensor.
        bands: (bands,) band roles.
        reference: see :func:`coefficients`.

    Returns:
        float32 (dates, bands, y, x), a new array.

    Raises:
        ValueError: the array's shape disagrees with ``sensors`` or ``bands``.
        ConfigError, RegionError: see :func:`coefficients`.
    """
    arr = np.asarray(reflectance)
    if arr.ndim != 4 or arr.shape[0] != len(sensors) or arr.shape[1] != len(bands):
        raise ValueError(f"harmonise: reflectance of shape {arr.shape} does not match {len(sensors)} dates and {len(bands)} bands; expected (dates, bands, y, x)")
    slope, intercept = coefficients(sensors, bands, reference)
    out = arr.astype(np.float32, copy=True)
    out *= slope[:, :, None, None]
    out += intercept[:, :, None, None]
    return out
