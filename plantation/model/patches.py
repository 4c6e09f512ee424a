"""Training samples: a k × k neighbourhood around each labelled pixel, every date.

For each reference point the sample holds, per date, the reflectance bands
and spectral indices of the k × k pixels centred on it (float32, NaN where
not observed) and the validity mask. Nothing is filled in here: the network
decides what a missing value becomes, and always sees the mask.

Splits are spatial: the region is cut into square blocks (across tile seams),
whole blocks go to train, validation or test, and a validation point whose
neighbourhood overlaps a training point's, or a test point whose neighbourhood
overlaps a training or validation point's, is dropped, so no pixel is seen in
two splits.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import xarray as xr

from plantation.errors import ConfigError, LabelError, RegionError
from plantation.imagery import indices as idx
from plantation.imagery.region import TileStack
from plantation.model.outcomes import Outcomes
from plantation.reference.labels import LabelSet

SPLITS: tuple[str, ...] = ("train", "val", "test")


@dataclass
class PatchSet:
    """Neighbourhood samples of labelled points.

    Attributes:
        x: float32 (n, time, channel, k, k): reflectance bands then indices,
            NaN where not observed.
        valid: bool (n, time, k, k).
        target: int64 (n,) outcome index (see :class:`~plantation.model.outcomes.Outcomes`).
        tile, row, col: where each sample's centre pixel is.
        split: int8 (n,): 0 train, 1 validation, 2 test, −1 dropped (too
            close to a training point).
        channels: names of the channels.
        dates: datetime64[D] (time,).
        outcomes: the outcome indexing.
    """

    x: np.ndarray
    valid: np.ndarray
    target: np.ndarray
    tile: np.ndarray
    row: np.ndarray
    col: np.ndarray
    split: np.ndarray
    channels: tuple[str, ...]
    dates: np.ndarray
    outcomes: Outcomes

    def __len__(self) -> int:
        return len(self.target)

    def subset(self, mask: np.ndarray) -> PatchSet:
        """The samples where ``mask`` is True (arrays are views or copies; metadata shared)."""
        m = np.asarray(mask)
        return PatchSet(self.x[m], self.valid[m], self.target[m], self.tile[m], self.row[m], self.col[m], self.split[m], self.channels, self.dates, self.outcomes)

    def part(self, name: str) -> PatchSet:
        """One split by name: ``train``, ``val`` or ``test``."""
        if name not in SPLITS:
            raise ValueError(f"split {name!r} is not one of {SPLITS}")
        return self.subset(self.split == SPLITS.index(name))


def day_of_year_fraction(dates: np.ndarray) -> np.ndarray:
    """Position of each date in its year, in [0, 1) (1 January = 0), float32."""
    d = np.asarray(dates, dtype="datetime64[D]")
    start = d.astype("datetime64[Y]").astype("datetime64[D]")
    length = (start.astype("datetime64[Y]") + 1).astype("datetime64[D]") - start
    return ((d - start).astype(np.float64) / length.astype(np.float64)).astype(np.float32)


def year_of(dates: np.ndarray) -> np.ndarray:
    """Calendar year of each date (int64)."""
    return np.asarray(dates, dtype="datetime64[Y]").astype(np.int64) + 1970


def channel_names(bands: Sequence[str], index_names: Sequence[str]) -> tuple[str, ...]:
    """Channel order of the features: bands, then indices (upper case)."""
    return tuple(bands) + tuple(n.upper() for n in index_names)


def features(reflectance: np.ndarray, bands: Sequence[str], index_names: Sequence[str]) -> np.ndarray:
    """Stack reflectance and spectral indices along the channel axis.

    Args:
        reflectance: float32 (..., band, y, x) surface reflectance, NaN where
            invalid; ``band`` is axis −3.
        bands: band roles in order.
        index_names: indices to add (see :data:`plantation.imagery.indices.INDICES`).

    Returns:
        float32 (..., band + index, y, x). Indices are clipped to [−1, 1]
        (EVI can run away over thin cloud); NaN stays NaN.
    """
    r = np.asarray(reflectance, dtype=np.float32)
    roles = {b: r[..., i, :, :] for i, b in enumerate(bands)}
    extra = []
    with np.errstate(invalid="ignore", divide="ignore"):
        for n in index_names:
            v = np.asarray(idx.compute(n, roles), dtype=np.float32)
            extra.append(np.clip(v, -1.0, 1.0))
    if not extra:
        return r
    return np.concatenate([r, np.stack(extra, axis=-3)], axis=-3)


def read_patches(stack: TileStack, rows: np.ndarray, cols: np.ndarray, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Reflectance and validity of k × k windows centred on pixels of one tile.

    Pixels of a window outside the tile are NaN and invalid.

    Returns:
        (float32 (n, time, band, k, k), bool (n, time, k, k)).
    """
    if k < 1 or k % 2 == 0:
        raise ConfigError(f"samples.neighbourhood: {k!r} must be an odd number of pixels (1, 3, 5, ...)")
    r = k // 2
    off = np.arange(-r, r + 1)
    rr = np.asarray(rows)[:, None, None] + off[None, :, None]
    cc = np.asarray(cols)[:, None, None] + off[None, None, :]
    rr, cc = np.broadcast_arrays(rr, cc)
    inside = (rr >= 0) & (rr < stack.grid.height) & (cc >= 0) & (cc < stack.grid.width)
    ri = xr.DataArray(np.clip(rr, 0, stack.grid.height - 1), dims=("point", "dy", "dx"))
    ci = xr.DataArray(np.clip(cc, 0, stack.grid.width - 1), dims=("point", "dy", "dx"))
    refl = stack.reflectance.isel(y=ri, x=ci).transpose("point", "time", "band", "dy", "dx").values.astype(np.float32)
    valid = stack.valid.isel(y=ri, x=ci).transpose("point", "time", "dy", "dx").values.astype(bool)
    valid &= inside[:, None]
    refl[~np.broadcast_to(valid[:, :, None], refl.shape)] = np.nan
    return refl, valid


