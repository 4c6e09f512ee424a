"""Training samples: a k × k neighbourhood around each labelled pixel, every date.

For each reference point the sample holds, per date, the reflectance bands
and spectral indices of the k × k pixels centred on it (float32, NaN where
not observed) and the validity mask. Nothing is filled in here: the network
decides what a missing value becomes, and always sees the mask.

Splits are spatial. The region is cut into square blocks of region-wide
pixel coordinates (``floor(x / block)``, ``floor(y / block)``, across tile
seams, negative coordinates included), and each block goes whole to train,
validation or test. A block's split is a fixed function of the block's
position, the seed and the shares alone: a number in [0, 1) hashed from
(seed, block column, block row) with BLAKE2b (the same on every platform and
numpy version), compared with the cumulative shares. So the shares are met
in expectation over blocks, not exactly, and a block keeps its split however
many points are labelled in it or elsewhere.

A validation point whose neighbourhood overlaps a training point's, or a
test point whose neighbourhood overlaps a training or validation point's, is
dropped, so no pixel is seen in two splits. That buffer depends on the other
points, so a retrain on a grown label file passes the parent's split of each
point (``inherit``): those points keep it exactly, a new point takes its
block's split and is dropped if its neighbourhood touches a point of another
split. A point's split then never changes between label versions.

A labelled point whose own pixel is never seen clear (invalid on every date:
cloud, nodata or masked values throughout) is dropped before the split, with
one warning naming how many and the first few label lines (or features):
its sample would be an all-masked input, so the network would learn, and the
held-out metrics would score, a label the imagery cannot show. The count is
:attr:`PatchSet.dropped_unseen`; such a point is not in the samples, so a
run's ``points.csv`` lists it as dropped.
"""

from __future__ import annotations

import hashlib
import logging
import struct
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import xarray as xr
from scipy.spatial import cKDTree

from plantation.errors import ConfigError, LabelError, RegionError
from plantation.imagery import indices as idx
from plantation.imagery.region import TileStack
from plantation.model.outcomes import Outcomes
from plantation.reference.labels import LabelSet

log = logging.getLogger(__name__)

