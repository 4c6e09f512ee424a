"""What to label next: ``plantation suggest model=<run> region=<name> n=<count>``.

Points where a label teaches the model most, for interpreters to label and
add to the training labels:

1. **Candidates.** ``candidates`` pixels are drawn at random (seeded, without
   replacement) over the region's tiles, in proportion to their pixels
   (:func:`draw_candidates`). A pixel already labelled, or within
   ``label_distance_px`` (default ``min_distance_px``) of a labelled point
   (a label next to an existing one teaches little: its neighbourhood is
   nearly the same patch), is dropped,
   and so is one with fewer than ``min_clear`` clear dates (nodata in the
   map: too little evidence for any label to teach the model much).
2. **Score** (:func:`score_pixels`). Per pixel, the predictive entropy
   (nats) of the calibrated distribution over outcomes, and the epistemic
   term: the mutual information between the outcome and the ensemble member
   when the artefact has several members (each member calibrated like the
   map's probabilities), else the distilled network's estimate of it, else 0.
   score = entropy + ``epistemic_weight`` × epistemic. The two say different
   things: entropy is high where the pixel is ambiguous, whatever the
   reason (a mixed pixel stays ambiguous however many labels the model
   gets); the epistemic term is high where the members disagree, i.e. where
   the model has seen too few pixels like this one, which labels do fix.
   The entropy of the members' mean already holds the disagreement once
   (H = mean member entropy + mutual information); the weight adds it again,
   so that what the model has not seen outranks what is ambiguous in itself.
3. **Selection** (:func:`select`, pure, on arrays). Greedy and round-robin
   over groups, the map's predicted class and, for conversions, the onset
   year (:func:`group_names`): each round takes, in each group, the
   best-scoring candidate that lies at least ``min_distance_px`` from every
   point already chosen (and ``label_distance_px`` from every labelled
   point), so every class and year
   gets picks (rare years are not starved by common ones) and no picks
   cluster. Groups that run dry leave the rounds to the others; when fewer
   than ``n`` points fit, what fits is returned with the reason.
4. **Output.** ``suggestions.csv`` and ``suggestions.gpkg``: the blind sheet
   interpreters know from the validation sample
   (:data:`plantation.assessment.design.SHEET_COLUMNS`, blank reference
   columns, point ids ``S00001``...), in a random order so the ranking does
   not show, and nothing of the model's answer; ``suggestions.json`` keeps
   each point's score, entropy, epistemic term and predicted group, the
   settings, the model folder and digest and the labels' fingerprint.

Suggested points are chosen for what they teach, not drawn with known
inclusion probabilities: they are not a probability sample and can never
estimate accuracy or area. That is the validation sample's job
(``plantation sample``).
"""

from __future__ import annotations

import json
import os
from collections.abc import Hashable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import torch
from pyproj import Transformer
from scipy.spatial import cKDTree
from scipy.special import entr
from tqdm import tqdm

from plantation.assessment.design import REFERENCE_COLUMNS, write_samples
from plantation.errors import ConfigError, FileFormatError, InputNotFoundError, PlantationError
from plantation.imagery.config import RegionConfig
from plantation.imagery.region import Grid, TileStack, open_region
from plantation.mapping.folder import sha256_of
from plantation.model.artefact import Artefact, calibrated_mutual_information, load
from plantation.model.card import resolve_model
from plantation.model.inference import check_compatible, read_window
from plantation.model.network import split_epistemic
from plantation.model.outcomes import summarise
from plantation.model.patches import features
from plantation.reference.labels import LABEL_NAMES, read_labels

#: Kind of ``suggestions.json``.
FORMAT = "plantation-suggestions/1"
#: Stem of the sheet's files (``suggestions.csv``, ``suggestions.gpkg``) and of the bookkeeping (``suggestions.json``).
STEM = "suggestions"
#: How picks are spread: ``year`` (predicted class, and each onset year of a
#: predicted conversion, its own group), ``class`` (the four classes),
#: ``none`` (one group: by score and distance only).
SPREADS: tuple[str, ...] = ("year", "class", "none")
#: Distance (pixels) under which two points are the same pixel: kept apart even with min_distance_px 0.
SAME_PIXEL = 0.5
#: Said wherever suggested points are written or printed.
NOT_A_PROBABILITY_SAMPLE = (
    "Suggested points are chosen where a label teaches the model most, not drawn with known inclusion probabilities: "
    "they are not a probability sample and can never be used to estimate accuracy or area, nor replace the validation sample (`plantation sample`). "
    "Label them to train the model."
)


@dataclass
class SuggestConfig:
    """Schema of ``configs/suggest.yaml``."""

    region: RegionConfig = field(default_factory=RegionConfig)
    #: A training run folder (holding model/) or a model folder.
    model: str = "outputs/train/run"
    #: Labels file whose points are never suggested (None: the region's labels.path).
    labels: str | None = None
    #: Sheets (CSV with tile, row, col) of points also kept away from: a validation sample, earlier suggestions.
    avoid: list[str] = field(default_factory=list)
    out_dir: str = "outputs/suggest"
    n: int = 200
    candidates: int = 20000
    min_distance_px: float = 10.0
    #: Distance (pixels) kept from labelled points; None: min_distance_px.
    label_distance_px: float | None = None
    min_clear: int = 4
    #: One of :data:`SPREADS`.
    spread: str = "year"
    epistemic_weight: float = 1.0
    seed: int = 0
    #: Pixels per network pass.
    batch: int = 512
    progress: bool = True


