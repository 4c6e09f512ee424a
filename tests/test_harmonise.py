"""Dates of several sensors in one series: the adjustment to a reference sensor, the per-date sensor the readers record, and the network's sensor feature."""

from __future__ import annotations

import numpy as np
import pytest

from plantation.errors import ConfigError, RegionError
from plantation.imagery.harmonise import ETM, MSI, OLI, canonical_sensor, coefficients, harmonise

BANDS = ["blue", "green", "red", "nir", "swir1", "swir2"]


def test_oli_dates_are_unchanged_and_others_move_band_by_band():
    x = np.full((3, 6, 2, 2), 0.2, np.float32)
    out = harmonise(x, [OLI, ETM, MSI], BANDS)
    assert out.dtype == np.float32 and out is not x
    np.testing.assert_array_equal(out[0], x[0])
    # ETM+ nir: 0.8462 · 0.2 + 0.0412 (Roy et al. 2016); MSI red: 0.9765 · 0.2 + 0.0009 (HLS).
    np.testing.assert_allclose(out[1, 3], 0.8462 * 0.2 + 0.0412, rtol=1e-6)
    np.testing.assert_allclose(out[2, 2], 0.9765 * 0.2 + 0.0009, rtol=1e-6)
    np.testing.assert_array_equal(x, np.float32(0.2))  # the input is left alone


def test_bands_without_a_coefficient_pass_through_and_nan_stays_nan():
    bands = ["coastal", "red", "rededge1", "nir_broad"]
    x = np.full((1, 4, 1, 2), 0.3, np.float32)
    x[0, 1, 0, 1] = np.nan
    out = harmonise(x, [ETM], bands)
    np.testing.assert_array_equal(out[0, [0, 2, 3]], x[0, [0, 2, 3]])
    np.testing.assert_allclose(out[0, 1, 0, 0], 0.9047 * 0.3 + 0.0061, rtol=1e-6)
    assert np.isnan(out[0, 1, 0, 1])


def test_sensor_spellings_and_landsat_9_are_canonical():
    assert canonical_sensor("OLI") == canonical_sensor("oli-2") == canonical_sensor("landsat-9") == canonical_sensor("oli+tirs") == OLI
    assert canonical_sensor("etm+") == canonical_sensor("LE07") == ETM
    assert canonical_sensor("Sentinel-2C") == canonical_sensor("msi") == MSI
    assert canonical_sensor(" Spot7 ") == "spot7"
    slope, intercept = coefficients(["landsat-9", "oli"], BANDS)
    assert (slope == 1).all() and (intercept == 0).all()


def test_unknown_unnamed_sensors_and_references_are_refused_in_one_line():
    x = np.zeros((2, 6, 1, 1), np.float32)
    with pytest.raises(RegionError, match=r"date 2: sensor 'spot7' has no published adjustment to landsat_oli") as e:
        harmonise(x, [OLI, "spot7"], BANDS)
    assert "\n" not in str(e.value)
    with pytest.raises(RegionError, match=r"date 1: its sensor is not named.*region.sensors"):
        harmonise(x, ["", OLI], BANDS)
    with pytest.raises(ConfigError, match=r"region.harmonise.reference: 'msi' has no published coefficients"):
        harmonise(x, [OLI, OLI], BANDS, reference="msi")
    with pytest.raises(ValueError, match=r"does not match 3 dates"):
        harmonise(x, [OLI, OLI, OLI], BANDS)
