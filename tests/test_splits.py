"""Stable spatial splits: a block's split depends on its position, the seed and the shares only, and a grown label set keeps every old point's split."""

from __future__ import annotations

import hashlib
import struct

import numpy as np
import pandas as pd
import pytest

from plantation.imagery.region import open_region
from plantation.model.outcomes import Outcomes
from plantation.model.patches import NEW, PatchSet, block_draw, block_splits, build_patches, spatial_split
from plantation.reference.labels import read_labels
from tests.conftest import BANDS, TRANSFORM, pixel_centre

SHARES = [0.7, 0.15, 0.15]


def expected_split(u: float, shares: list[float] = SHARES) -> int:
    return 0 if u < shares[0] else 1 if u < shares[0] + shares[1] else 2


def block_with(code: int, seed: int, *, iy: int = 0, start: int = 0) -> int:
    """The first block column from ``start`` (row ``iy``) whose split is ``code``."""
    for ix in range(start, start + 1000):
        if expected_split(float(block_draw(np.array([ix]), np.array([iy]), seed)[0])) == code:
            return ix
    raise AssertionError(f"no block with split {code}")


def overlaps_between_splits(gx: np.ndarray, gy: np.ndarray, split: np.ndarray, k: int) -> int:
    """Pairs of kept points in different splits whose k × k windows overlap."""
    kept = np.flatnonzero(split >= 0)
    dx = np.abs(gx[kept][:, None] - gx[kept][None, :])
    dy = np.abs(gy[kept][:, None] - gy[kept][None, :])
    other = split[kept][:, None] != split[kept][None, :]
    return int(((dx < k) & (dy < k) & other).sum())


def test_block_draw_is_a_fixed_hash_of_seed_and_block():
    # Pinned values: the split of a block must not change with numpy, the platform or the label file.
    np.testing.assert_array_equal(block_draw(np.array([0, -1, 5]), np.array([0, -1, -7]), 0), [0.389602994431968, 0.5981346514726951, 0.30712955034773703])
    assert block_draw(np.array([0]), np.array([0]), 1)[0] == 0.8826577762421912
    # The definition: BLAKE2b of the int64 triple, top 53 bits of its first 8 bytes.
    h = hashlib.blake2b(struct.pack("<qqq", 7, -3, 12), digest_size=8, person=b"plantation.split").digest()
    assert block_draw(np.array([-3]), np.array([12]), 7)[0] == (int.from_bytes(h, "little") >> 11) / 2.0**53


def test_same_points_same_split_and_a_block_ignores_other_points():
    rng = np.random.default_rng(1)
    gx, gy = rng.uniform(-500, 500, 400), rng.uniform(-300, 300, 400)
    first = spatial_split(gx, gy, block=32, shares=SHARES, k=3, seed=5)
    for _ in range(3):
        np.testing.assert_array_equal(spatial_split(gx, gy, block=32, shares=SHARES, k=3, seed=5), first)
    # A point's block split is the same alone as among the others, in any order.
    whole = block_splits(gx, gy, block=32, shares=SHARES, seed=5)
    order = rng.permutation(400)
    np.testing.assert_array_equal(block_splits(gx[order], gy[order], block=32, shares=SHARES, seed=5), whole[order])
    for i in range(0, 400, 37):
        assert block_splits(gx[i : i + 1], gy[i : i + 1], block=32, shares=SHARES, seed=5)[0] == whole[i]
    # The seed matters.
    assert not np.array_equal(block_splits(gx, gy, block=32, shares=SHARES, seed=6), whole)


