"""Spectral indices from surface reflectance.

All functions take reflectance as unitless fractions (0–1, not scaled
integers) in any array type that supports arithmetic (numpy, dask, xarray)
and return the same type. Where a denominator is zero the result is NaN,
never ``inf``.

Formulas (the published definitions):

* NDVI = (NIR − Red) / (NIR + Red) — Rouse et al. 1974; Tucker 1979.
* EVI  = 2.5 (NIR − Red) / (NIR + 6 Red − 7.5 Blue + 1) — Huete et al. 2002.
* NBR  = (NIR − SWIR2) / (NIR + SWIR2) — Key & Benson 2006.
* NDMI = (NIR − SWIR1) / (NIR + SWIR1) — Gao 1996 (published as NDWI).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np

from plantation.errors import ConfigError


def _safe_div(num: Any, den: Any) -> Any:
    """num / den, NaN where den is 0; keeps xarray labels, works lazily on dask."""
    with np.errstate(divide="ignore", invalid="ignore"):
        if hasattr(den, "dims"):  # xarray: keep coordinates
            return (num / den).where(den != 0)
        return np.where(den != 0, num / den, np.nan)


def ndvi(nir: Any, red: Any) -> Any:
    """Normalised difference vegetation index, unitless in [−1, 1]."""
    return _safe_div(nir - red, nir + red)


def evi(nir: Any, red: Any, blue: Any) -> Any:
    """Enhanced vegetation index (G = 2.5, C1 = 6, C2 = 7.5, L = 1)."""
    return _safe_div(2.5 * (nir - red), nir + 6.0 * red - 7.5 * blue + 1.0)


def nbr(nir: Any, swir2: Any) -> Any:
    """Normalised burn ratio, unitless in [−1, 1]; drops sharply after fire."""
    return _safe_div(nir - swir2, nir + swir2)


def ndmi(nir: Any, swir1: Any) -> Any:
    """Normalised difference moisture index, unitless in [−1, 1]."""
    return _safe_div(nir - swir1, nir + swir1)


#: Index name → (function, the band roles it needs, in argument order).
INDICES: dict[str, tuple[Callable[..., Any], tuple[str, ...]]] = {
    "NDVI": (ndvi, ("nir", "red")),
    "EVI": (evi, ("nir", "red", "blue")),
    "NBR": (nbr, ("nir", "swir2")),
    "NDMI": (ndmi, ("nir", "swir1")),
}


def compute(name: str, bands: Mapping[str, Any]) -> Any:
    """Compute index ``name`` from a mapping of band role → reflectance.

    Raises:
        ConfigError: the index is unknown or a band it needs is missing.
    """
    key = name.upper()
    if key not in INDICES:
        raise ConfigError(f"unknown index {name!r}; expected one of {sorted(INDICES)}")
    func, roles = INDICES[key]
    missing = [r for r in roles if r not in bands]
    if missing:
        raise ConfigError(f"index {key} needs band(s) {missing}; the region has {sorted(bands)}")
    return func(*(bands[r] for r in roles))


def stack_indices(reflectance: Any, band_names: Sequence[str], names: Sequence[str], band_dim: str = "band") -> Any:
    """Indices of an xarray reflectance array along a new ``index`` dimension.

    Args:
        reflectance: DataArray with a ``band`` dimension whose coordinate holds
            band roles (``blue``, ``red``, ``nir``, ...).
        band_names: the roles present, used to check before computing.
        names: the indices wanted, e.g. ``["NDVI", "NBR"]``.

    Returns:
        DataArray with ``band`` replaced by ``index`` (coordinate = index names).
    """
    import xarray as xr

    bands = {b: reflectance.sel({band_dim: b}, drop=True) for b in band_names}
    out = [compute(n, bands).assign_coords(index=n.upper()) for n in names]
    return xr.concat(out, dim="index")