def check_config(cfg: SuggestConfig) -> None:
    """Reject values no suggestion could use, naming the key."""
    if cfg.n < 1:
        raise ConfigError(f"n: {cfg.n!r} must be at least 1 (the number of points to suggest)")
    if not np.isfinite(cfg.min_distance_px) or cfg.min_distance_px < 0:
        raise ConfigError(f"min_distance_px: {cfg.min_distance_px!r} must be 0 or more pixels")
    if cfg.label_distance_px is not None and (not np.isfinite(cfg.label_distance_px) or cfg.label_distance_px < 0):
        raise ConfigError(f"label_distance_px: {cfg.label_distance_px!r} must be 0 or more pixels, or null (min_distance_px)")
    if cfg.candidates < cfg.n:
        raise ConfigError(f"candidates: {cfg.candidates!r} is fewer than n ({cfg.n}); score more pixels than you want points (10 x n or more leaves room to choose)")
    for key, val in (("min_clear", cfg.min_clear), ("batch", cfg.batch)):
        if val < 1:
            raise ConfigError(f"{key}: {val!r} must be at least 1")
    if not np.isfinite(cfg.epistemic_weight) or cfg.epistemic_weight < 0:
        raise ConfigError(f"epistemic_weight: {cfg.epistemic_weight!r} must be 0 or more (0: entropy alone)")
    if cfg.spread not in SPREADS:
        raise ConfigError(f"spread: {cfg.spread!r} is not one of {list(SPREADS)}")


# --- candidates ---------------------------------------------------------------------------------


def draw_candidates(grids: Mapping[str, Grid], n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``n`` distinct pixels drawn at random over the tiles, each pixel equally likely (so tiles in proportion to their pixels).

    Args:
        grids: tile name → grid, in the region's order.
        n: pixels wanted; all of them when the region has fewer.
        seed: the draw's seed (the same seed and grids give the same pixels).

    Returns:
        (tile names (object), rows (int64), cols (int64)), sorted by tile
        (region order), row, col.
    """
    names = list(grids)
    sizes = np.array([grids[t].height * grids[t].width for t in names], dtype=np.int64)
    total = int(sizes.sum())
    rng = np.random.default_rng(np.random.SeedSequence([seed, 31]))
    flat = np.sort(rng.choice(total, min(int(n), total), replace=False))
    starts = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    which = np.searchsorted(starts, flat, side="right") - 1
    local = flat - starts[which]
    widths = np.array([grids[t].width for t in names], dtype=np.int64)[which]
    tiles = np.array(names, dtype=object)[which]
    return tiles, (local // widths).astype(np.int64), (local % widths).astype(np.int64)


def pixel_size(grids: Mapping[str, Grid]) -> float:
    """The region's pixel size in CRS units (the first tile's; tiles share a CRS)."""
    return abs(next(iter(grids.values())).transform.a)


def centres(grids: Mapping[str, Grid], tiles: np.ndarray, rows: np.ndarray, cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pixel centres (x, y) in the map CRS, float64 (n,) each."""
    x = np.empty(len(tiles))
    y = np.empty(len(tiles))
    t_arr = np.asarray(tiles, dtype=object)
    for name in np.unique(t_arr.astype(str)):
        m = t_arr == name
        x[m], y[m] = grids[name].transform * (np.asarray(cols)[m] + 0.5, np.asarray(rows)[m] + 0.5)
    return x, y


def near_points(x: np.ndarray, y: np.ndarray, px: np.ndarray, py: np.ndarray, distance: float) -> np.ndarray:
    """bool (n,): which of (x, y) lie closer than ``distance`` to any of (px, py), or on the same pixel (closer than :data:`SAME_PIXEL`); units: pixels."""
    out = np.zeros(len(x), bool)
    if len(px) == 0 or len(x) == 0:
        return out
    reach = max(float(distance), SAME_PIXEL)
    d, _ = cKDTree(np.column_stack([px, py])).query(np.column_stack([x, y]), distance_upper_bound=reach)
    return d < reach


# --- scoring ------------------------------------------------------------------------------------


def predictive_entropy(probs: np.ndarray) -> np.ndarray:
    """Entropy (nats) of distributions over the last axis: −Σ p ln p, with 0 ln 0 = 0; float64 of the leading shape."""
    return entr(np.asarray(probs, dtype=np.float64)).sum(-1)