@pytest.mark.parametrize("seed", range(6))
def test_adding_points_never_changes_an_old_points_split(seed):
    rng = np.random.default_rng(100 + seed)
    k, block = 5, 16
    gx = rng.integers(-120, 120, 300).astype(float)
    gy = rng.integers(-80, 80, 300).astype(float)
    gx, gy = np.unique(np.column_stack([gx, gy]), axis=0).T  # one point per pixel
    split = spatial_split(gx, gy, block=block, shares=SHARES, k=k, seed=seed)
    # Three more versions, each adding points (many of them next to old ones).
    for version in range(3):
        near = rng.choice(len(gx), 40)
        ax = np.concatenate([gx[near] + rng.integers(-3, 4, 40), rng.integers(-150, 150, 60)]).astype(float)
        ay = np.concatenate([gy[near] + rng.integers(-3, 4, 40), rng.integers(-100, 100, 60)]).astype(float)
        fresh = ~pd.MultiIndex.from_arrays([ax, ay]).isin(pd.MultiIndex.from_arrays([gx, gy]))
        ax, ay = np.unique(np.column_stack([ax[fresh], ay[fresh]]), axis=0).T
        inherit = np.concatenate([split, np.full(len(ax), NEW, np.int8)])
        gx, gy = np.concatenate([gx, ax]), np.concatenate([gy, ay])
        grown = spatial_split(gx, gy, block=block, shares=SHARES, k=k, seed=seed, inherit=inherit)
        np.testing.assert_array_equal(grown[: len(split)], split, err_msg=f"version {version + 2}")
        assert overlaps_between_splits(gx, gy, grown, k) == 0
        # New points are either dropped or in their block's split.
        new = grown[len(split) :]
        own = block_splits(ax, ay, block=block, shares=SHARES, seed=seed)
        assert ((new == -1) | (new == own)).all()
        assert (new == -1).any() and (new == own).any()  # both happen: the checks above are not vacuous
        split = grown


def test_a_new_point_falls_into_its_blocks_split():
    seed = 2
    for code in (0, 1, 2):
        ix = block_with(code, seed, start=10 * code)
        # Old points far away in other blocks; the new one in block (ix, 0).
        gx = np.array([-500.0, 500.0, 32 * ix + 7.5])
        gy = np.array([-500.0, 500.0, 20.5])
        got = spatial_split(gx, gy, block=32, shares=SHARES, k=5, seed=seed, inherit=np.array([0, 2, NEW], np.int8))
        assert got.tolist() == [0, 2, code]


@pytest.mark.parametrize(("old_code", "new_code"), [(1, 0), (0, 1), (2, 0), (0, 2), (2, 1), (1, 2)])
def test_a_new_point_touching_an_old_point_of_another_split_is_dropped(old_code, new_code):
    seed = 4
    ix = block_with(new_code, seed)
    x0 = 32.0 * ix + 10
    # The old point sits in the new point's block but kept another split in its version;
    # windows of 3 × 3 overlap at 2 px, not at 3 px.
    for offset, dropped in ((2.0, True), (3.0, False)):
        got = spatial_split(np.array([x0, x0 + offset]), np.array([5.0, 5.0]), block=32, shares=SHARES, k=3, seed=seed, inherit=np.array([old_code, NEW], np.int8))
        assert got.tolist() == [old_code, -1 if dropped else new_code], (offset, got)
    # Next to an old point of its own split, it stays.
    got = spatial_split(np.array([x0, x0 + 1]), np.array([5.0, 5.0]), block=32, shares=SHARES, k=3, seed=seed, inherit=np.array([new_code, NEW], np.int8))
    assert got.tolist() == [new_code, new_code]
    # Next to an old dropped point, it stays too: a dropped point is in no split.
    got = spatial_split(np.array([x0, x0 + 1]), np.array([5.0, 5.0]), block=32, shares=SHARES, k=3, seed=seed, inherit=np.array([-1, NEW], np.int8))
    assert got.tolist() == [-1, new_code]


def test_old_points_are_never_rebuffered():
    # Two old points of different splits side by side (as a wrong parent might give): both keep their codes.
    got = spatial_split(np.array([0.0, 1.0, 2.0]), np.array([0.0, 0.0, 0.0]), block=32, shares=SHARES, k=5, seed=0, inherit=np.array([0, 1, -1], np.int8))
    assert got.tolist() == [0, 1, -1]