def spatial_split(gx: np.ndarray, gy: np.ndarray, *, block: int, shares: Sequence[float], k: int, seed: int) -> np.ndarray:
    """Assign points to train (0), validation (1) or test (2) by spatial block.

    Coordinates are region-wide pixel units (CRS coordinates divided by the
    pixel size), so blocks and buffers run across tile seams. Blocks of
    ``block`` × ``block`` pixels are shuffled with ``seed`` and dealt to the
    splits in proportion to ``shares`` (train, val, test). A point whose
    k × k window overlaps the window of a point in an earlier split (a
    validation point near a training point, a test point near a training or
    validation point) is marked −1 (dropped).

    Returns:
        int8 (n,) split codes.
    """
    if len(shares) != 3 or min(shares) < 0 or not np.isclose(sum(shares), 1.0):
        raise ConfigError(f"split.shares: {list(shares)!r} must be three non-negative shares (train, val, test) summing to 1")
    if block < 1:
        raise ConfigError(f"split.block: {block!r} must be a positive number of pixels")
    gx = np.asarray(gx, dtype=np.float64)
    gy = np.asarray(gy, dtype=np.float64)
    keys = np.floor(gx / block).astype(np.int64) * 1_000_003 + np.floor(gy / block).astype(np.int64)
    uniq, inverse, counts = np.unique(keys, return_inverse=True, return_counts=True)
    rng = np.random.default_rng(seed)
    order = rng.permutation(len(uniq))
    # Deal blocks by cumulative point count so each split gets about its share
    # of points even when blocks hold different numbers of them.
    c = counts[order]
    mid = (np.cumsum(c) - c / 2) / c.sum()
    block_split = np.empty(len(uniq), np.int8)
    block_split[order] = np.searchsorted(np.cumsum(shares)[:2], mid, side="right")
    split = block_split[inverse].astype(np.int8)
    # Buffer: two windows overlap when both offsets are below k pixels.
    for later in (1, 2):
        earlier = np.flatnonzero((split >= 0) & (split < later))
        mine = np.flatnonzero(split == later)
        if len(earlier) == 0 or len(mine) == 0:
            continue
        clash = np.zeros(len(mine), bool)
        for i in range(0, len(mine), 512):  # bounded memory for large label sets
            sl = slice(i, i + 512)
            dx = np.abs(gx[mine[sl]][:, None] - gx[earlier][None, :])
            dy = np.abs(gy[mine[sl]][:, None] - gy[earlier][None, :])
            clash[sl] = ((dx < k - 0.5) & (dy < k - 0.5)).any(1)
        split[mine[clash]] = -1
    return split


def check_years(dates: np.ndarray) -> tuple[int, ...]:
    """The series' calendar years, which must be consecutive.

    Raises:
        RegionError: some year between the first and the last has no date
            (every year needs at least one, or its conversions could not be
            told apart).
    """
    years = np.unique(year_of(dates))
    missing = sorted(set(range(int(years[0]), int(years[-1]) + 1)) - {int(y) for y in years})
    if missing:
        raise RegionError(f"the imagery has no date in {missing}; every year from {years[0]} to {years[-1]} needs at least one (add composites or drop the years before the gap)")
    return tuple(int(y) for y in years)


def build_patches(stacks: Sequence[TileStack], labels: LabelSet, *, bands: Sequence[str], index_names: Sequence[str], k: int, block: int, shares: Sequence[float], seed: int) -> PatchSet:
    """Samples for every labelled point of a region, with a spatial split.

    Raises:
        LabelError: no label falls on any tile, or an onset year is outside
            the imagery's years.
    """
    pts = labels.points
    by_name = {s.name: s for s in stacks}
    dates = stacks[0].dates
    outcomes = Outcomes(check_years(dates))
    xs, vs, tiles, rows, cols, targets, gxs, gys = [], [], [], [], [], [], [], []
    res = abs(stacks[0].grid.transform.a)
    for name, grp in pts.groupby("tile", sort=True):
        if name not in by_name:
            continue
        refl, valid = read_patches(by_name[name], grp["row"].to_numpy(), grp["col"].to_numpy(), k)
        xs.append(features(refl, bands, index_names))
        vs.append(valid)
        tiles.append(np.full(len(grp), name, dtype=object))
        rows.append(grp["row"].to_numpy())
        cols.append(grp["col"].to_numpy())
        gxs.append(grp["x"].to_numpy() / res)
        gys.append(grp["y"].to_numpy() / res)
        try:
            targets.append(outcomes.encode(grp["label"].tolist(), grp["onset_year"].tolist()))
        except LabelError as exc:
            raise LabelError(f"{labels.path}: {exc}") from None
    if not xs:
        raise LabelError(f"{labels.path}: no labelled point falls on the region's tiles")
    tile = np.concatenate(tiles)
    row = np.concatenate(rows).astype(np.int64)
    col = np.concatenate(cols).astype(np.int64)
    split = spatial_split(np.concatenate(gxs), np.concatenate(gys), block=block, shares=shares, k=k, seed=seed)
    return PatchSet(
        x=np.concatenate(xs),
        valid=np.concatenate(vs),
        target=np.concatenate(targets),
        tile=tile,
        row=row,
        col=col,
        split=split,
        channels=channel_names(bands, index_names),
        dates=dates,
        outcomes=outcomes,
    )