@dataclass
class PixelScores:
    """What the model says of candidate pixels; every array is (n,), in the order the pixels were given.

    Attributes:
        entropy: predictive entropy (nats) of the calibrated outcome
            distribution; NaN where the pixel was not scored (fewer than
            ``min_clear`` clear dates).
        epistemic: the epistemic term (nats; see :func:`score_pixels`), NaN where not scored.
        label: the map's class of the pixel (label code, 1 stable forest,
            2 conversion, 3 old plantation, 4 other; 0 where not scored), as
            :func:`plantation.model.outcomes.summarise` reads it: the most
            probable of the four classes, conversion summed over its years.
        year: the map's onset year (modal conversion year; 0 unless ``label`` is conversion).
        clear: clear dates at the pixel (its centre).
    """

    entropy: np.ndarray
    epistemic: np.ndarray
    label: np.ndarray
    year: np.ndarray
    clear: np.ndarray

    @property
    def scored(self) -> np.ndarray:
        """bool (n,): pixels the model scored (enough clear dates)."""
        return np.isfinite(self.entropy)

    def score(self, epistemic_weight: float) -> np.ndarray:
        """entropy + ``epistemic_weight`` × epistemic (nats); NaN where not scored."""
        return self.entropy + float(epistemic_weight) * self.epistemic


def _ensemble_outputs(art: Artefact, x: torch.Tensor, v: torch.Tensor) -> tuple[np.ndarray, np.ndarray]:
    """Calibrated probabilities (b, outcomes) and epistemic term (b,) of k × k patches."""
    with torch.inference_mode():
        z = torch.stack([m(x, v) for m in art.members])  # (members, b, outcomes)
        probs = art.calibrated_log_probs(z).exp().numpy()
        if len(art.members) > 1:
            epi = calibrated_mutual_information(z, art.card.calibration)
        elif art.distilled is not None:
            _, e = split_epistemic(art.distilled(x, v), art.distilled.n_outcomes)
            epi = np.zeros(len(probs)) if e is None else e.numpy()
        else:
            epi = np.zeros(len(probs))
    return probs, np.asarray(epi, dtype=np.float64)


