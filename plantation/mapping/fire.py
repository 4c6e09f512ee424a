"""Fire in the clearing: whether each pixel mapped as converted was cleared with fire, and fire that escaped into the forest beside it.

Pure functions on arrays; the mapping pipeline (:mod:`plantation.mapping.tiles`)
feeds them a window's reflectance series and the window's mapped class and
onset year, then resolves escaped fire once per tile.

**Clearings.** For a pixel mapped as converted with onset year Y, the
clearing is the largest drop in NBR between two consecutive clear views
whose later view falls in [Y, Y + 2) (the first clear view after a clearing
late in a cloudy year comes the next year). The earlier view is the last
clear view before the clearing, the later one the first clear view after
it; their difference is the clearing's dNBR (Key & Benson 2006), kept as a
graded severity. A dNBR below ``min_dnbr`` (the published "unburned" class)
means the clearing was not seen: ``unknown``. Bare soil after mechanical
clearing drops NBR as much as char does, so the fire itself is read at the
first view after from BAI (Chuvieco et al. 2002), high on char and low on
bare soil, which is brighter in red and NIR, and from SWIR1 against the view
before: char darkens it, bare soil brightens it (the short-wave infrared
contrast MIRBI, Trigg & Flasse 2001, is built on). Thin haze left unflagged
over bare soil raises BAI but not SWIR1, so both must agree. MIRBI
(:func:`plantation.imagery.burn.mirbi`) rose almost as much on bare soil as on
char in the demo region's clearings (medians 1.67 and 1.50 at the first view
within 0.3 years), so it is not used.

* BAI ≥ ``min_bai`` and SWIR1(after) / SWIR1(before) < ``max_swir1_ratio_char``
  at the first view after: ``burnt``, however late the view (char seen is char);
* otherwise ``not burnt`` when SWIR1 brightened to at least
  ``min_swir1_ratio_bare`` times and the view came within ``max_gap_years``
  of the last view before (char fades within months under rain and weeds);
* otherwise ``unknown``: no clear view followed the clearing closely enough,
  or clearly enough, to say there was no fire.

**Escaped fire.** A pixel mapped as stable forest whose NBR dropped by at
least ``min_dnbr_escape`` between two consecutive clear views (canopy lost:
char itself rarely outlasts the cloudy months to the next clear view), in a
year within ``escape_year_slack`` of the onset of a clearing mapped as burnt
or unknown within ``escape_px`` pixels, is forest burnt by a fire that
escaped the clearing (and grew back: it is not mapped as converted). A
clearing mapped as cleared without fire lends no fire to its neighbours.
Its year is the year of the first clear view after the drop. Escaped fire
is resolved per tile: a clearing across a tile's edge does not reach into
the next tile.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import binary_dilation

from plantation.imagery.burn import bai
from plantation.imagery.indices import nbr

#: Codes of the map's ``fire`` band.
FIRE_CODES: dict[str, int] = {
    "none": 0,
    "converted_burnt": 1,
    "converted_not_burnt": 2,
    "converted_unknown": 3,
    "escaped_fire": 4,
}
#: The fire band's codes in words (band descriptions, catalogue, styles).
FIRE_MEANING = (
    "0 not converted and no escaped fire; 1 converted, cleared with fire; 2 converted, cleared without fire; "
    "3 converted, fire unknown (no clear view close enough after the clearing); 4 forest burnt by fire escaped from a clearing (not converted)"
)
#: Band roles the attribution reads.
FIRE_BANDS: tuple[str, ...] = ("red", "nir", "swir1", "swir2")


@dataclass
class FireRule:
    """Thresholds of the attribution (unitless indices; years).

    The defaults were set on the demo region (``toy_tiles/``) and are scored
    on a held-out simulated region by ``plantation benchmark-accuracy``.
    """

    #: Longest span (years) between the last clear view before a clearing and the first after it for "no fire" to be said.
    max_gap_years: float = 0.5
    #: dNBR below which a clearing was not seen (Key & Benson's "unburned" class ends at 0.1).
    min_dnbr: float = 0.1
    #: BAI at the first clear view after the clearing from which the ground may be charred.
    min_bai: float = 45.0
    #: SWIR1 at that view over SWIR1 at the view before, below which the ground may be charred.
    max_swir1_ratio_char: float = 1.1
    #: That ratio from which uncharred ground is bare soil (a clearing by machines, seen).
    min_swir1_ratio_bare: float = 1.4
    #: NBR drop between consecutive clear views of a forest pixel beside a clearing that counts as canopy lost to its fire.
    min_dnbr_escape: float = 0.25
    #: Distance (pixels, 8-connected steps) from a clearing mapped as burnt or unknown within which a fire counts as escaped from it.
    escape_px: int = 5
    #: Years a burnt forest pixel's fire may lie from the nearby clearing's onset year.
    escape_year_slack: int = 1


@dataclass
class FireWindow:
    """The attribution of one window: all (h, w)."""

    #: :data:`FIRE_CODES` (escaped fire is not resolved yet: see :func:`resolve_escaped`).
    code: np.ndarray
    #: Year of the fire: the onset year of a clearing mapped as burnt; 0 elsewhere.
    year: np.ndarray
    #: The clearing's dNBR (NaN where no clearing was seen, or the pixel is not mapped as converted).
    dnbr: np.ndarray
    #: Year of the largest canopy loss of a pixel mapped as stable forest (first clear view after it); 0: none.
    candidate_year: np.ndarray


def decimal_years(dates: np.ndarray | Sequence[np.datetime64]) -> np.ndarray:
    """Calendar year plus the fraction of it elapsed at noon of each date (``datetime64``), float64."""
    d = np.asarray(dates).astype("datetime64[D]")
    start = d.astype("datetime64[Y]")
    length = ((start + 1).astype("datetime64[D]") - start.astype("datetime64[D]")).astype(np.float64)
    return start.astype(np.int64) + 1970 + ((d - start.astype("datetime64[D]")).astype(np.float64) + 0.5) / length


def _previous_view(valid: np.ndarray) -> np.ndarray:
    """Index of the last clear date before each date, per pixel (−1: none): (time, ...) int."""
    n = valid.shape[0]
    idx = np.where(valid, np.arange(n).reshape((n,) + (1,) * (valid.ndim - 1)), -1)
    last = np.maximum.accumulate(idx, axis=0)
    return np.concatenate([np.full((1,) + valid.shape[1:], -1), last[:-1]], axis=0)


def attribute(
    reflectance: np.ndarray,
    valid: np.ndarray,
    date_years: Sequence[float] | np.ndarray,
    bands: Sequence[str],
    converted: np.ndarray,
    onset_year: np.ndarray,
    rule: FireRule | None = None,
    forest: np.ndarray | None = None,
) -> FireWindow:
    """Fire attribution of a window's pixels from their reflectance series.

    Args:
        reflectance: float32 (time, band, h, w) surface reflectance (0–1), NaN where invalid.
        valid: bool (time, h, w), clear views.
        date_years: (time,) decimal year of each date, ascending.
        bands: band roles of ``reflectance``'s band axis; needs :data:`FIRE_BANDS`.
        converted: bool (h, w), pixels mapped as converted.
        onset_year: (h, w) their mapped onset year.
        rule: thresholds (None: the defaults).
        forest: bool (h, w), pixels mapped as stable forest, where escaped fire is looked for (None: every pixel not converted).

    Returns:
        The window's :class:`FireWindow`; without the bands it needs, every
        converted pixel is ``converted_unknown`` and no fire is seen elsewhere.
    """
    rule = rule or FireRule()
    t = np.asarray(date_years, dtype=np.float64)
    valid = np.asarray(valid, dtype=bool)
    converted = np.asarray(converted, dtype=bool)
    _, h, w = valid.shape
    code = np.where(converted, FIRE_CODES["converted_unknown"], FIRE_CODES["none"]).astype(np.int16)
    year = np.zeros((h, w), np.int16)
    dn = np.full((h, w), np.nan, np.float32)
    cand = np.zeros((h, w), np.int16)
    if any(b not in bands for b in FIRE_BANDS) or valid.shape[0] < 2:
        return FireWindow(code, year, dn, cand)
    r = np.asarray(reflectance, dtype=np.float32)
    red, nir, swir1, swir2 = (r[:, list(bands).index(b)] for b in FIRE_BANDS)
    prev = _previous_view(valid)
    has_prev = valid & (prev >= 0)
    pc = np.clip(prev, 0, None)
    with np.errstate(invalid="ignore", divide="ignore"):
        n = np.where(valid, nbr(nir, swir2), np.nan).astype(np.float32)
        b = np.where(valid, bai(red, nir), np.nan).astype(np.float32)
        s1 = np.where(valid, swir1, np.nan)
        ratio = s1 / np.take_along_axis(s1, pc, axis=0)
        char = (b >= rule.min_bai) & (ratio < rule.max_swir1_ratio_char)
        bare = ~char & (ratio >= rule.min_swir1_ratio_bare)
    drop = np.where(has_prev, np.take_along_axis(n, pc, axis=0) - n, np.nan)
    gap = t[:, None, None] - t[pc]
    drop = np.where(np.isfinite(drop), drop, -np.inf)

    # Clearings: the largest drop whose later view lies in [onset, onset + 2).
    ty = t[:, None, None]
    y0 = np.asarray(onset_year, dtype=np.float64)[None]
    inside = (ty >= y0) & (ty < y0 + 2) & converted[None]
    d_c = np.where(inside, drop, -np.inf)
    best = d_c.argmax(axis=0)[None]
    d_best = np.take_along_axis(d_c, best, axis=0)[0]
    seen = converted & (d_best >= rule.min_dnbr)
    gap_best = np.take_along_axis(gap, best, axis=0)[0]
    burnt = seen & np.take_along_axis(char, best, axis=0)[0]
    not_burnt = seen & np.take_along_axis(bare, best, axis=0)[0] & (gap_best <= rule.max_gap_years)
    code[burnt] = FIRE_CODES["converted_burnt"]
    code[not_burnt] = FIRE_CODES["converted_not_burnt"]
    year[burnt] = np.asarray(onset_year)[burnt]
    dn[seen] = d_best[seen]

    # Canopy lost in forest: the largest drop anywhere in the series.
    where = ~converted if forest is None else np.asarray(forest, dtype=bool) & ~converted
    d_f = np.where(where[None], drop, -np.inf)
    best = d_f.argmax(axis=0)[None]
    d_best = np.take_along_axis(d_f, best, axis=0)[0]
    fire = where & (d_best >= rule.min_dnbr_escape)
    cand[fire] = np.floor(t[best[0]][fire]).astype(np.int16)
    return FireWindow(code, year, dn, cand)


def resolve_escaped(code: np.ndarray, year: np.ndarray, candidate_year: np.ndarray, onset_year: np.ndarray, rule: FireRule | None = None) -> tuple[np.ndarray, np.ndarray]:
    """A tile's fire and fire-year bands with escaped fire marked: canopy lost beside a clearing mapped as burnt or unknown, in its season.

    Args:
        code, year: the tile's fire codes and fire years (:class:`FireWindow` of every window).
        candidate_year: (h, w) the year of a forest pixel's canopy loss (0: none), :attr:`FireWindow.candidate_year`.
        onset_year: (h, w) the mapped onset year (of the clearings).

    Returns:
        (code, year) copies with :data:`FIRE_CODES` ``escaped_fire`` and its year set.
    """
    rule = rule or FireRule()
    code, year = code.copy(), year.copy()
    cand = np.asarray(candidate_year)
    eligible = (code == FIRE_CODES["none"]) & (cand > 0)
    burnt = np.isin(code, (FIRE_CODES["converted_burnt"], FIRE_CODES["converted_unknown"]))
    if not eligible.any() or not burnt.any():
        return code, year
    reach = np.ones((3, 3), bool)
    escaped = np.zeros(code.shape, bool)
    onset = np.asarray(onset_year)
    for y in np.unique(onset[burnt]).tolist():
        near = binary_dilation(burnt & (onset == y), structure=reach, iterations=max(rule.escape_px, 1))
        escaped |= eligible & near & (np.abs(cand.astype(np.int64) - y) <= rule.escape_year_slack)
    code[escaped] = FIRE_CODES["escaped_fire"]
    year[escaped] = cand[escaped]
    return code, year
