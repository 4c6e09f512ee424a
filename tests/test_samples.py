"""Neighbourhood samples and spatial splits on tiny regions."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from plantation.errors import ConfigError, RegionError
from plantation.imagery.region import open_region
from plantation.model.patches import build_patches, check_years, day_of_year_fraction, features, read_patches, spatial_split
from plantation.reference.labels import read_labels
from tests.conftest import BANDS, pixel_centre


def test_day_of_year_fraction():
    d = np.array(["2015-01-01", "2015-07-02", "2016-12-31"], dtype="datetime64[D]")
    np.testing.assert_allclose(day_of_year_fraction(d), [0.0, 182 / 365, 365 / 366], rtol=1e-6)


def test_features_add_indices_and_keep_nan():
    r = np.full((1, 6, 1, 2), 0.1, np.float32)
    r[0, 3] = 0.5  # nir
    r[0, :, 0, 1] = np.nan
    f = features(r, BANDS, ["NDVI", "NBR"])
    assert f.shape == (1, 8, 1, 2)
    assert f[0, 6, 0, 0] == pytest.approx((0.5 - 0.1) / 0.6)  # NDVI, red 0.1
    assert np.isnan(f[0, :, 0, 1]).all()


def test_patches_at_the_edge_are_invalid_outside_the_tile(make_region, tiny_values):
    qa = np.zeros((5, 8, 8), np.int16)
    qa[2, 0, 0] = 1  # cloud on date 3 at the corner
    stack = open_region(make_region(qa=qa))[0]
    refl, valid = read_patches(stack, np.array([0, 4]), np.array([0, 4]), 3)
    assert refl.shape == (2, 5, 6, 3, 3) and valid.shape == (2, 5, 3, 3)
    assert not valid[0, :, 0, :].any() and not valid[0, :, :, 0].any()  # row/col −1
    assert not valid[0, 2, 1, 1] and valid[0, 1, 1, 1]
    assert np.isnan(refl[0, 2, :, 1, 1]).all()
    # Values are the stored integers × 1e-4 at the right pixels.
    assert refl[1, 0, 3, 1, 2] == pytest.approx(tiny_values[0, 3, 4, 5] * 1e-4)
    with pytest.raises(ConfigError, match="odd number"):
        read_patches(stack, np.array([0]), np.array([0]), 4)


def test_spatial_split_keeps_blocks_whole_and_buffers_neighbours():
    rng = np.random.default_rng(0)
    n = 600
    gx, gy = rng.integers(0, 320, n).astype(float), rng.integers(0, 160, n).astype(float)
    split = spatial_split(gx, gy, block=32, shares=[0.6, 0.2, 0.2], k=5, seed=3)
    key = [f"{int(x) // 32}/{int(y) // 32}" for x, y in zip(gx, gy, strict=True)]
    kept = split >= 0
    for kk in set(key):
        s = set(split[(np.array(key) == kk) & kept].tolist())
        assert len(s) <= 1, f"block {kk} is split between {s}"
    # No kept window overlaps a window of another split.
    for i in np.flatnonzero(kept):
        other = kept & (split != split[i])
        assert not ((np.abs(gx[other] - gx[i]) < 5) & (np.abs(gy[other] - gy[i]) < 5)).any()
    shares = np.bincount(split[kept], minlength=3) / kept.sum()
    assert shares[0] == pytest.approx(0.6, abs=0.12)
    # The same seed gives the same split; another seed another one.
    assert np.array_equal(split, spatial_split(gx, gy, block=32, shares=[0.6, 0.2, 0.2], k=5, seed=3))
    assert not np.array_equal(split, spatial_split(gx, gy, block=32, shares=[0.6, 0.2, 0.2], k=5, seed=4))
    with pytest.raises(ConfigError, match="split.shares"):
        spatial_split(gx, gy, block=32, shares=[0.6, 0.6], k=5, seed=3)


def test_spatial_split_buffers_across_a_tile_seam():
    # Two points one pixel apart in ground coordinates, in different blocks
    # (31 | 32): whichever split gets the second, it must not keep both.
    gx = np.array([31.0, 32.0] + [100.0 + 40 * i for i in range(40)])
    gy = np.zeros(len(gx))
    for seed in range(20):
        split = spatial_split(gx, gy, block=32, shares=[0.5, 0.25, 0.25], k=3, seed=seed)
        if split[0] >= 0 and split[1] >= 0:
            assert split[0] == split[1]


def test_missing_year_is_refused():
    d = np.array(["2015-02-01", "2016-02-01", "2018-02-01"], dtype="datetime64[D]")
    with pytest.raises(RegionError, match=r"no date in \[2017\]"):
        check_years(d)
    assert check_years(d[:2]) == (2015, 2016)


def test_build_samples_encodes_outcomes(make_region, tmp_path):
    pts = [(1, 1, "stable_forest", ""), (2, 5, "conversion", 2016), (6, 6, "other", "")]
    rows = [dict(zip(("x", "y"), pixel_centre(r, c), strict=True)) | {"label": lab, "onset_year": y} for r, c, lab, y in pts]
    path = tmp_path / "labels.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    region = make_region(labels=path)
    stacks = open_region(region)
    labels = read_labels(path, grids={s.name: s.grid for s in stacks}, years=[2015, 2016, 2017], csv_crs=region.labels.crs)
    s = build_patches(stacks, labels, bands=BANDS, index_names=["NDVI"], k=3, block=4, shares=[1.0, 0.0, 0.0], seed=0)
    assert s.x.shape == (3, 5, 7, 3, 3)
    order = np.argsort(s.row)
    assert s.target[order].tolist() == [0, 3 + 1, 2]  # 2016 is the second year
    assert s.outcomes.years == (2015, 2016, 2017)
    assert s.channels == (*BANDS, "NDVI")
