"""Automatic ("surrogate") labels from a simple index-drop rule on the imagery.

A rule any pixel can be put through, for training on many cheap labels
weighted below the interpreters' few. It looks at each calendar year's
clear dates only (a date is clear where the validity mask says so and the
indices are finite) and at two indices (:mod:`plantation.imagery.indices`):
NDVI (Rouse et al. 1974) for green canopy and NBR (Key & Benson 2006), which
falls sharply when a canopy is cleared or burnt.

Per pixel and year: the median NDVI and NBR of the year's clear dates and
the year's lowest clear NBR; a year with fewer than
``min_dates_per_year`` clear dates is unobserved. Then:

1. fewer than ``min_clear_years`` observed years → abstain;
2. *start* = the mean of the yearly median NDVI (and NBR) of the first two
   observed years, *end* = the same over the last two observed years;
3. the *drop* of year y = median NBR of the clear dates of years y − 2 and
   y − 1, minus the lowest clear NBR of year y; the onset is the first year
   whose drop reaches ``drop_nbr`` (the year of the largest drop where none
   does). The first rather than the largest: a clearing is often burnt or
   tilled the next year, which deepens the drop a year late (on the demo
   region, onset within a year 99.4% against 99.1% for the largest);
4. forest at start (start NDVI ≥ ``forest_ndvi`` and start NBR ≥
   ``forest_nbr``):

   * a drop ≥ ``drop_nbr`` after the first two observed years, with two
     observed years after it whose NDVI is back at ``regrowth_ndvi`` →
     ``conversion`` in the drop's year (a tree crop grows back);
   * the same without the regrowth, ``regrowth_wait_years`` or more calendar
     years after the drop → ``other`` (cleared to pasture, crops or bare
     soil); sooner → abstain (a young plantation may not be green yet);
   * a large drop in the first two observed years → abstain (no forest
     baseline before it);
   * no large drop and NDVI still at ``forest_ndvi`` at the end →
     ``stable_forest``; otherwise abstain (a slow decline the rule does not
     name);

5. not forest at start: low vegetation at start and at end → ``other``,
   where low means NDVI below ``other_ndvi`` (sparse or no vegetation) or
   NBR below ``other_nbr`` (green but herbaceous: grass and crops have a
   brighter SWIR2, so a lower NBR, than tree canopy); otherwise abstain —
   a green, woody pixel that is not forest may be an old plantation, which
   this rule cannot tell (below).

What the rule cannot do, by construction:

* ``old_plantation`` is never given: a closed plantation has forest-like
  NDVI and NBR, so this rule cannot tell it from forest. An old plantation
  above the forest thresholds comes out ``stable_forest`` — the rule's main
  systematic error; one below them, abstain.
* Fire or logging followed by forest regrowth also drops and regrows:
  it comes out ``conversion``. A large dNBR alone does not say what followed
  (check_values.md: bare soil after clearing has low NBR too).
* Conversions in the first two years have no forest baseline and are not
  labelled; nor is a pixel cleared before the series and replanted.

Hence the labels are noisy by design: train on them with a noise-robust loss
and a few trusted labels to anchor them (:mod:`plantation.model.losses`).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
import xarray as xr

from plantation.errors import ConfigError, RegionError
from plantation.imagery import indices
from plantation.imagery.region import TileStack

#: Label of a pixel the rule will not name.
ABSTAIN = ""

#: Columns of :func:`draw_rule_labels`' table and their types.
_COLUMNS: dict[str, type] = {"tile": str, "row": np.int64, "col": np.int64, "x": np.float64, "y": np.float64, "label": str, "onset_year": np.int64}

#: Labels the rule can give (never ``old_plantation``, see the module docstring).
RULE_LABELS: tuple[str, ...] = ("stable_forest", "conversion", "other")


@dataclass(frozen=True)
class RuleThresholds:
    """The rule's named thresholds; indices are unitless, years are counts.

    Attributes:
        forest_ndvi: yearly median NDVI at or above which a pixel is closed
            canopy. 0.7: common practice for closed tropical canopy, a little
            below the ≥ 0.8 rule of thumb (check_values.md) to allow for
            residual haze in yearly medians.
        forest_nbr: yearly median NBR at or above which a pixel is closed
            canopy. 0.6: tuned on the demo region, where forest's first two
            years lie above 0.72 (2nd percentile) and grassland's below 0.56
            (98th); 0.4 let a tenth of the cropland pass as forest.
        drop_nbr: NBR drop (two-year baseline median − the year's minimum)
            that counts as a clearing. 0.3: Key & Benson (2006) dNBR classes,
            where 0.27 starts "moderate-low severity" (0.10 "low"); a drop
            above the moderate-low threshold is taken as a stand-replacing
            clearing rather than thinning, rounded up for noise. A dNBR on
            single minima is noisier than the paired scenes of the original.
        regrowth_ndvi: yearly median NDVI of the two last observed years at
            or above which a cleared pixel is vegetated again (a tree crop).
            0.6: tuned on the demo region; below forest_ndvi because young
            plantations reach forest NDVI only once their canopy closes
            (check_values.md, rules of thumb).
        other_ndvi: start and end yearly median NDVI below which a pixel that
            was never forest is "other" (grassland, cropland, bare). 0.5:
            common practice (bare soil ≤ 0.2, closed canopy ≥ 0.8; 0.5 is the
            usual sparse/dense vegetation split).
        other_nbr: start and end yearly median NBR below which a pixel that
            was never forest is "other" even when green. 0.5: tuned on the
            demo region (grassland and cropland median 0.35–0.4, old
            plantation above 0.6).
        min_clear_years: observed years needed to label at all. 5: the two
            baseline years, the drop year and two years after it, the fewest
            in which a conversion can be seen.
        min_dates_per_year: clear dates a year needs to count as observed.
            1 (the brief's minimum; a single-date minimum is what the drop
            reads).
        regrowth_wait_years: calendar years after a drop without regrowth
            before the pixel is called ``other`` rather than left unnamed.
            3: young oil palm closes its canopy a few years after planting
            (check_values.md, rules of thumb; from memory). On the demo
            region 2 turned 121 conversions into ``other``.
    """

    forest_ndvi: float = 0.7
    forest_nbr: float = 0.6
    drop_nbr: float = 0.3
    regrowth_ndvi: float = 0.6
    other_ndvi: float = 0.5
    other_nbr: float = 0.5
    min_clear_years: int = 5
    min_dates_per_year: int = 1
    regrowth_wait_years: int = 3

    def __post_init__(self) -> None:
        for key in ("forest_ndvi", "forest_nbr", "regrowth_ndvi", "other_ndvi", "other_nbr"):
            v = getattr(self, key)
            if not -1 <= v <= 1:
                raise ConfigError(f"rule.{key}: {v!r} must be an index level in [-1, 1]")
        if not 0 < self.drop_nbr <= 2:
            raise ConfigError(f"rule.drop_nbr: {self.drop_nbr!r} must be in (0, 2] (NBR runs from -1 to 1)")
        if self.min_clear_years < 5:
            # Fewer cannot hold the two baseline years, the drop year and two years after it.
            raise ConfigError(f"rule.min_clear_years: {self.min_clear_years!r} must be at least 5 (two baseline years, the drop year, two after it)")
        if self.min_dates_per_year < 1 or self.regrowth_wait_years < 1:
            raise ConfigError(f"rule.min_dates_per_year ({self.min_dates_per_year!r}) and rule.regrowth_wait_years ({self.regrowth_wait_years!r}) must be at least 1")


def _nan_median(a: np.ndarray) -> np.ndarray:
    """Median over the last axis ignoring NaN; NaN where all are NaN. Sort-based, no warnings."""
    s = np.sort(a, axis=-1)  # NaN sorts last
    n = np.sum(~np.isnan(a), axis=-1)
    lo = np.take_along_axis(s, np.maximum((n - 1) // 2, 0)[..., None], axis=-1)[..., 0]
    hi = np.take_along_axis(s, (n // 2)[..., None], axis=-1)[..., 0]
    return np.where(n > 0, (lo + hi) / 2, np.nan)


def _index(name: str, reflectance: np.ndarray, bands: Sequence[str]) -> np.ndarray:
    """Index ``name`` of (pixels, time, band) reflectance, clipped to [−1, 1] as the features are; NaN stays NaN."""
    roles = {b: reflectance[..., i] for i, b in enumerate(bands)}
    with np.errstate(invalid="ignore", divide="ignore"):
        v = np.asarray(indices.compute(name, roles), dtype=np.float32)
    return np.clip(v, -1.0, 1.0)


def _pair_mean(values: np.ndarray, first: np.ndarray, second: np.ndarray) -> np.ndarray:
    """Mean of ``values[p, first[p]]`` and ``values[p, second[p]]``, (pixels,)."""
    rows = np.arange(len(values))
    return (values[rows, first] + values[rows, second]) / 2


def rule_labels(
    reflectance: np.ndarray,
    valid: np.ndarray,
    bands: Sequence[str],
    date_years: np.ndarray,
    years: Sequence[int],
    thresholds: RuleThresholds | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Label each pixel by the index-drop rule (see the module docstring).

    Args:
        reflectance: float (pixels, time, band) surface reflectance, NaN
            where not clear.
        valid: bool (pixels, time), True where the date is clear.
        bands: band roles in the last axis' order; needs ``nir``, ``red``
            and ``swir2``.
        date_years: int (time,) calendar year of each date.
        years: the series' calendar years, ascending; dates in other years
            are ignored.
        thresholds: the rule's thresholds (default :class:`RuleThresholds`).

    Returns:
        (labels, onset): object (pixels,) of label names, :data:`ABSTAIN`
        (``""``) where the rule does not name one; int64 (pixels,) onset year
        for ``conversion``, 0 otherwise (as :class:`~plantation.reference.labels.LabelSet` has it).

    Raises:
        ConfigError: a band the indices need is missing.
        RegionError: the arrays' shapes disagree.
    """
    th = thresholds or RuleThresholds()
    refl = np.asarray(reflectance, dtype=np.float32)
    ok = np.asarray(valid, dtype=bool)
    dy = np.asarray(date_years, dtype=np.int64)
    yrs = np.asarray(years, dtype=np.int64)
    if refl.ndim != 3 or ok.shape != refl.shape[:2] or dy.shape != (refl.shape[1],) or refl.shape[2] != len(bands):
        raise RegionError(f"rule labels: reflectance {refl.shape}, valid {ok.shape}, date_years {dy.shape} and {len(bands)} bands disagree; expected (pixels, time, band), (pixels, time), (time,)")
    n_pix, n_years = refl.shape[0], len(yrs)
    if n_years < th.min_clear_years:
        return np.full(n_pix, ABSTAIN, dtype=object), np.zeros(n_pix, np.int64)
    ndvi = _index("NDVI", refl, bands)
    nbr = _index("NBR", refl, bands)
    clear = ok & np.isfinite(ndvi) & np.isfinite(nbr)
    ndvi = np.where(clear, ndvi, np.nan)
    nbr = np.where(clear, nbr, np.nan)

    # Yearly medians and minima over clear dates, (pixels, years); NaN where a year is unobserved.
    med_ndvi = np.full((n_pix, n_years), np.nan, np.float32)
    med_nbr = np.full((n_pix, n_years), np.nan, np.float32)
    min_nbr = np.full((n_pix, n_years), np.nan, np.float32)
    cols = [np.flatnonzero(dy == y) for y in yrs]
    observed = np.zeros((n_pix, n_years), bool)
    for j, c in enumerate(cols):
        observed[:, j] = clear[:, c].sum(1) >= th.min_dates_per_year
        nbr[:, c] = np.where(observed[:, j : j + 1], nbr[:, c], np.nan)  # an unobserved year's dates do not count
        ndvi[:, c] = np.where(observed[:, j : j + 1], ndvi[:, c], np.nan)
        if len(c):
            med_ndvi[:, j] = _nan_median(ndvi[:, c])
            med_nbr[:, j] = _nan_median(nbr[:, c])
            min_nbr[:, j] = np.fmin.reduce(nbr[:, c], axis=1)

    # The drop of each year: baseline (median NBR of the two years before) − the year's minimum.
    drop = np.full((n_pix, n_years), -np.inf, np.float32)
    for j in range(1, n_years):
        before = np.concatenate(cols[max(0, j - 2) : j])
        if before.size == 0:
            continue
        d = _nan_median(nbr[:, before]) - min_nbr[:, j]
        drop[:, j] = np.where(np.isfinite(d), d, -np.inf)
    big_any = drop >= th.drop_nbr
    big = big_any.any(1)
    onset_idx = np.where(big, np.argmax(big_any, axis=1), np.argmax(drop, axis=1))

    # Start and end: the first two and the last two observed years (index 0 where there are fewer; then not ``enough``).
    enough = observed.sum(1) >= th.min_clear_years
    cum = np.cumsum(observed, axis=1)
    first, second = np.argmax(cum >= 1, axis=1), np.argmax(cum >= 2, axis=1)
    rcum = np.cumsum(observed[:, ::-1], axis=1)
    last, before_last = n_years - 1 - np.argmax(rcum >= 1, axis=1), n_years - 1 - np.argmax(rcum >= 2, axis=1)
    start_ndvi = _pair_mean(med_ndvi, first, second)
    start_nbr = _pair_mean(med_nbr, first, second)
    end_ndvi = _pair_mean(med_ndvi, before_last, last)
    end_nbr = _pair_mean(med_nbr, before_last, last)

    forest = (start_ndvi >= th.forest_ndvi) & (start_nbr >= th.forest_nbr)
    after_baseline = onset_idx > second
    two_after = before_last > onset_idx  # both end years observed after the drop
    regrown = two_after & (end_ndvi >= th.regrowth_ndvi)
    waited = (n_years - 1 - onset_idx) >= th.regrowth_wait_years

    labels = np.full(n_pix, ABSTAIN, dtype=object)
    cleared = enough & forest & big & after_baseline
    labels[cleared & regrown] = "conversion"
    labels[cleared & ~regrown & waited] = "other"
    labels[enough & forest & ~big & (end_ndvi >= th.forest_ndvi)] = "stable_forest"
    low_start = (start_ndvi < th.other_ndvi) | (start_nbr < th.other_nbr)
    low_end = (end_ndvi < th.other_ndvi) | (end_nbr < th.other_nbr)
    labels[enough & ~forest & low_start & low_end] = "other"
    onset = np.where(labels == "conversion", yrs[onset_idx], 0).astype(np.int64)
    return labels, onset


def draw_rule_labels(
    stacks: Sequence[TileStack],
    bands: Sequence[str],
    *,
    n: int,
    seed: int,
    thresholds: RuleThresholds | None = None,
    exclude: set[tuple[str, int, int]] | None = None,
) -> pd.DataFrame:
    """Rule labels for up to ``n`` pixels drawn at random across the tiles.

    The draw is seeded; each tile gets a multinomial share of ``n`` in
    proportion to its area (pixel count × pixel area in CRS units; a share
    beyond a tile's pixels goes to the others), its pixels drawn without
    replacement, skipping ``exclude``. Only the drawn
    pixels are read (xarray vectorised indexing, as
    :func:`plantation.model.patches.read_patches` does). Abstentions are
    dropped, so fewer than ``n`` rows come back.

    Args:
        stacks: the region's tiles (they share CRS and dates).
        bands: band roles in the order the reflectance holds them.
        n: pixels to draw.
        seed: random seed of the draw.
        thresholds: the rule's thresholds (default :class:`RuleThresholds`).
        exclude: (tile, row, col) never to draw, e.g. the interpreters'
            labelled pixels.

    Returns:
        DataFrame with columns ``tile`` (str), ``row``, ``col`` (int64),
        ``x``, ``y`` (pixel centre in the imagery CRS, float64), ``label``
        (str), ``onset_year`` (int64, 0 unless ``conversion``); ordered by
        tile, row, col.

    Raises:
        ConfigError: ``n`` is negative or a needed band is missing.
    """
    if n < 0:
        raise ConfigError(f"rule labels: n {n!r} must be at least 0")
    th = thresholds or RuleThresholds()
    skip = exclude or set()
    rng = np.random.default_rng(seed)
    area = np.array([s.grid.height * s.grid.width * abs(s.grid.transform.a * s.grid.transform.e) for s in stacks], np.float64)
    banned = [np.array(sorted(r * s.grid.width + c for t, r, c in skip if t == s.name and 0 <= r < s.grid.height and 0 <= c < s.grid.width), np.int64) for s in stacks]
    room = np.array([s.grid.height * s.grid.width - len(b) for s, b in zip(stacks, banned, strict=True)], np.int64)
    share = np.zeros(len(stacks), np.int64)
    left = min(n, int(room.sum()))
    while left > 0:  # a tile drawn beyond its room passes the excess to the others, by area again
        open_ = share < room
        take = np.minimum(rng.multinomial(left, area * open_ / (area * open_).sum()), room - share)
        share += take
        left -= int(take.sum())
    parts = []
    for stack, k, ban in zip(stacks, share, banned, strict=True):
        h, w = stack.grid.height, stack.grid.width
        if k == 0:
            continue
        pick = rng.choice(h * w, size=min(h * w, int(k) + len(ban)), replace=False)
        pick = np.sort(pick[~np.isin(pick, ban)][:k])
        rows, cols = pick // w, pick % w
        ri, ci = xr.DataArray(rows, dims="point"), xr.DataArray(cols, dims="point")
        refl = stack.reflectance.isel(y=ri, x=ci).transpose("point", "time", "band").values.astype(np.float32)
        valid = stack.valid.isel(y=ri, x=ci).transpose("point", "time").values.astype(bool)
        refl[~valid] = np.nan
        date_years = stack.dates.astype("datetime64[Y]").astype(np.int64) + 1970
        labels, onset = rule_labels(refl, valid, bands, date_years, stack.years.tolist(), th)
        keep = labels != ABSTAIN
        t = stack.grid.transform
        parts.append(
            pd.DataFrame(
                {
                    "tile": stack.name,
                    "row": rows[keep].astype(np.int64),
                    "col": cols[keep].astype(np.int64),
                    "x": t.c + (cols[keep] + 0.5) * t.a + (rows[keep] + 0.5) * t.b,
                    "y": t.f + (cols[keep] + 0.5) * t.d + (rows[keep] + 0.5) * t.e,
                    "label": labels[keep].astype(str),
                    "onset_year": onset[keep],
                }
            )
        )
    if not parts:
        return pd.DataFrame({c: pd.Series(dtype=d) for c, d in _COLUMNS.items()})
    return pd.concat(parts, ignore_index=True).astype(_COLUMNS)