SPLITS: tuple[str, ...] = ("train", "val", "test")
#: Split code of a point left out by the buffer.
DROPPED: int = -1
#: ``inherit`` code of a point the parent version did not have.
NEW: int = -2


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
            close to a point of another split).
        channels: names of the channels.
        dates: datetime64[D] (time,).
        outcomes: the outcome indexing.
        weight: float32 (n,) per-sample loss weight (e.g. below 1 for
            automatically labelled pixels), or None: every sample weighs 1.
            :meth:`subset` and :meth:`concat` carry it.
        sensors: the sensor of each date (``""``: unnamed), or empty where
            unknown.
        dropped_unseen: how many labelled points were left out because their
            pixel is never seen clear (see the module docstring); carried by
            :meth:`subset`, added up by :meth:`concat`.
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
    weight: np.ndarray | None = None
    sensors: tuple[str, ...] = ()
    dropped_unseen: int = 0

    def __post_init__(self) -> None:
        if self.weight is not None:
            w = np.asarray(self.weight, dtype=np.float32)
            if w.shape != (len(self.target),):
                raise ValueError(f"PatchSet.weight: shape {w.shape} does not match the {len(self.target)} samples; give one weight per sample or None")
            if not (np.isfinite(w) & (w >= 0)).all():
                raise ValueError("PatchSet.weight: weights must be finite and non-negative")
            self.weight = w

    def __len__(self) -> int:
        return len(self.target)

    def weight_or_ones(self) -> np.ndarray:
        """float32 (n,) loss weight of each sample (ones where :attr:`weight` is None)."""
        return np.ones(len(self), np.float32) if self.weight is None else self.weight

    def subset(self, mask: np.ndarray) -> PatchSet:
        """The samples where ``mask`` (bool (n,) or indices) selects (arrays are views or copies; metadata shared)."""
        m = np.asarray(mask)
        w = None if self.weight is None else self.weight[m]
        return PatchSet(self.x[m], self.valid[m], self.target[m], self.tile[m], self.row[m], self.col[m], self.split[m], self.channels, self.dates, self.outcomes, w, self.sensors, self.dropped_unseen)

    def concat(self, other: PatchSet) -> PatchSet:
        """These samples followed by ``other``'s (e.g. automatically labelled pixels added to the training split).

        Both must have the same channels, dates, outcomes and neighbourhood.
        The weight is None when both are None, else the two weights with ones
        where one is None. Split codes are kept as they are.

        Raises:
            ValueError: the two sets differ in channels, dates, outcomes or
                neighbourhood size.
        """
        if tuple(self.channels) != tuple(other.channels):
            raise ValueError(f"PatchSet.concat: channels {tuple(other.channels)} differ from {tuple(self.channels)}; cut both sets with the same bands and indices")
        if not np.array_equal(np.asarray(self.dates, "datetime64[D]"), np.asarray(other.dates, "datetime64[D]")):
            raise ValueError(f"PatchSet.concat: the dates differ ({len(other.dates)} against {len(self.dates)}); cut both sets from the same imagery")
        if self.sensors and other.sensors and tuple(self.sensors) != tuple(other.sensors):
            raise ValueError("PatchSet.concat: the sensors of the dates differ; cut both sets from the same imagery")
        if self.outcomes != other.outcomes:
            raise ValueError(f"PatchSet.concat: outcomes for years {other.outcomes.years} differ from {self.outcomes.years}; cut both sets from the same imagery")
        if self.x.shape[1:] != other.x.shape[1:] or self.valid.shape[1:] != other.valid.shape[1:]:
            raise ValueError(f"PatchSet.concat: sample shape {other.x.shape[1:]} differs from {self.x.shape[1:]}; use the same neighbourhood")
        w = None if self.weight is None and other.weight is None else np.concatenate([self.weight_or_ones(), other.weight_or_ones()])
        return PatchSet(
            x=np.concatenate([self.x, other.x]),
            valid=np.concatenate([self.valid, other.valid]),
            target=np.concatenate([self.target, other.target]),
            tile=np.concatenate([np.asarray(self.tile, dtype=object), np.asarray(other.tile, dtype=object)]),
            row=np.concatenate([self.row, other.row]),
            col=np.concatenate([self.col, other.col]),
            split=np.concatenate([self.split, other.split]).astype(np.int8),
            channels=self.channels,
            dates=self.dates,
            outcomes=self.outcomes,
            weight=w,
            sensors=self.sensors or other.sensors,
            dropped_unseen=self.dropped_unseen + other.dropped_unseen,
        )

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


def block_draw(ix: np.ndarray, iy: np.ndarray, seed: int) -> np.ndarray:
    """A number in [0, 1) for each block, a fixed function of (seed, ix, iy).

    BLAKE2b over the little-endian int64 bytes of (seed, ix, iy); the top 53
    bits of its first 8 bytes, over 2⁵³. The same on every platform and numpy
    version, and independent of which other blocks exist.

    Args:
        ix, iy: int64 (m,) block column and row (any sign).
        seed: the split seed.

    Returns:
        float64 (m,).
    """
    if not -(2**63) <= int(seed) < 2**63:
        raise ConfigError(f"split.seed: {seed!r} must fit in a signed 64-bit integer")
    out = np.empty(len(ix), np.float64)
    for i, (a, b) in enumerate(zip(np.asarray(ix, np.int64).tolist(), np.asarray(iy, np.int64).tolist(), strict=True)):
        h = hashlib.blake2b(struct.pack("<qqq", int(seed), a, b), digest_size=8, person=b"plantation.split").digest()
        out[i] = (int.from_bytes(h, "little") >> 11) / 2.0**53
    return out


def _check_split_settings(block: int, shares: Sequence[float]) -> None:
    if len(shares) != 3 or min(shares) < 0 or not np.isclose(sum(shares), 1.0):
        raise ConfigError(f"split.shares: {list(shares)!r} must be three non-negative shares (train, val, test) summing to 1")
    if block < 1:
        raise ConfigError(f"split.block: {block!r} must be a positive number of pixels")