def test_all_new_is_the_same_as_no_inherit():
    rng = np.random.default_rng(7)
    gx, gy = rng.integers(0, 200, 500).astype(float), rng.integers(0, 200, 500).astype(float)
    plain = spatial_split(gx, gy, block=16, shares=SHARES, k=5, seed=1)
    assert (plain == -1).sum() > 10
    np.testing.assert_array_equal(spatial_split(gx, gy, block=16, shares=SHARES, k=5, seed=1, inherit=np.full(500, NEW, np.int8)), plain)


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("shares", [SHARES, [0.5, 0.25, 0.25], [0.2, 0.0, 0.8]])
def test_shares_are_met_over_many_blocks(seed, shares):
    # 10 000 blocks with one point each, far apart (k = 1): no buffer.
    iy, ix = np.divmod(np.arange(10_000), 100)
    gx, gy = 32.0 * (ix - 50) + 3.5, 32.0 * (iy - 50) + 17.5
    split = spatial_split(gx, gy, block=32, shares=shares, k=1, seed=seed)
    got = np.bincount(split, minlength=3) / len(split)
    np.testing.assert_allclose(got, shares, atol=0.02)
    if shares[1] == 0:
        assert not (split == 1).any()


def test_negative_coordinates_are_blocked_by_floor():
    gx = np.array([-0.5, -31.5, -32.5, 0.5, -64.0, -33.0])
    gy = np.array([-1.0, -20.0, -1.0, -1.0, 5.0, 31.9])
    got = block_splits(gx, gy, block=32, shares=SHARES, seed=3)
    # Blocks: (-1, -1), (-1, -1), (-2, -1), (0, -1), (-2, 0), (-2, 0).
    draws = block_draw(np.array([-1, -2, 0, -2]), np.array([-1, -1, -1, 0]), 3)
    want = [expected_split(u) for u in draws]
    assert got.tolist() == [want[0], want[0], want[1], want[2], want[3], want[3]]
    # Enough negative blocks to see every split, each kept whole.
    rng = np.random.default_rng(0)
    gx, gy = rng.uniform(-640, -1, 3000), rng.uniform(-640, -1, 3000)
    split = spatial_split(gx, gy, block=32, shares=SHARES, k=1, seed=3)
    assert set(split.tolist()) == {0, 1, 2}
    bx, by = np.floor(gx / 32), np.floor(gy / 32)
    per_block = pd.DataFrame({"bx": bx, "by": by, "s": split}).groupby(["bx", "by"])["s"].nunique()
    assert (per_block == 1).all()


def test_no_pixel_is_in_two_splits():
    rng = np.random.default_rng(11)
    for k in (1, 3, 5):
        gx, gy = rng.integers(-60, 60, 800).astype(float), rng.integers(-60, 60, 800).astype(float)
        gx, gy = np.unique(np.column_stack([gx, gy]), axis=0).T
        split = spatial_split(gx, gy, block=8, shares=[0.5, 0.25, 0.25], k=k, seed=k)
        assert overlaps_between_splits(gx, gy, split, k) == 0
        assert len(set(split[split >= 0].tolist())) == 3


def test_bad_inherit_is_refused():
    gx = np.array([0.0, 40.0])
    with pytest.raises(ValueError, match="inherit has 1 codes for 2 points"):
        spatial_split(gx, gx, block=32, shares=SHARES, k=3, seed=0, inherit=np.array([0], np.int8))
    with pytest.raises(ValueError, match="inherit code 5"):
        spatial_split(gx, gx, block=32, shares=SHARES, k=3, seed=0, inherit=np.array([0, 5], np.int8))


def tiny_patches(n: int, *, channels: tuple[str, ...] = ("red", "nir"), years: tuple[int, ...] = (2015, 2016), weight: np.ndarray | None = None, start: int = 0) -> PatchSet:
    dates = np.array([f"{y}-06-01" for y in years], dtype="datetime64[D]")
    return PatchSet(
        x=np.full((n, len(dates), len(channels), 3, 3), float(start), np.float32),
        valid=np.ones((n, len(dates), 3, 3), bool),
        target=np.arange(start, start + n) % 5,
        tile=np.array(["t1"] * n, dtype=object),
        row=np.arange(start, start + n),
        col=np.zeros(n, np.int64),
        split=np.zeros(n, np.int8),
        channels=channels,
        dates=dates,
        outcomes=Outcomes(years),
        weight=weight,
    )


