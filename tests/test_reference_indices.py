"""Spectral indices checked against an independent reference implementation.

Source: spyndex (Awesome Spectral Indices, Montero et al. 2023, Scientific
Data 10:197) implements the published formulas: NDVI Rouse et al. 1974;
EVI Huete et al. 2002; NBR Key & Benson 2006; NDMI Gao 1996.

spyndex evaluates each index from its catalogue formula string with its own
parameter names (N = NIR, R = red, B = blue, S1 = SWIR1, S2 = SWIR2) and its
catalogued EVI constants (g, C1, C2, L), so a wrong sign, a swapped band or a
wrong constant in ``plantation.imagery.indices`` shows up as a mismatch here.
"""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import xarray as xr

from plantation.errors import ConfigError
from plantation.imagery import indices

spyndex = pytest.importorskip("spyndex")

#: Our band role → spyndex's parameter name.
ROLE_TO_SPYNDEX = {"nir": "N", "red": "R", "blue": "B", "swir1": "S1", "swir2": "S2"}
#: Our function and the roles it takes, in argument order.
FUNCS = {
    "NDVI": (indices.ndvi, ("nir", "red")),
    "EVI": (indices.evi, ("nir", "red", "blue")),
    "NBR": (indices.nbr, ("nir", "swir2")),
    "NDMI": (indices.ndmi, ("nir", "swir1")),
}
SEEDS = [0, 1, 7, 2023, 12345]
N_PIXELS = 20_000


def _random_bands(seed: int) -> dict[str, np.ndarray]:
    """Random surface reflectances, uniform in 0.01–0.6, one array per role."""
    rng = np.random.default_rng(seed)
    return {role: rng.uniform(0.01, 0.6, N_PIXELS) for role in ROLE_TO_SPYNDEX}


def _spyndex_params(name: str, bands: dict[str, np.ndarray]) -> dict[str, object]:
    """spyndex parameters for ``name``: bands by spyndex's names, constants from its catalogue."""
    params: dict[str, object] = {}
    spy_to_role = {v: k for k, v in ROLE_TO_SPYNDEX.items()}
    for p in spyndex.indices[name].bands:
        if p in spy_to_role:
            params[p] = bands[spy_to_role[p]]
        else:  # a constant such as g, C1, C2, L: the reference's default value
            params[p] = spyndex.constants[p].default
    return params


def test_spyndex_catalogue_uses_the_bands_we_map():
    """Guard the mapping above: each index needs exactly our roles plus constants."""
    for name, (_, roles) in FUNCS.items():
        needed = {p for p in spyndex.indices[name].bands if p not in spyndex.constants}
        assert needed == {ROLE_TO_SPYNDEX[r] for r in roles}, name


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("name", sorted(FUNCS))
def test_index_matches_spyndex(name, seed):
    bands = _random_bands(seed)
    func, roles = FUNCS[name]
    ours = func(*(bands[r] for r in roles))
    ref = np.asarray(spyndex.computeIndex(index=name, params=_spyndex_params(name, bands)), dtype=np.float64)
    assert np.all(np.isfinite(ref))
    np.testing.assert_allclose(ours, ref, rtol=1e-6, atol=0)


@pytest.mark.parametrize("seed", SEEDS)
@pytest.mark.parametrize("name", sorted(FUNCS))
def test_compute_by_name_matches_spyndex(name, seed):
    """compute() must route each role to the right argument (lower-case name too)."""
    bands = _random_bands(seed)
    ours = indices.compute(name.lower(), bands)  # extra bands in the mapping are ignored
    ref = np.asarray(spyndex.computeIndex(index=name, params=_spyndex_params(name, bands)), dtype=np.float64)
    np.testing.assert_allclose(ours, ref, rtol=1e-6, atol=0)


def test_ndvi_is_not_symmetric_in_its_bands():
    """A swapped NIR/red would flip the sign: make sure the comparison above can tell."""
    bands = _random_bands(0)
    ref = np.asarray(spyndex.computeIndex(index="NDVI", params=_spyndex_params("NDVI", bands)))
    swapped = indices.ndvi(bands["red"], bands["nir"])
    assert not np.allclose(swapped, ref, rtol=1e-6)


# Inputs whose first element has an exactly zero denominator (all values are
# exact in binary, so the sums are exactly 0) and whose second element does not.
ZERO_DEN = {
    "NDVI": {"nir": [0.0, 0.3], "red": [0.0, 0.1]},
    "NBR": {"nir": [0.0, 0.4], "swir2": [0.0, 0.1]},
    "NDMI": {"nir": [0.25, 0.4], "swir1": [-0.25, 0.2]},
    # 0.875 + 6·0 − 7.5·0.25 + 1 = 0 exactly.
    "EVI": {"nir": [0.875, 0.4], "red": [0.0, 0.05], "blue": [0.25, 0.03]},
}


@pytest.mark.parametrize("kind", ["numpy", "xarray"])
@pytest.mark.parametrize("name", sorted(FUNCS))
def test_zero_denominator_gives_nan_not_inf(name, kind):
    func, roles = FUNCS[name]
    args = [np.array(ZERO_DEN[name][r], dtype=np.float64) for r in roles]
    if kind == "xarray":
        args = [xr.DataArray(a, dims="pixel") for a in args]
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no divide-by-zero RuntimeWarning either
        out = np.asarray(func(*args), dtype=np.float64)
    assert out.shape == (2,)
    assert np.isnan(out[0]), f"{name}: zero denominator gave {out[0]!r}, expected NaN"
    assert not np.isinf(out).any()
    # The other element is an ordinary value, equal to the reference formula.
    plain = {r: np.array(ZERO_DEN[name][r][1:]) for r in roles}
    ref = np.asarray(spyndex.computeIndex(index=name, params=_spyndex_params(name, plain)), dtype=np.float64)
    np.testing.assert_allclose(out[1:], ref, rtol=1e-6)


def test_compute_with_missing_band_raises_config_error():
    with pytest.raises(ConfigError, match="red"):
        indices.compute("ndvi", {"nir": np.array([0.3]), "blue": np.array([0.02])})


def test_compute_unknown_index_raises_config_error():
    with pytest.raises(ConfigError):
        indices.compute("not_an_index", {"nir": np.array([0.3]), "red": np.array([0.02])})