def block_splits(gx: np.ndarray, gy: np.ndarray, *, block: int, shares: Sequence[float], seed: int) -> np.ndarray:
    """The split of each point's block, before any buffer: 0 train, 1 validation, 2 test.

    The block of a point is (floor(gx / block), floor(gy / block)); its
    split is where :func:`block_draw` of the block and the seed falls among the
    cumulative ``shares``, so a block goes to train with probability
    ``shares[0]`` and so on, over blocks, whatever the other points.

    Args:
        gx, gy: float (n,) region-wide pixel coordinates (CRS coordinates
            divided by the pixel size).

    Returns:
        int8 (n,).
    """
    _check_split_settings(block, shares)
    gx = np.asarray(gx, dtype=np.float64).reshape(-1)
    gy = np.asarray(gy, dtype=np.float64).reshape(-1)
    if len(gx) == 0:
        return np.zeros(0, np.int8)
    ij = np.stack([np.floor(gx / block), np.floor(gy / block)], axis=1).astype(np.int64)
    keys, inverse = np.unique(ij, axis=0, return_inverse=True)
    u = block_draw(keys[:, 0], keys[:, 1], seed)
    # Blocks whose draw is below shares[0] train, below shares[0] + shares[1] validate, the rest test.
    code = np.searchsorted(np.cumsum(np.asarray(shares, dtype=np.float64))[:2], u, side="right").astype(np.int8)
    return code[np.asarray(inverse).reshape(-1)]


def windows_touch(ax: np.ndarray, ay: np.ndarray, bx: np.ndarray, by: np.ndarray, k: int) -> np.ndarray:
    """Whether each k × k window centred on a point of a overlaps any window centred on a point of b.

    Args:
        ax, ay, bx, by: float region-wide pixel coordinates (as in :func:`spatial_split`).
        k: window side in pixels.

    Returns:
        bool (len(ax),). E.g. to keep automatically labelled training pixels
        off the windows of validation and test points.
    """
    if len(ax) == 0 or len(bx) == 0:
        return np.zeros(len(ax), bool)
    # Two windows overlap when both offsets are below k pixels: Chebyshev distance ≤ k − 1
    # for pixel-aligned centres; strictly below k − 0.5 as before for any others.
    tree = cKDTree(np.column_stack([bx, by]))
    n = tree.query_ball_point(np.column_stack([ax, ay]), np.nextafter(k - 0.5, 0.0), p=np.inf, return_length=True)
    return np.asarray(n) > 0


def spatial_split(gx: np.ndarray, gy: np.ndarray, *, block: int, shares: Sequence[float], k: int, seed: int, inherit: np.ndarray | None = None) -> np.ndarray:
    """Assign points to train (0), validation (1) or test (2) by spatial block.

    Coordinates are region-wide pixel units (CRS coordinates divided by the
    pixel size), so blocks and buffers run across tile seams. Each block of
    ``block`` × ``block`` pixels has a split fixed by its position, ``seed``
    and ``shares`` alone (:func:`block_splits`), so ``shares`` (train, val,
    test) are met in expectation over blocks, not exactly.

    Without ``inherit``, a point whose k × k window overlaps the window of a
    point in an earlier split (a validation point near a training point, a
    test point near a training or validation point) is marked −1 (dropped).

    With ``inherit``, a point the parent had (code 0, 1, 2 or −1) keeps that
    code exactly and is never buffered again. A new point (code
    :data:`NEW`) takes its block's split and is dropped when its window
    overlaps that of a kept parent point of another split, in either
    direction (a new training point next to a parent validation point is
    dropped too); among the new points the buffer above applies. So no pixel
    is seen in two splits and no parent point changes split. With every
    point new, the result is the same as without ``inherit``.

    Args:
        gx, gy: float (n,) region-wide pixel coordinates.
        block: block side in pixels.
        shares: train, validation and test shares (non-negative, sum 1).
        k: neighbourhood side in pixels.
        seed: split seed.
        inherit: int8 (n,) each point's split in the parent version, or
            :data:`NEW`; None = every point is new.

    Returns:
        int8 (n,) split codes.
    """
    _check_split_settings(block, shares)
    gx = np.asarray(gx, dtype=np.float64).reshape(-1)
    gy = np.asarray(gy, dtype=np.float64).reshape(-1)
    if gx.shape != gy.shape:
        raise ValueError(f"spatial_split: gx has {len(gx)} points, gy {len(gy)}")
    split = block_splits(gx, gy, block=block, shares=shares, seed=seed)
    if inherit is None:
        new = np.ones(len(split), bool)
    else:
        inh = np.asarray(inherit).reshape(-1)
        if inh.shape != split.shape:
            raise ValueError(f"spatial_split: inherit has {len(inh)} codes for {len(split)} points")
        bad = ~np.isin(inh, (NEW, DROPPED, 0, 1, 2))
        if bad.any():
            raise ValueError(f"spatial_split: inherit code {int(inh[bad][0])} is not one of 0, 1, 2 (train, val, test), {DROPPED} (dropped) or {NEW} (new)")
        new = inh == NEW
        split[~new] = inh[~new]
        for s in range(len(SPLITS)):
            mine = np.flatnonzero(new & (split == s))
            others = ~new & (split >= 0) & (split != s)
            split[mine[windows_touch(gx[mine], gy[mine], gx[others], gy[others], k)]] = DROPPED
    # The buffer among new points: a later split gives way to an earlier one.
    for later in (1, 2):
        mine = np.flatnonzero(new & (split == later))
        earlier = new & (split >= 0) & (split < later)
        split[mine[windows_touch(gx[mine], gy[mine], gx[earlier], gy[earlier], k)]] = DROPPED
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