def test_weight_is_carried_through_subset_and_concat():
    a = tiny_patches(4)
    assert a.weight is None and a.weight_or_ones().tolist() == [1.0] * 4 and a.subset([0, 2]).weight is None
    b = tiny_patches(3, weight=np.array([0.5, 0.25, 0.75]), start=10)
    b.split[:] = 0
    both = a.concat(b)
    assert len(both) == 7 and both.row.tolist() == [0, 1, 2, 3, 10, 11, 12]
    assert both.weight is not None and both.weight.dtype == np.float32
    np.testing.assert_array_equal(both.weight, [1, 1, 1, 1, 0.5, 0.25, 0.75])
    assert both.x[4, 0, 0, 0, 0] == 10.0 and both.target.tolist() == [0, 1, 2, 3, 0, 1, 2]
    part = both.subset(both.row >= 11)
    np.testing.assert_array_equal(part.weight, [0.25, 0.75])
    np.testing.assert_array_equal(both.part("train").weight, both.weight)
    # Weights given on the first set only: ones for the second.
    np.testing.assert_array_equal(b.concat(a).weight, [0.5, 0.25, 0.75, 1, 1, 1, 1])
    assert a.concat(tiny_patches(2)).weight is None


def test_concat_and_weight_are_checked():
    a = tiny_patches(2)
    with pytest.raises(ValueError, match="channels"):
        a.concat(tiny_patches(2, channels=("red", "swir1")))
    with pytest.raises(ValueError, match="outcomes|dates"):
        a.concat(tiny_patches(2, years=(2015, 2016, 2017)))
    with pytest.raises(ValueError, match="shape"):
        tiny_patches(2, weight=np.ones(3))
    with pytest.raises(ValueError, match="non-negative"):
        tiny_patches(2, weight=np.array([1.0, -1.0]))


def test_build_patches_keeps_inherited_splits(make_region, tmp_path):
    pts = [(1, 1), (1, 2), (6, 6), (3, 5)]
    rows = [dict(zip(("x", "y"), pixel_centre(r, c), strict=True)) | {"label": "stable_forest", "onset_year": ""} for r, c in pts]
    path = tmp_path / "labels.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    region = make_region(labels=path)
    stacks = open_region(region)
    labels = read_labels(path, grids={s.name: s.grid for s in stacks}, years=[2015, 2016, 2017], csv_crs=region.labels.crs)
    common = dict(bands=BANDS, index_names=["NDVI"], k=3, block=2, shares=SHARES, seed=0)
    plain = build_patches(stacks, labels, **common)
    assert plain.weight is None
    key = {(int(r), int(c)): int(s) for r, c, s in zip(plain.row, plain.col, plain.split, strict=True)}
    # Without a parent, each kept point has its block's split (2-pixel blocks).
    gx = np.array([pixel_centre(r, c)[0] for r, c in pts]) / TRANSFORM.a
    gy = np.array([pixel_centre(r, c)[1] for r, c in pts]) / TRANSFORM.a
    blocks = block_splits(gx, gy, block=2, shares=SHARES, seed=0)
    assert all(key[p] in (b, -1) for p, b in zip(pts, blocks.tolist(), strict=True))
    # The parent had (1, 1) in test and (6, 6) dropped; (1, 2) is new and touches (1, 1).
    inherited = build_patches(stacks, labels, **common, inherit={("t1", 1, 1): 2, ("t1", 6, 6): -1})
    got = {(int(r), int(c)): int(s) for r, c, s in zip(inherited.row, inherited.col, inherited.split, strict=True)}
    assert got[(1, 1)] == 2 and got[(6, 6)] == -1
    assert got[(1, 2)] == (2 if blocks[1] == 2 else -1)
    assert got[(3, 5)] == blocks[3]