def read_patches_by_block(stack: TileStack, rows: np.ndarray, cols: np.ndarray, k: int, block: int = 32) -> Iterator[tuple[np.ndarray, np.ndarray, np.ndarray]]:
    """k × k patches of scattered pixels of one tile, read block by block.

    The pixels are grouped in ``block`` × ``block`` cells of the tile; each
    cell's pixels come from one window read (their bounding box plus a halo
    of (k − 1) / 2, :func:`plantation.model.inference.read_window`, which
    goes straight to the files), rather than through the lazy arrays, where
    a few scattered pixels would read every chunk they touch whole. Patches
    equal :func:`plantation.model.patches.read_patches` (NaN and invalid
    outside the tile).

    Yields:
        (positions into ``rows``/``cols`` (int64 (m,)), float32 reflectance
        (m, time, band, k, k), bool validity (m, time, k, k)), one per cell
        holding pixels.
    """
    if k < 1 or k % 2 == 0:
        raise ConfigError(f"neighbourhood: {k!r} must be an odd number of pixels (1, 3, 5, ...)")
    rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
    cell = (rows // block) * (stack.grid.width // block + 1) + cols // block
    order = np.lexsort((cols, rows, cell))
    bounds = np.flatnonzero(np.diff(cell[order])) + 1
    off = np.arange(k)
    for pos in np.split(order, bounds) if len(order) else []:
        r, c = rows[pos], cols[pos]
        r0, c0 = int(r.min()), int(c.min())
        refl, valid = read_window(stack, r0, c0, int(r.max()) - r0 + 1, int(c.max()) - c0 + 1, k // 2)
        # In the window, pixel (r, c) sits at (r - r0 + halo, c - c0 + halo): its patch starts at (r - r0, c - c0).
        rr = (r - r0)[:, None, None] + off[None, :, None]
        cc = (c - c0)[:, None, None] + off[None, None, :]
        yield pos, np.moveaxis(refl[:, :, rr, cc], 2, 0), np.moveaxis(valid[:, rr, cc], 1, 0)


def score_pixels(
    art: Artefact,
    stacks: Mapping[str, TileStack] | Sequence[TileStack],
    tiles: np.ndarray,
    rows: np.ndarray,
    cols: np.ndarray,
    *,
    bands: Sequence[str] | None = None,
    indices: Sequence[str] | None = None,
    k: int | None = None,
    batch: int = 512,
    min_clear: int = 1,
    progress: bool = False,
) -> PixelScores:
    """Score pixels with an artefact: entropy, epistemic term, and the map's class and year.

    Each pixel is read as a k × k patch (:func:`read_patches_by_block`) and
    run through every member; the calibrated probabilities are those the map
    gives. The epistemic term is the members' mutual information (each
    member calibrated like the probabilities) when there are several, else
    the distilled network's estimate of it, else 0. No file is written;
    the network runs on ``batch`` pixels at a time (memory: about batch ×
    dates × channels × k² × 4 B, plus one read block of 32 × 32 pixels).

    Args:
        art: a loaded artefact (:func:`plantation.model.artefact.load`);
            the caller checks it fits the tiles (:func:`plantation.model.inference.check_compatible`).
        stacks: the region's tiles, by name or as a list.
        tiles, rows, cols: (n,) each pixel's tile name, row and column.
        bands, indices, k: band roles, indices and neighbourhood; None: the artefact's.
        batch: pixels per network pass.
        min_clear: pixels with fewer clear dates at the centre are not run
            (NaN entropy and epistemic, label 0).
        progress: a progress bar over the pixels.
    """
    by_name = dict(stacks) if isinstance(stacks, Mapping) else {s.name: s for s in stacks}
    bands = list(art.card.bands if bands is None else bands)
    indices = list(art.card.indices if indices is None else indices)
    k = int(art.members[0].neighbourhood if k is None else k)
    if batch < 1:
        raise ConfigError(f"batch: {batch!r} must be at least 1")
    tiles = np.asarray(tiles, dtype=object)
    rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
    n = len(tiles)
    unknown = sorted(set(tiles.astype(str).tolist()) - set(by_name))
    if unknown:
        raise PlantationError(f"tiles {unknown} are not among the region's tiles {sorted(by_name)}")
    entropy = np.full(n, np.nan)
    epistemic = np.full(n, np.nan)
    label = np.zeros(n, np.uint8)
    year = np.zeros(n, np.int16)
    clear = np.zeros(n, np.int32)
    bar = tqdm(total=n, unit="px", desc="scoring", disable=not progress, dynamic_ncols=True)
    pending: list[tuple[np.ndarray, np.ndarray, np.ndarray]] = []

    def flush() -> None:
        if not pending:
            return
        at = np.concatenate([p for p, _, _ in pending])
        x = torch.from_numpy(np.ascontiguousarray(features(np.concatenate([r for _, r, _ in pending]), bands, indices)))
        v = torch.from_numpy(np.ascontiguousarray(np.concatenate([m for _, _, m in pending])))
        pending.clear()
        for i in range(0, len(at), batch):
            sl = slice(i, i + batch)
            probs, epi = _ensemble_outputs(art, x[sl], v[sl])
            s = summarise(probs, art.card.years, cutoff_year=art.card.cutoff_year)
            entropy[at[sl]] = predictive_entropy(probs)
            epistemic[at[sl]] = epi
            label[at[sl]] = s.label
            year[at[sl]] = s.year

    waiting = 0
    for name in sorted(set(tiles.astype(str).tolist())):
        idx = np.flatnonzero(tiles == name)
        for pos, refl, valid in read_patches_by_block(by_name[name], rows[idx], cols[idx], k):
            at = idx[pos]
            clear[at] = valid[:, :, k // 2, k // 2].sum(1)
            ok = clear[at] >= min_clear
            bar.update(len(at))
            # Nodata pixels are never run: too little evidence to say anything.
            if ok.any():
                pending.append((at[ok], refl[ok], valid[ok]))
                waiting += int(ok.sum())
            if waiting >= batch:
                flush()
                waiting = 0
    flush()
    bar.close()
    return PixelScores(entropy=entropy, epistemic=epistemic, label=label, year=year, clear=clear)


def group_names(label: np.ndarray, year: np.ndarray, spread: str = "year") -> np.ndarray:
    """Each pixel's group for the round-robin (object (n,) of names).

    ``year``: ``stable_forest``, ``old_plantation``, ``other`` or
    ``conversion_<onset year>``; ``class``: the four class names;
    ``none``: ``all``. A pixel that was not scored (label 0) is ``no_data``.
    """
    if spread not in SPREADS:
        raise ConfigError(f"spread: {spread!r} is not one of {list(SPREADS)}")
    lab = np.asarray(label)
    names = np.array(["no_data", *LABEL_NAMES], dtype=object)[lab]
    if spread == "none":
        return np.where(lab == 0, "no_data", "all").astype(object)
    if spread == "year":
        conv = lab == LABEL_NAMES.index("conversion") + 1
        names = np.where(conv, np.char.add("conversion_", np.asarray(year).astype(str)), names).astype(object)
    return names


# --- selection ----------------------------------------------------------------------------------


@dataclass
class Selection:
    """The points :func:`select` placed.

    Attributes:
        chosen: int64 (picks,) indices into the candidates, in the order picked.
        asked: points asked for.
        reason: why fewer than ``asked`` were placed ("" when all were).
        picked: group → points picked, every group with a usable candidate.
        available: group → usable candidates (finite score, not near a labelled point).
        spacing: smallest distance (pixels) between two picks (inf for fewer than two).
        label_distance: smallest distance (pixels) from a pick to a labelled point (inf without labels).
    """

    chosen: np.ndarray
    asked: int
    reason: str
    picked: dict[str, int]
    available: dict[str, int]
    spacing: float
    label_distance: float


class _Spacing:
    """Chosen points in a grid of cells one reach wide: "is anything closer than reach?" looks at 3 × 3 cells only."""

    def __init__(self, reach: float) -> None:
        self.reach = reach
        self.cells: dict[tuple[int, int], list[tuple[float, float]]] = {}

    def _cell(self, x: float, y: float) -> tuple[int, int]:
        return int(np.floor(x / self.reach)), int(np.floor(y / self.reach))

    def free(self, x: float, y: float) -> bool:
        cx, cy = self._cell(x, y)
        r2 = self.reach * self.reach
        for dx in (-1, 0, 1):
            for dy in (-1, 0, 1):
                for px, py in self.cells.get((cx + dx, cy + dy), ()):
                    if (px - x) ** 2 + (py - y) ** 2 < r2:
                        return False
        return True

    def add(self, x: float, y: float) -> None:
        self.cells.setdefault(self._cell(x, y), []).append((x, y))


def select(
    scores: np.ndarray,
    x: np.ndarray,
    y: np.ndarray,
    groups: np.ndarray | Sequence[Hashable],
    n: int,
    min_distance: float,
    *,
    labelled_x: np.ndarray | None = None,
    labelled_y: np.ndarray | None = None,
    label_distance: float | None = None,
) -> Selection:
    """Greedy, round-robin choice of up to ``n`` well-spread, high-scoring candidates.

    Each round visits every group that still has a usable candidate and
    takes its best-scoring one that lies at least ``min_distance`` from every
    point chosen so far (groups in the order of those candidates' scores, so
    a last, partial round favours the most uncertain). Every group gets
    picks however low its scores, so rare predicted classes and years are not
    starved; a group that runs dry leaves the rounds to the others. Stops at
    ``n`` points or when nothing more fits.

    Candidates with a non-finite score (not scored: nodata) and those closer
    than ``label_distance`` to a labelled point are never chosen; neither is a
    second point on one pixel (closer than :data:`SAME_PIXEL`), even with
    ``min_distance`` 0. Ties go to the lower index. Cost: one sort, then
    O(1) per candidate examined (a grid of cells ``min_distance`` wide).

    Args:
        scores: (m,) higher = more worth labelling.
        x, y: (m,) region-wide pixel coordinates: map CRS coordinates divided
            by the pixel size (as :func:`plantation.model.patches.spatial_split`),
            so distances are in pixels across tile seams.
        groups: (m,) each candidate's group (e.g. :func:`group_names`).
        n: points wanted, at least 1.
        min_distance: pixels, at least 0; picks are at least this far apart.
        labelled_x, labelled_y: pixel coordinates of points already labelled.
        label_distance: pixels kept from them; None: ``min_distance``.

    Raises:
        ConfigError: ``n`` below 1, or ``min_distance`` or ``label_distance`` negative.
        ValueError: the arrays' lengths differ.
    """
    if n < 1:
        raise ConfigError(f"n: {n!r} must be at least 1")
    if not np.isfinite(min_distance) or min_distance < 0:
        raise ConfigError(f"min_distance_px: {min_distance!r} must be 0 or more pixels")
    away = float(min_distance if label_distance is None else label_distance)
    if not np.isfinite(away) or away < 0:
        raise ConfigError(f"label_distance_px: {label_distance!r} must be 0 or more pixels")
    s = np.asarray(scores, dtype=np.float64)
    xs, ys = np.asarray(x, dtype=np.float64), np.asarray(y, dtype=np.float64)
    g = np.asarray(groups, dtype=object) if not isinstance(groups, np.ndarray) else groups
    if not (len(s) == len(xs) == len(ys) == len(g)):
        raise ValueError(f"scores, x, y and groups must have one value per candidate; got lengths {len(s)}, {len(xs)}, {len(ys)}, {len(g)}")
    lx = np.zeros(0) if labelled_x is None else np.asarray(labelled_x, dtype=np.float64)
    ly = np.zeros(0) if labelled_y is None else np.asarray(labelled_y, dtype=np.float64)
    usable = np.isfinite(s) & ~near_points(xs, ys, lx, ly, away)
    names = np.array([str(v) for v in g], dtype=object) if len(g) else np.zeros(0, dtype=object)
    uniq, inv = np.unique(names[usable].astype(str), return_inverse=True) if usable.any() else (np.zeros(0, str), np.zeros(0, np.int64))
    cand = np.flatnonzero(usable)
    # Per group, its candidates best first (ties: lower index).
    order = [cand[inv == j][np.lexsort((cand[inv == j], -s[cand[inv == j]]))] for j in range(len(uniq))]
    ptr = [0] * len(uniq)
    spacing = _Spacing(max(float(min_distance), SAME_PIXEL))

    def head(j: int) -> int | None:
        """Group j's best candidate still free, skipping (for good: picks only grow) those too near a pick."""
        while ptr[j] < len(order[j]):
            i = int(order[j][ptr[j]])
            if spacing.free(xs[i], ys[i]):
                return i
            ptr[j] += 1
        return None

    chosen: list[int] = []
    active = list(range(len(uniq)))
    while len(chosen) < n and active:
        heads = [(j, h) for j in active if (h := head(j)) is not None]
        active = [j for j, _ in heads]
        for j, _ in sorted(heads, key=lambda jh: (-s[jh[1]], jh[0])):
            if len(chosen) >= n:
                break
            i = head(j)  # a pick earlier in this round may have blocked the head
            if i is None:
                continue
            chosen.append(i)
            spacing.add(xs[i], ys[i])
            ptr[j] += 1
    picks = np.asarray(chosen, dtype=np.int64)
    reason = ""
    if len(picks) < n:
        reason = (
            f"only {len(picks)} of {n} points fit at least {min_distance:g} px apart (and {away:g} px from the labelled points) "
            f"among {int(usable.sum())} usable candidates ({int((~np.isfinite(s)).sum())} not scored, {int((np.isfinite(s) & ~usable).sum())} too near a labelled point)"
        )
    return Selection(
        chosen=picks,
        asked=int(n),
        reason=reason,
        picked={str(u): int((names[picks] == u).sum()) for u in uniq},
        available={str(u): int((inv == j).sum()) for j, u in enumerate(uniq)},
        spacing=_nearest_pair(xs[picks], ys[picks]),
        label_distance=_nearest_to(xs[picks], ys[picks], lx, ly),
    )


def _nearest_pair(x: np.ndarray, y: np.ndarray) -> float:
    if len(x) < 2:
        return float("inf")
    d, _ = cKDTree(np.column_stack([x, y])).query(np.column_stack([x, y]), k=2)
    return float(d[:, 1].min())


def _nearest_to(x: np.ndarray, y: np.ndarray, px: np.ndarray, py: np.ndarray) -> float:
    if len(x) == 0 or len(px) == 0:
        return float("inf")
    d, _ = cKDTree(np.column_stack([px, py])).query(np.column_stack([x, y]))
    return float(d.min())


# --- the sheet and the bookkeeping --------------------------------------------------------------


def sheet(grids: Mapping[str, Grid], tiles: np.ndarray, rows: np.ndarray, cols: np.ndarray, seed: int) -> tuple[pd.DataFrame, np.ndarray]:
    """The interpreters' blind sheet of the given pixels, in a random (seeded) order.

    Returns:
        (the table: :data:`plantation.assessment.design.SHEET_COLUMNS`, point
        ids ``S00001``... in the shuffled order, pixel centres in the map CRS,
        lon/lat in EPSG:4326, each pixel's area in ha as the validation
        sample computes it, blank reference columns; the permutation: row i
        of the table is input pixel ``perm[i]``).
    """
    tiles = np.asarray(tiles, dtype=object)
    rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
    perm = np.random.default_rng(np.random.SeedSequence([seed, 47])).permutation(len(tiles))
    tiles, rows, cols = tiles[perm], rows[perm], cols[perm]
    x, y = centres(grids, tiles, rows, cols)
    lon, lat = np.empty(len(x)), np.empty(len(x))
    crs = np.empty(len(x), dtype=object)
    ha = np.empty(len(x))
    for name in np.unique(tiles.astype(str)):
        m = tiles == name
        grid = grids[name]
        crs[m] = grid.crs.to_string()
        t = Transformer.from_crs(grid.crs.to_string(), "EPSG:4326", always_xy=True)
        lon[m], lat[m] = t.transform(x[m], y[m])
        # As the validation sample's pixel_ha (design._row_ha): the pixel's area by row, geodesic for a geographic grid.
        ha[m] = grid.row_areas_m2()[rows[m]] / 1e4
    table = pd.DataFrame(
        {
            "point_id": [f"S{i + 1:05d}" for i in range(len(tiles))],
            "tile": tiles.astype(str),
            "row": rows,
            "col": cols,
            "x": x,
            "y": y,
            "crs": crs.astype(str),
            "lon": np.round(lon, 7),
            "lat": np.round(lat, 7),
            "pixel_ha": ha,
        }
    )
    for col in REFERENCE_COLUMNS:
        table[col] = ""
    return table, perm


def write_bookkeeping(doc: dict[str, Any], out_dir: Path) -> Path:
    """Write ``suggestions.json`` atomically, one line per point."""
    head = json.dumps({k: v for k, v in doc.items() if k != "points"}, indent=1)
    points = ",\n".join("  " + json.dumps(q) for q in doc.get("points", []))
    path = Path(out_dir) / f"{STEM}.json"
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text(head[:-2] + ',\n "points": [\n' + points + "\n ]\n}\n")
    os.replace(tmp, path)
    return path


def read_sheet_pixels(path: str | Path, grids: Mapping[str, Grid]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Tile, row and col of the points of a sheet (``samples.csv``, ``suggestions.csv``) on this region's tiles.

    Raises:
        InputNotFoundError: no such file.
        FileFormatError: not a sheet (no tile, row, col columns) or a point off the region's tiles.
    """
    p = Path(path)
    if not p.is_file():
        raise InputNotFoundError(f"{p.absolute()}: avoid: sheet not found (a samples.csv from `plantation sample` or a suggestions.csv)")
    try:
        t = pd.read_csv(p, dtype={"tile": str})
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise FileFormatError(f"{p}: avoid: cannot read as a CSV sheet ({str(exc).splitlines()[0]})") from None
    missing = [c for c in ("tile", "row", "col") if c not in t.columns]
    if missing:
        raise FileFormatError(f"{p}: avoid: no column(s) {missing}; give a sheet written by `plantation sample` or `plantation suggest`")
    rows, cols = pd.to_numeric(t["row"], errors="coerce").to_numpy(), pd.to_numeric(t["col"], errors="coerce").to_numpy()
    for i, (name, r, c) in enumerate(zip(t["tile"], rows, cols, strict=True)):
        g = grids.get(str(name))
        if g is None or not (np.isfinite(r) and np.isfinite(c) and 0 <= r < g.height and 0 <= c < g.width):
            where = f"tile {name!r}, row {t['row'].iloc[i]!r}, col {t['col'].iloc[i]!r}"
            raise FileFormatError(f"{p}: line {i + 2}: {where} is not a pixel of this region's tiles {sorted(grids)}; give a sheet of this region")
    return t["tile"].astype(str).to_numpy(dtype=object), rows.astype(np.int64), cols.astype(np.int64)


# --- the job ------------------------------------------------------------------------------------


@dataclass
class SuggestResult:
    """A run's account: candidates, what was dropped, picks per group, spacing, files."""

    asked: int
    drawn: int
    dropped_labelled: int
    dropped_nodata: int
    scored: int
    selection: Selection
    min_distance_px: float
    label_distance_px: float
    min_clear: int
    epistemic_weight: float
    #: Pixel size in metres (None: a geographic grid).
    pixel_m: float | None
    median_score_picked: float
    median_score_scored: float
    labels: str | None
    files: dict[str, Path]

    @property
    def picked(self) -> int:
        return len(self.selection.chosen)

    def lines(self) -> list[str]:
        sel = self.selection
        near = f"on or within {self.label_distance_px:g} px of a labelled or avoided point" + ("" if self.labels else "; no labels file")
        out = [
            f"candidates: {self.drawn:,} pixels drawn at random; {self.dropped_labelled:,} dropped as labelled ({near}), "
            f"{self.dropped_nodata:,} as nodata (fewer than {self.min_clear} clear dates); {self.scored:,} scored",
            f"score = entropy + {self.epistemic_weight:g} x epistemic (nats): median {self.median_score_picked:.3f} picked, {self.median_score_scored:.3f} over the scored candidates",
            f"picked {self.picked} of {self.asked}" + (f": {sel.reason}; raise candidates, or lower min_distance_px or label_distance_px" if sel.reason else ""),
        ]
        for g, k in sel.picked.items():
            out.append(f"  {g:<22}{k:>6} of {sel.available[g]:>7,} candidates")
        metres = f" ({sel.spacing * self.pixel_m:,.0f} m)" if self.pixel_m else ""
        spacing = "n/a (fewer than two picks)" if not np.isfinite(sel.spacing) else f"{sel.spacing:.1f} px{metres}"
        to_labels = "" if not np.isfinite(sel.label_distance) else f"; nearest labelled point {sel.label_distance:.1f} px"
        out.append(f"smallest distance between picks: {spacing} (asked at least {self.min_distance_px:g} px){to_labels}")
        for kind, path in self.files.items():
            out.append(f"{kind:<13}{path}")
        out.append(NOT_A_PROBABILITY_SAMPLE)
        return out


def _labelled_pixels(cfg: SuggestConfig, grids: Mapping[str, Grid], years: Sequence[int]) -> tuple[np.ndarray, np.ndarray, np.ndarray, str | None, str | None]:
    """Tile, row, col of every point to keep away from (labels, then the avoid sheets), the labels file and its fingerprint."""
    path = cfg.labels if cfg.labels is not None else cfg.region.labels.path
    tiles, rows, cols = [np.zeros(0, object)], [np.zeros(0, np.int64)], [np.zeros(0, np.int64)]
    fp = None
    if path:
        ls = read_labels(path, grids=dict(grids), years=years, csv_crs=cfg.region.labels.crs)
        tiles.append(ls.points["tile"].to_numpy(dtype=object))
        rows.append(ls.points["row"].to_numpy(dtype=np.int64))
        cols.append(ls.points["col"].to_numpy(dtype=np.int64))
        fp = ls.fingerprint
    for sheet_path in cfg.avoid:
        t, r, c = read_sheet_pixels(sheet_path, grids)
        tiles.append(t)
        rows.append(r)
        cols.append(c)
    return np.concatenate(tiles), np.concatenate(rows), np.concatenate(cols), (str(path) if path else None), fp


def run(cfg: SuggestConfig) -> SuggestResult:
    """Suggest ``n`` points to label next and write the sheet and its bookkeeping into ``out_dir``.

    Writes ``suggestions.csv`` and ``suggestions.gpkg`` (the blind sheet) and
    ``suggestions.json`` (each point's score, entropy, epistemic term and
    predicted group; settings; model and labels), each atomically.

    Raises:
        ConfigError: a value out of range (see :func:`check_config`).
        InputNotFoundError: no model at ``model``, or a labels file or sheet missing.
        RegionError: the model's dates, bands or scaling differ from the region's.
        LabelError: the labels file is malformed.
        PlantationError: no candidate could be placed.
    """
    check_config(cfg)
    model_dir = resolve_model(cfg.model)
    art = load(model_dir)
    stacks = open_region(cfg.region)
    for stack in stacks:
        check_compatible(art, stack, cfg.region.scaling)
    grids = {s.name: s.grid for s in stacks}
    res = pixel_size(grids)
    lt, lr, lc, labels_path, fingerprint = _labelled_pixels(cfg, grids, art.card.years)
    lx, ly = centres(grids, lt, lr, lc)
    lx, ly = lx / res, ly / res

    tiles, rows, cols = draw_candidates(grids, cfg.candidates, cfg.seed)
    cx, cy = centres(grids, tiles, rows, cols)
    gx, gy = cx / res, cy / res
    away = cfg.min_distance_px if cfg.label_distance_px is None else cfg.label_distance_px
    near = near_points(gx, gy, lx, ly, away)
    keep = np.flatnonzero(~near)
    ps = score_pixels(art, stacks, tiles[keep], rows[keep], cols[keep], batch=cfg.batch, min_clear=cfg.min_clear, progress=cfg.progress)
    score = ps.score(cfg.epistemic_weight)
    groups = group_names(ps.label, ps.year, cfg.spread)
    sel = select(score, gx[keep], gy[keep], groups, cfg.n, cfg.min_distance_px, labelled_x=lx, labelled_y=ly, label_distance=away)
    if len(sel.chosen) == 0:
        why = f"{int(near.sum()):,} labelled or near a label, {int((~ps.scored).sum()):,} with fewer than {cfg.min_clear} clear dates"
        raise PlantationError(f"region {cfg.region.name}: no point to suggest among {len(tiles):,} candidates ({why}); raise candidates, or lower min_distance_px, label_distance_px or min_clear")
    pick = keep[sel.chosen]
    table, perm = sheet(grids, tiles[pick], rows[pick], cols[pick], cfg.seed)
    out = Path(cfg.out_dir)
    csv, gpkg = write_samples(table, out, stem=STEM)
    at = sel.chosen[perm]  # the sheet's rows, as indices into the scored candidates
    rank = {int(i): r + 1 for r, i in enumerate(sel.chosen)}
    kt, kr, kc = tiles[keep], rows[keep], cols[keep]
    doc = {
        "kind": FORMAT,
        "region": cfg.region.name,
        "not_a_probability_sample": NOT_A_PROBABILITY_SAMPLE,
        "model_dir": str(model_dir),
        "model_sha256": sha256_of(model_dir / "model.json", model_dir / "model.safetensors"),
        "labels": labels_path,
        "labels_fingerprint": fingerprint,
        "avoid": list(cfg.avoid),
        "score": f"entropy + {cfg.epistemic_weight:g} x epistemic (nats)",
        "epistemic": "members' mutual information" if len(art.members) > 1 else ("distilled network's estimate" if art.distilled is not None else "none (one member)"),
        "settings": {
            "n": cfg.n,
            "candidates": cfg.candidates,
            "min_distance_px": cfg.min_distance_px,
            "label_distance_px": away,
            "min_clear": cfg.min_clear,
            "spread": cfg.spread,
            "epistemic_weight": cfg.epistemic_weight,
            "seed": cfg.seed,
        },
        "counts": {
            "drawn": len(tiles),
            "dropped_labelled": int(near.sum()),
            "dropped_nodata": int((~ps.scored).sum()),
            "scored": int(ps.scored.sum()),
            "picked": len(pick),
            "picked_by_group": sel.picked,
            "candidates_by_group": sel.available,
        },
        "reason": sel.reason,
        "spacing_px": sel.spacing if np.isfinite(sel.spacing) else None,
        "nearest_label_px": sel.label_distance if np.isfinite(sel.label_distance) else None,
        "sheet_sha256": sha256_of(csv),
        "points": [
            {
                "point_id": str(pid),
                "tile": str(kt[i]),
                "row": int(kr[i]),
                "col": int(kc[i]),
                "score": round(float(score[i]), 6),
                "entropy": round(float(ps.entropy[i]), 6),
                "epistemic": round(float(ps.epistemic[i]), 6),
                "group": str(groups[i]),
                "rank": rank[int(i)],
            }
            for pid, i in zip(table["point_id"], at, strict=True)
        ],
    }
    js = write_bookkeeping(doc, out)
    scored = score[np.isfinite(score)]
    return SuggestResult(
        asked=cfg.n,
        drawn=len(tiles),
        dropped_labelled=int(near.sum()),
        dropped_nodata=int((~ps.scored).sum()),
        scored=int(ps.scored.sum()),
        selection=sel,
        min_distance_px=cfg.min_distance_px,
        label_distance_px=away,
        min_clear=cfg.min_clear,
        epistemic_weight=cfg.epistemic_weight,
        pixel_m=res * stacks[0].grid.crs.linear_units_factor[1] if stacks[0].grid.crs.is_projected else None,
        median_score_picked=float(np.median(score[sel.chosen])),
        median_score_scored=float(np.median(scored)),
        labels=labels_path,
        files={"sheet": csv, "gpkg": gpkg, "bookkeeping": js},
    )