def build_patches(
    stacks: Sequence[TileStack],
    labels: LabelSet,
    *,
    bands: Sequence[str],
    index_names: Sequence[str],
    k: int,
    block: int,
    shares: Sequence[float],
    seed: int,
    inherit: Mapping[tuple[str, int, int], int] | None = None,
) -> PatchSet:
    """Samples for every labelled point of a region, with a spatial split.

    Args:
        inherit: a parent version's split code (0, 1, 2 or −1) of each point
            by (tile, row, col); those points keep it, points not in it are
            new (see :func:`spatial_split`). None = every point is new.

    The samples' ``weight`` is None (every sample weighs 1). A point whose
    pixel is invalid on every date is left out before the split, with a
    warning (see the module docstring).

    Raises:
        LabelError: no label falls on any tile, an onset year is outside
            the imagery's years, or no labelled pixel is ever seen clear.
    """
    pts = labels.points
    by_name = {s.name: s for s in stacks}
    dates = stacks[0].dates
    outcomes = Outcomes(check_years(dates))
    xs, vs, tiles, rows, cols, targets, gxs, gys, sources = [], [], [], [], [], [], [], [], []
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
        sources.append(grp["source"].to_numpy() if "source" in grp else np.full(len(grp), -1))
        try:
            targets.append(outcomes.encode(grp["label"].tolist(), grp["onset_year"].tolist()))
        except LabelError as exc:
            raise LabelError(f"{labels.path}: {exc}") from None
    if not xs:
        raise LabelError(f"{labels.path}: no labelled point falls on the region's tiles")
    x, valid, target = np.concatenate(xs), np.concatenate(vs), np.concatenate(targets)
    tile = np.concatenate(tiles)
    row = np.concatenate(rows).astype(np.int64)
    col = np.concatenate(cols).astype(np.int64)
    gx, gy = np.concatenate(gxs), np.concatenate(gys)
    # The centre pixel is the labelled one; a clear neighbour does not show it.
    seen = valid[:, :, k // 2, k // 2].any(axis=1)
    unseen = int((~seen).sum())
    if unseen:
        src = np.concatenate(sources)[~seen]
        unit = "line" if labels.path.suffix.lower() == ".csv" else "feature"
        first = ", ".join(str(int(v)) for v in np.sort(src)[:5]) + (", ..." if unseen > 5 else "")
        if seen.any():
            log.warning("%s: %d labelled point(s) dropped, their pixel is never seen clear on any date (%s %s); add clear imagery there or move the points", labels.path, unseen, unit, first)
        else:
            raise LabelError(f"{labels.path}: none of the {unseen} labelled points' pixels is seen clear on any date ({unit} {first}); check the imagery's mask and nodata settings")
        x, valid, target, tile, row, col, gx, gy = (a[seen] for a in (x, valid, target, tile, row, col, gx, gy))
    codes = None
    if inherit is not None:
        codes = np.array([inherit.get((str(t), int(r), int(c)), NEW) for t, r, c in zip(tile, row, col, strict=True)], dtype=np.int8)
    split = spatial_split(gx, gy, block=block, shares=shares, k=k, seed=seed, inherit=codes)
    return PatchSet(
        x=x,
        valid=valid,
        target=target,
        tile=tile,
        row=row,
        col=col,
        split=split,
        channels=channel_names(bands, index_names),
        dates=dates,
        outcomes=outcomes,
        sensors=tuple(stacks[0].date_sensors()),
        dropped_unseen=unseen,
    )
