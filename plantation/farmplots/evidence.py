"""A page of evidence per farm plot that needs a look: what the map says, and what the region's own imagery shows.

For each plot the plot check flags (verdicts in :attr:`EvidenceConfig.verdicts`,
by default ``strong_evidence`` and ``review``) and each plot asked for by id,
:func:`write_pages` draws one PNG, ``<out_dir>/evidence/<file>.png``:

* the plot's outline over the map's onset-year layer (a window around the
  plot, colours of :func:`plantation.mapping.styles.year_colours`, split at the
  cutoff);
* chips of the plot from the region's imagery, true colour (red, green, blue)
  and false colour (SWIR1, NIR, red as red, green, blue: vegetation green,
  bare soil and cleared land magenta to brown), on the dates that matter: the
  last clear view before the mapped onset year and the first clear views
  from the onset year on. A plot with no conversion mapped under it gets the
  views around the cutoff instead;
* the plot's median NDVI and NBR (:mod:`plantation.imagery.indices`, per
  pixel, then the median over the plot's clear pixels) on every clear date,
  with the mapped onset year and its interval shaded, the cutoff drawn and
  the chips' dates marked;
* the numbers of the plot check in words: expected area after the cutoff and
  its range, the probability of conversion after the cutoff, the verdict and
  the rules that decided it.

Definitions:

* The plot's pixels are those whose centre lies inside the polygon (every
  pixel it touches, for a polygon smaller than a pixel), in the map tile that
  holds the plot's representative point (:func:`shapely.point_on_surface`).
  A plot straddling tiles is drawn from that tile alone: the chips stop at
  its edge.
* A date is a *clear view* of the plot when at least
  :attr:`EvidenceConfig.min_clear_share` of the plot's pixels are valid on it
  (no cloud, shadow or fill by the region's mask), so the median over the
  plot is a median of what the ground looked like.
* The plot's onset year is the onset year of most of its pixels mapped as
  converted; its interval is the median, over those pixels, of the map's
  onset interval bounds (the map's credible interval at its
  ``interval_level``, 80% by default).
* Chips use a fixed linear stretch (:data:`TRUE_COLOUR`, :data:`FALSE_COLOUR`),
  the same on every page and every date, so chips compare across dates and
  plots: reflectance 0–0.15 for the visible bands (closed forest sits near
  0.02–0.05 in red, bare soil above 0.15 and saturates to white), 0–0.5 for
  NIR and 0–0.4 for SWIR1 (forest canopies reach about 0.3 in NIR; soil and
  dry residue are bright in SWIR1). Pixels that are not valid on the date are
  drawn in :data:`MASKED_RGB` grey.

Only a window around each plot is read (:meth:`plantation.imagery.region.TileStack.read`:
windowed reads straight from the files), so memory does not grow with the
region or the number of plots; pages are drawn by ``workers`` processes when
there are many. Each PNG is written under a temporary name and renamed, and
the folder is swapped in whole once every page is written, with
``evidence.json`` (:func:`read_evidence`, this module is its one reader and
writer) listing the pages, their dates, and a summary of the imagery (dates,
sensors, clear-view shares from the survey).
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import re
import shutil
import textwrap
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import rasterio.features
import rasterio.windows
import shapely
from pyproj import CRS, Transformer

from plantation.errors import ConfigError, FileFormatError, RegionError
from plantation.imagery.config import RegionConfig
from plantation.imagery.indices import nbr, ndvi
from plantation.imagery.region import open_tile
from plantation.mapping.folder import BAND, NODATA, file_digest
from plantation.mapping.styles import year_colours
from plantation.records import check_shapes, load_object, locate
from plantation.reference.labels import LABEL_CODES

KIND = "plantation-evidence/1"
#: The folder of the pages, inside the plot check's ``out_dir``.
FOLDER = "evidence"
#: The pages' record, inside :data:`FOLDER`.
EVIDENCE_JSON = "evidence.json"
#: Chip composites: (display channel's band role, reflectance shown black, reflectance shown full) for red, green, blue.
TRUE_COLOUR: tuple[tuple[str, float, float], ...] = (("red", 0.0, 0.15), ("green", 0.0, 0.15), ("blue", 0.0, 0.15))
FALSE_COLOUR: tuple[tuple[str, float, float], ...] = (("swir1", 0.0, 0.40), ("nir", 0.0, 0.50), ("red", 0.0, 0.15))
#: Colour of a chip pixel with no valid observation on the date.
MASKED_RGB = (0.55, 0.55, 0.55)
#: Colour of the plot's outline on the chips and the map window.
OUTLINE = "#00e5ff"
_SAFE = re.compile(r"[^A-Za-z0-9._-]+")
_CONVERSION = LABEL_CODES["conversion"]
#: The plot check's verdicts (:data:`plantation.farmplots.cutoff.VERDICTS`, which imports this module).
VERDICT_NAMES: tuple[str, ...] = ("low_evidence", "review", "strong_evidence")


@dataclass
class EvidenceConfig:
    """Schema of the ``evidence:`` keys of ``configs/farmplots.yaml``."""

    #: Off unless asked for: the pages need the region's imagery (``configs/farmplots.yaml`` turns them on for the command).
    enabled: bool = False
    #: Verdicts that get a page.
    verdicts: list[str] = field(default_factory=lambda: ["strong_evidence", "review"])
    #: Plot ids that get a page whatever their verdict.
    plots: list[str] = field(default_factory=list)
    #: Clear views shown from the onset year on (one more is shown before it).
    views_after: int = 3
    #: A date is a clear view of the plot when at least this share of its pixels are valid.
    min_clear_share: float = 0.5
    #: Pixels of context around the plot on every side (at least; the window is at least ``min_window`` wide).
    margin: int = 6
    #: Smallest window side in pixels.
    min_window: int = 24
    #: The survey's record, for the clear-view shares of the imagery section; missing: dates and sensors only.
    survey: str | None = "outputs/survey/survey.json"
    #: Processes drawing pages (used from 40 pages on; 1: draw in this process).
    workers: int = 2


def check_evidence_config(cfg: EvidenceConfig) -> None:
    """Reject values no page could use, naming the key."""
    bad = [v for v in cfg.verdicts if v not in VERDICT_NAMES]
    if bad:
        raise ConfigError(f"evidence.verdicts: {bad!r} are not verdicts; use some of {list(VERDICT_NAMES)}")
    if cfg.views_after < 1:
        raise ConfigError(f"evidence.views_after: {cfg.views_after!r} must be 1 or more")
    if not 0 < cfg.min_clear_share <= 1:
        raise ConfigError(f"evidence.min_clear_share: {cfg.min_clear_share!r} must be in (0, 1]")
    if cfg.margin < 0 or cfg.min_window < 1:
        raise ConfigError(f"evidence.margin / evidence.min_window: {cfg.margin!r} / {cfg.min_window!r} must be ≥ 0 / ≥ 1")
    if cfg.workers < 1:
        raise ConfigError(f"evidence.workers: {cfg.workers!r} must be 1 or more")


# --------------------------------------------------------------------------- what a page shows


@dataclass
class PlotEvidence:
    """Everything a page shows of one plot, computed from the map and the imagery (arrays on the window around the plot).

    Attributes:
        tile: the map (and imagery) tile it was read from.
        window: (row, col, height, width) in the tile's pixels.
        transform: the window's affine transform.
        inside: bool (h, w): the plot's pixels.
        outline: the plot's rings in window pixel coordinates (x = column, y = row), for drawing.
        onset_map: onset year (h, w), 0 where the map has no conversion; -1 where no data.
        dates: every acquisition date, ``datetime64[D]``.
        clear_share: (dates,) share of the plot's pixels valid on each date.
        clear: (dates,) bool, clear views of the plot.
        ndvi, nbr: (dates,) the plot's median index over its valid pixels; NaN on dates that are not clear views.
        onset_year, onset_lo, onset_hi: the plot's mapped onset year and interval (None: no conversion mapped under it).
        converted_share: share of the plot's mapped pixels mapped as converted.
        before, after: indices into ``dates`` of the chips: the last clear view before the boundary (None: none), the first clear views from it on.
        boundary: the first day "after": 1 January of the onset year, or the day after the cutoff without an onset.
        true_colour, false_colour: (chips, h, w, 3) float RGB in 0–1, chips in order ``[before] + after``.
        p_max: the highest probability of conversion after the cutoff among the plot's pixels.
    """

    tile: str
    window: tuple[int, int, int, int]
    transform: Any
    inside: np.ndarray
    outline: list[np.ndarray]
    onset_map: np.ndarray
    dates: np.ndarray
    clear_share: np.ndarray
    clear: np.ndarray
    ndvi: np.ndarray
    nbr: np.ndarray
    onset_year: int | None
    onset_lo: int | None
    onset_hi: int | None
    converted_share: float
    before: int | None
    after: list[int]
    boundary: date
    true_colour: np.ndarray
    false_colour: np.ndarray
    p_max: float | None

    @property
    def chip_dates(self) -> list[int]:
        """Indices into ``dates`` of the chips, in drawing order."""
        return ([self.before] if self.before is not None else []) + list(self.after)


def stretch(refl: np.ndarray, bands: Sequence[str], composite: Sequence[tuple[str, float, float]]) -> np.ndarray:
    """RGB in 0–1, (h, w, 3), from reflectance (band, h, w) with a fixed linear stretch per channel; NaN anywhere → :data:`MASKED_RGB`.

    Raises:
        ConfigError: a band role the composite needs is not in ``bands``.
    """
    missing = [role for role, _, _ in composite if role not in bands]
    if missing:
        raise ConfigError(f"region.bands: {list(bands)} lack {missing}, which the evidence chips need")
    chans = []
    for role, lo, hi in composite:
        chans.append(np.clip((refl[list(bands).index(role)] - lo) / (hi - lo), 0.0, 1.0))
    rgb = np.stack(chans, axis=-1).astype(np.float32)
    bad = np.isnan(rgb).any(-1)
    rgb[bad] = MASKED_RGB
    return rgb


def choose_dates(dates: np.ndarray, clear: np.ndarray, boundary: date, n_after: int) -> tuple[int | None, list[int]]:
    """The chips' dates: the last clear view before ``boundary`` and the first ``n_after`` clear views on or after it (indices into ``dates``)."""
    b = np.datetime64(boundary, "D")
    idx = np.flatnonzero(clear)
    before = idx[dates[idx] < b]
    after = idx[dates[idx] >= b]
    return (int(before[-1]) if before.size else None), [int(i) for i in after[:n_after]]


def _window(bounds_px: tuple[float, float, float, float], grid_hw: tuple[int, int], margin: int, min_side: int) -> tuple[int, int, int, int]:
    """(row, col, height, width): the plot's pixel bounds (c0, r0, c1, r1) grown by ``margin``, at least ``min_side`` a side, clipped to the tile."""
    c0, r0, c1, r1 = bounds_px
    h_tile, w_tile = grid_hw

    def span(a: float, b: float, size: int) -> tuple[int, int]:
        lo, hi = int(np.floor(a)) - margin, int(np.ceil(b)) + margin
        if hi - lo < min_side:
            grow = min_side - (hi - lo)
            lo -= grow // 2
            hi += grow - grow // 2
        lo, hi = max(lo, 0), min(hi, size)
        return lo, max(hi, lo + 1)

    r_lo, r_hi = span(r0, r1, h_tile)
    c_lo, c_hi = span(c0, c1, w_tile)
    return r_lo, c_lo, r_hi - r_lo, c_hi - c_lo


def _rings(geom: Any) -> list[np.ndarray]:
    out = []
    for poly in getattr(geom, "geoms", [geom]):
        out.append(np.asarray(poly.exterior.coords))
        out.extend(np.asarray(r.coords) for r in poly.interiors)
    return out


def gather(geom: Any, map_path: Path, stack: Any, bands: Sequence[str], cutoff_date: date, cfg: EvidenceConfig, *, scale: float = 1e-4, offset: float = 0.0) -> PlotEvidence:
    """A plot's evidence from the map tile at ``map_path`` and the imagery tile ``stack`` (a :class:`~plantation.imagery.region.TileStack` on the same grid).

    Args:
        geom: the plot, a (Multi)Polygon in the tile's CRS.
        bands: the region's band roles, in stored order.
        cutoff_date: conversions after this day count as after the cutoff.
        scale, offset: of the map's p_after_cutoff band.
    """
    g = stack.grid
    inv = ~g.transform
    minx, miny, maxx, maxy = geom.bounds
    (ca, ra), (cb, rb) = inv * (minx, maxy), inv * (maxx, miny)
    row, col, h, w = _window((min(ca, cb), min(ra, rb), max(ca, cb), max(ra, rb)), (g.height, g.width), cfg.margin, cfg.min_window)
    win = rasterio.windows.Window(col, row, w, h)
    wt = rasterio.windows.transform(win, g.transform)
    inside = rasterio.features.geometry_mask([geom], out_shape=(h, w), transform=wt, invert=True, all_touched=False)
    if not inside.any():
        inside = rasterio.features.geometry_mask([geom], out_shape=(h, w), transform=wt, invert=True, all_touched=True)
    with rasterio.open(map_path) as src:
        # A boundless read builds a VRT each time; the window lies inside the tile unless the map's grid is not the imagery's.
        inside_map = row >= 0 and col >= 0 and row + h <= src.height and col + w <= src.width
        m = src.read([BAND["class"], BAND["onset_year"], BAND["onset_lo"], BAND["onset_hi"], BAND["p_after_cutoff"]], window=win, boundless=not inside_map, fill_value=NODATA)
    cls, onset, lo, hi, p_raw = m
    data = cls != NODATA
    conv = data & (cls == _CONVERSION) & (onset > 0)
    onset_map = np.where(~data, -1, np.where(conv, onset, 0)).astype(np.int32)
    pin = inside & data
    p_max = float((p_raw[pin].astype(np.float64) * scale + offset).max()) if pin.any() else None
    cin = inside & conv
    onset_year = onset_lo = onset_hi = None
    if cin.any():
        years, counts = np.unique(onset[cin], return_counts=True)
        onset_year = int(years[np.argmax(counts)])  # the most pixels; ties go to the earlier year
        pick = cin & (onset == onset_year)
        onset_lo = int(np.round(np.median(lo[pick])))
        onset_hi = int(np.round(np.median(hi[pick])))
    converted_share = float(cin.sum() / pin.sum()) if pin.any() else 0.0

    refl, valid = stack.read(row, col, h, w)  # (t, b, h, w), (t, h, w)
    dates = np.asarray(stack.dates, dtype="datetime64[D]")
    n_in = int(inside.sum())
    share = valid[:, inside].sum(axis=1) / max(n_in, 1)
    clear = share >= cfg.min_clear_share
    bl = list(bands)
    nir, red, swir2 = refl[:, bl.index("nir")], refl[:, bl.index("red")], refl[:, bl.index("swir2")]
    with np.errstate(invalid="ignore", divide="ignore"):
        nd = ndvi(nir, red)[:, inside]
        nb = nbr(nir, swir2)[:, inside]
    ndvi_med = np.full(len(dates), np.nan)
    nbr_med = np.full(len(dates), np.nan)
    for t in np.flatnonzero(clear):
        ok = valid[t][inside]
        ndvi_med[t] = float(np.nanmedian(nd[t][ok]))
        nbr_med[t] = float(np.nanmedian(nb[t][ok]))
    if onset_year is not None:
        boundary = date(onset_year, 1, 1)
    else:
        boundary = date.fromordinal(cutoff_date.toordinal() + 1)
    before, after = choose_dates(dates, clear, boundary, cfg.views_after)
    picks = ([before] if before is not None else []) + after
    tc = np.stack([stretch(refl[t], bl, TRUE_COLOUR) for t in picks]) if picks else np.zeros((0, h, w, 3), np.float32)
    fc = np.stack([stretch(refl[t], bl, FALSE_COLOUR) for t in picks]) if picks else np.zeros((0, h, w, 3), np.float32)
    outline = [np.column_stack(inv_ring(r, wt)) for r in _rings(geom)]
    return PlotEvidence(
        tile=stack.name,
        window=(row, col, h, w),
        transform=wt,
        inside=inside,
        outline=outline,
        onset_map=onset_map,
        dates=dates,
        clear_share=share,
        clear=clear,
        ndvi=ndvi_med,
        nbr=nbr_med,
        onset_year=onset_year,
        onset_lo=onset_lo,
        onset_hi=onset_hi,
        converted_share=converted_share,
        before=before,
        after=after,
        boundary=boundary,
        true_colour=tc,
        false_colour=fc,
        p_max=p_max,
    )


def inv_ring(ring: np.ndarray, transform: Any) -> tuple[np.ndarray, np.ndarray]:
    """A ring's CRS coordinates as window pixel coordinates (column, row; pixel edges at integers)."""
    inv = ~transform
    cols, rows = inv * (ring[:, 0], ring[:, 1])
    return np.asarray(cols), np.asarray(rows)


# --------------------------------------------------------------------------- drawing


def _day(d: np.datetime64) -> str:
    return str(np.datetime64(d, "D"))


def _words(verdict: str | None) -> str:
    return {"strong_evidence": "strong evidence", "review": "review", "low_evidence": "low evidence"}.get(verdict or "", str(verdict or "no verdict"))


def page_text(ev: PlotEvidence, row: dict[str, Any], cutoff_date: date, plot_level: float, map_level: float | None) -> list[str]:
    """The page's lines of text: the map's numbers for the plot and the verdict's reasons, in words."""
    after = f"after {cutoff_date.isoformat()}"
    lines = [f"Verdict: {_words(row.get('verdict'))}."]
    if ev.onset_year is not None:
        lvl = f"{map_level:.0%} credible interval" if map_level else "credible interval"
        lines.append(f"Mapped onset year: {ev.onset_year} ({lvl} of the year: {ev.onset_lo}–{ev.onset_hi}); {ev.converted_share:.0%} of the plot's mapped pixels are mapped as converted.")
    else:
        lines.append("No pixel of the plot is mapped as converted: the chips show the views around the cutoff.")
    e, lo, hi, mapped = row.get("expected_after_ha"), row.get("after_lo_ha"), row.get("after_hi_ha"), row.get("mapped_ha")
    if isinstance(e, int | float):
        lines.append(
            f"Expected area converted {after}: {e:.2f} ha of {mapped:.2f} ha mapped ({plot_level:.0%} range {lo:.2f}–{hi:.2f} ha, "
            "if the plot's pixels convert together; a range under the map's model, not a sampling interval)."
        )
    share = row.get("share_after")
    if isinstance(share, int | float):
        top = f"; highest single pixel {ev.p_max:.2f}" if ev.p_max is not None else ""
        lines.append(f"Probability of conversion {after} (p_after_cutoff): {share:.2f} on average over the plot{top}.")
    n_clear = int(ev.clear.sum())
    lines.append(f"Clear views of the plot: {n_clear} of {len(ev.dates)} dates (at least half its pixels free of cloud, shadow and fill).")
    reasons = [str(r) for r in row.get("reasons") or []]
    if reasons:
        lines.append("Why this verdict: " + "; ".join(reasons) + ".")
    return lines


#: Size of a page: inches across per chip column (at least four columns), height in inches, dots per inch.
_COL_INCHES, _PAGE_INCHES, _DPI = 2.3, 10.4, 80
#: Chip labels by position: (a) the first chip, (b) the next...
_LETTERS = "abcdefghijklmnopqrstuvwxyz"


def _year_rgb(onset_map: np.ndarray, years: Sequence[int], cut_year: int) -> tuple[np.ndarray, dict[int, str]]:
    """The map window as RGB (h, w, 3) in 0–1: each onset year its colour of :func:`year_colours` over ``years``, other classes pale grey, no data white; and the colour of each year."""
    from matplotlib.colors import to_rgb

    colour = dict(zip(years, year_colours(years, cut_year), strict=True))
    base = np.where(onset_map == -1, 1.0, 0.88).astype(np.float32)
    rgb = np.repeat(base[..., None], 3, axis=-1)
    for y in np.unique(onset_map[onset_map > 0]):
        rgb[onset_map == y] = to_rgb(colour[int(y)])
    return rgb, colour


def _rings_line(rings: Sequence[np.ndarray], offsets: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
    """Every ring at every x offset as one polyline broken by NaN (x, y in the axes' data units: pixel centres at integers)."""
    xs, ys = [], []
    for x0 in offsets:
        for ring in rings:
            xs.extend([ring[:, 0] - 0.5 + x0, [np.nan]])
            ys.extend([ring[:, 1] - 0.5, [np.nan]])
    return (np.concatenate(xs), np.concatenate(ys)) if xs else (np.empty(0), np.empty(0))


class PageCanvas:
    """One figure drawn once and reused from page to page: what every page shares is drawn once, a page redraws only what is its own.

    The axes, their ticks and labels, the chips' caption and the index axis
    (the region's dates, fixed limits) are drawn once into a background; a
    page restores it, updates the data of a fixed set of artists (map and
    chip images, outlines, spans, series, markers; ``set_data``) and draws
    only those. The words that change (titles, the verdict's numbers, chip
    dates, the map's key) are set on the finished pixels a line at a time
    with matplotlib's own font, hinting and line layout (:class:`_Painter`):
    matplotlib 3.11 places and renders text glyph by glyph in Python, and
    that was most of a page's time. The index axis spans the region's dates
    and the map's years on every page (before, each page fitted it to its
    own marks: the same span but for the onset interval's edges). The PNG
    is written from the pixels with zlib level 1.

    Args:
        cols: chip columns (at least 4).
        dates: every acquisition date (``datetime64[D]``); the index axis spans them and the map's years.
        years: the map's years (the legend's colours and the index axis).
        cutoff_date: the cutoff, drawn on the index axis.
    """

    def __init__(self, cols: int, dates: np.ndarray, years: Sequence[int], cutoff_date: date, dpi: int = _DPI) -> None:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.dates import date2num
        from matplotlib.figure import Figure
        from matplotlib.lines import Line2D
        from matplotlib.patches import Rectangle

        self.cols, self.dpi, self.cutoff_date = cols, dpi, cutoff_date
        self.years = sorted(int(y) for y in years)
        self.fig = fig = Figure(figsize=(_COL_INCHES * cols + 0.4, _PAGE_INCHES), dpi=dpi)
        self.canvas = FigureCanvasAgg(fig)
        self.gs = gs = fig.add_gridspec(4, cols, height_ratios=[1.2, 1.0, 1.0, 1.1], left=0.04, right=0.985, top=0.93, bottom=0.05, hspace=0.55, wspace=0.12)

        # The map window: one RGB image (onset years, other classes pale, no data white) and the plot's outline.
        self.map_ax = ax = fig.add_subplot(gs[0, 0])
        ax.set_xticks([])
        ax.set_yticks([])
        self.map_img = ax.imshow(np.ones((2, 2, 3), np.float32), interpolation="nearest")
        self.map_line = Line2D([], [], color=OUTLINE, linewidth=1.6)
        ax.add_line(self.map_line)

        # The chips of a row in one image, all outlines of the row in one line.
        self.chip_ax, self.chip_img, self.chip_line = [], [], []
        for r in range(2):
            cax = fig.add_subplot(gs[1 + r, :])
            cax.set_xticks([])
            cax.set_yticks([])
            for sp in cax.spines.values():
                sp.set_visible(False)
            self.chip_ax.append(cax)
            self.chip_img.append(cax.imshow(np.ones((2, 2, 3), np.float32), interpolation="nearest"))
            line = Line2D([], [], color=OUTLINE, linewidth=1.4)
            cax.add_line(line)
            self.chip_line.append(line)

        # The plot's median indices through time: the axis is the region's dates and the map's years, the same on every page.
        self.ts = ts = fig.add_subplot(gs[3, :])
        d = np.asarray(dates, dtype="datetime64[D]")
        span_years = sorted(set(self.years) | {int(y) for y in d.astype("datetime64[Y]").astype(int) + 1970}) or [cutoff_date.year]
        lo, hi = date2num(date(span_years[0], 1, 1)), date2num(date(span_years[-1] + 1, 1, 1))
        if len(d):
            lo, hi = min(lo, date2num(d.min())), max(hi, date2num(d.max()))
        pad = 0.05 * (hi - lo)  # matplotlib's default margin
        ts.set_xlim(lo - pad, hi + pad)
        ts.set_ylim(-1.0, 1.0)
        ts.set_yticks([-1.0, -0.5, 0.0, 0.5, 1.0])
        ts.set_ylabel("index", fontsize=8)
        ts.xaxis_date()
        ts.tick_params(labelsize=7)
        ts.grid(alpha=0.25)
        xform = ts.get_xaxis_transform()
        self.span_interval = Rectangle((0, 0), 0, 1, transform=xform, color="#f7c873", alpha=0.35, lw=0)
        self.span_onset = Rectangle((0, 0), 0, 1, transform=xform, color="#e8872c", alpha=0.45, lw=0)
        self.cutoff_line = Line2D([date2num(cutoff_date)] * 2, [0, 1], transform=xform, color="black", linestyle="--", linewidth=1.3)
        self.ndvi = Line2D([], [], linestyle="-", marker="o", color="#1b7837", markersize=3.5, linewidth=1.1)
        self.nbr = Line2D([], [], linestyle="-", marker="s", color="#762a83", markersize=3.0, linewidth=1.1)
        self.not_clear = Line2D([], [], linestyle="none", marker="|", color="#999999", markersize=6)
        self.chip_marks = Line2D([], [], transform=xform, color="#00a0b8", linewidth=0.8)
        for p in (self.span_interval, self.span_onset):
            ts.add_patch(p)
        for ln in (self.cutoff_line, self.ndvi, self.nbr, self.not_clear, self.chip_marks):
            ts.add_line(ln)
        fig.text(
            0.04,
            ts.get_position().y1 + 0.052,
            "Chips: true colour = red, green, blue (reflectance 0–0.15 each); false colour = SWIR1, NIR, red as red, green, blue "
            "(0–0.40, 0–0.50, 0–0.15):\nvegetation green, cleared land magenta to brown. Grey: no clear observation on that date. Cyan outline: the plot.",
            fontsize=7,
            va="bottom",
            color="#444444",
        )

        # The background: everything but the artists a page updates (and the map's frame, which moves with its window's shape).
        self.dynamic = [self.map_img, self.map_line, *self.chip_img, *self.chip_line, self.span_interval, self.span_onset, self.cutoff_line, self.ndvi, self.nbr, self.not_clear, self.chip_marks]
        frame = list(ax.spines.values())
        for a in self.dynamic + frame:
            a.set_visible(False)
        self.canvas.draw()
        self.background = self.canvas.copy_from_bbox(fig.bbox)
        for a in self.dynamic + frame:
            a.set_visible(True)
        xlo, xhi = ts.get_xlim()
        self.grid = [t.gridline for t in ts.xaxis.get_major_ticks() if xlo <= t.get_loc() <= xhi] + [t.gridline for t in ts.yaxis.get_major_ticks() if -1.0 <= t.get_loc() <= 1.0]
        self.width, self.height = (int(v) for v in self.canvas.get_width_height())

    # ------------------------------------------------------------------ text on the pixels

    def _xy(self, display: tuple[float, float]) -> tuple[float, float]:
        """matplotlib display coordinates (origin bottom left) → pixel coordinates (origin top left)."""
        return float(display[0]), self.height - float(display[1])

    def _fig_xy(self, fx: float, fy: float) -> tuple[float, float]:
        return self._xy(self.fig.transFigure.transform((fx, fy)))

    # ------------------------------------------------------------------ one page

    def draw(self, ev: PlotEvidence, row: dict[str, Any], *, plot_level: float, map_level: float | None) -> bytes:
        """The page of one plot as PNG bytes."""
        from matplotlib.dates import date2num
        from PIL import Image

        fig, cutoff_date = self.fig, self.cutoff_date
        self.canvas.restore_region(self.background)
        h, w = ev.inside.shape
        cut_year = cutoff_date.year if (cutoff_date.month, cutoff_date.day) == (12, 31) else cutoff_date.year - 1
        yrs = sorted(set(self.years) | {int(y) for y in np.unique(ev.onset_map[ev.onset_map > 0])})

        # The map window.
        ax = self.map_ax
        rgb, colour = _year_rgb(ev.onset_map, yrs, cut_year)
        self.map_img.set_data(rgb)
        self.map_img.set_extent((-0.5, w - 0.5, h - 0.5, -0.5))
        ax.set_xlim(-0.5, w - 0.5)
        ax.set_ylim(h - 0.5, -0.5)
        ax.apply_aspect()
        self.map_line.set_data(*_rings_line(ev.outline, [0.0]))
        for a in (self.map_img, self.map_line, *ax.spines.values()):
            fig.draw_artist(a)

        # The chips.
        picks = ev.chip_dates
        gap = max(1, w // 8)
        span = len(picks) * w + (len(picks) - 1) * gap
        for r, arr in enumerate((ev.true_colour, ev.false_colour)):
            if not picks:
                break
            row_img = np.ones((h, span, 3), np.float32)
            for k in range(len(picks)):
                row_img[:, k * (w + gap) : k * (w + gap) + w] = arr[k]
            cax = self.chip_ax[r]
            self.chip_img[r].set_data(row_img)
            self.chip_img[r].set_extent((-0.5, span - 0.5, h - 0.5, -0.5))
            cax.set_xlim(-0.5, span - 0.5)
            cax.set_ylim(h - 0.5, -0.5)
            cax.apply_aspect()
            self.chip_line[r].set_data(*_rings_line(ev.outline, [k * (w + gap) for k in range(len(picks))]))
            fig.draw_artist(self.chip_img[r])
            fig.draw_artist(self.chip_line[r])

        # The plot's median NDVI and NBR through time.
        ts = self.ts
        x = date2num(ev.dates.astype("datetime64[D]"))
        spans = []
        if ev.onset_lo is not None and ev.onset_hi is not None:
            x0 = date2num(date(ev.onset_lo, 1, 1))
            self.span_interval.set_x(x0)
            self.span_interval.set_width(date2num(date(ev.onset_hi + 1, 1, 1)) - x0)
            spans.append(self.span_interval)
        if ev.onset_year is not None:
            x0 = date2num(date(ev.onset_year, 1, 1))
            self.span_onset.set_x(x0)
            self.span_onset.set_width(date2num(date(ev.onset_year + 1, 1, 1)) - x0)
            spans.append(self.span_onset)
        ok = ev.clear
        self.ndvi.set_data(x[ok], ev.ndvi[ok])
        self.nbr.set_data(x[ok], ev.nbr[ok])
        self.not_clear.set_data(x[~ok], np.full(int((~ok).sum()), -0.95))
        marks = np.array([[x[t], x[t], np.nan] for t in picks]).ravel() if picks else np.empty(0)
        self.chip_marks.set_data(marks, np.tile([0.0, 1.0, np.nan], len(picks)))
        # In matplotlib's order: spans, then the grid, then the lines, then the frame.
        for a in (*spans, *(self.grid if spans else []), self.cutoff_line, self.ndvi, self.nbr, self.not_clear, self.chip_marks, *(ts.spines.values() if spans else [])):
            fig.draw_artist(a)

        # The words, set on the pixels.
        px = np.array(np.asarray(self.canvas.buffer_rgba())[..., :3])
        paint = _Painter(px, self.dpi)
        pid = str(row.get("id"))
        paint.text(self._fig_xy(0.04, 0.98), f"Plot {pid}: evidence of conversion after {cutoff_date.isoformat()}", 12, va="top", bold=True)
        bb = ax.get_window_extent()
        pad = 6 * self.dpi / 72  # axes.titlepad
        paint.text(self._xy(((bb.x0 + bb.x1) / 2, bb.y1 + pad)), f"Map: onset year (tile {ev.tile})", 8.5, ha="center")
        self._legend(paint, bb, [(str(y), colour[y]) for y in yrs if (ev.onset_map == y).any()])
        box = self.gs[0, 2:].get_position(fig) if self.cols >= 3 else self.gs[0, 1:].get_position(fig)
        body = "\n".join(textwrap.fill(s, width=int(31 * (self.cols - 2) + 8)) for s in page_text(ev, row, cutoff_date, plot_level, map_level))
        paint.text(self._fig_xy(box.x0 - 0.04 * box.width, box.y1 + 0.01), body, 7.6, va="top", linespacing=1.3)
        for r, name in enumerate(("true colour", "false colour")):
            if not picks:
                break
            cax = self.chip_ax[r]
            for k, t in enumerate(picks):
                if ev.onset_year is None:
                    role = "before cutoff" if k == 0 and ev.before is not None else "after cutoff"
                else:
                    role = "before onset year" if k == 0 and ev.before is not None else "from onset year on"
                label = f"({_LETTERS[k]}) {_day(ev.dates[t])}" + (f"\n{role}" if r == 0 else "")
                paint.text(self._xy(cax.transData.transform((k * (w + gap) + w / 2 - 0.5, -1.0))), label, 7.5, ha="center", va="bottom")
            cb = cax.get_window_extent()
            # The y label: rotated a quarter turn, axes.labelpad (4 points) left of the axes, centred on it.
            paint.text(self._xy((cb.x0 - 4 * self.dpi / 72, (cb.y0 + cb.y1) / 2)), name, 8, ha="right", va="center", vertical=True)
        if not picks:
            cell = self.gs[1, :].get_position(fig)
            paint.text(self._fig_xy(cell.x0, (cell.y0 + cell.y1) / 2), "No clear view of the plot in the imagery: no chip to show.", 9)
        xform = ts.get_xaxis_transform()
        for k, t in enumerate(picks):
            paint.text(self._xy(xform.transform((x[t], 0.97))), f"({_LETTERS[k]})", 7, ha="center", va="top", colour="#007a8c", box="white")
        # A caption in words rather than a legend box: the same key, a fraction of the drawing time.
        span_words = f"orange: mapped onset year {ev.onset_year}; pale orange: its interval {ev.onset_lo}–{ev.onset_hi}; " if ev.onset_year is not None else ""
        tb = ts.get_window_extent()
        paint.text(
            self._xy(((tb.x0 + tb.x1) / 2, tb.y1 + pad)),
            "The plot's median NDVI (green dots) and NBR (purple squares) on each clear view; grey ticks: dates not clear;\n"
            f"{span_words}dashed: the cutoff {cutoff_date.isoformat()}; cyan: the chips' dates",
            7.8,
            ha="center",
        )
        buf = io.BytesIO()
        # zlib level 1: much less time than the default level, files within a few per cent (the chips' pixels hardly compress).
        Image.fromarray(px).save(buf, format="PNG", compress_level=1)
        return buf.getvalue()

    def _legend(self, paint: _Painter, bb: Any, entries: list[tuple[str, str]]) -> None:
        """The map's key beside it, as matplotlib's legend at (1.02, 1) of the axes without a frame: a title, a swatch per onset year shown, and the other classes."""
        entries = entries + [("not converted", "#e0e0e0")]
        fs = 6.5 * self.dpi / 72  # legend spacings are in font sizes
        x0, y = self._xy((bb.x1 + 0.02 * bb.width, bb.y1))
        x0, y = x0 + 0.4 * fs, y + 0.4 * fs  # borderpad
        body = 2.8 * fs + max(paint.width(s, 6.5) for s, _ in entries)  # handlelength + handletextpad + text
        y = paint.text((x0 + body / 2, y), "onset year", 7, ha="center", va="top")
        for label, c in entries:
            y += 0.5 * fs  # labelspacing
            top = y
            y = paint.text((x0 + 2.8 * fs, y), label, 6.5, va="top")
            mid = (top + y) / 2
            paint.fill(x0, mid - 0.35 * fs, x0 + 2.0 * fs, mid + 0.35 * fs, c)


#: Rasterised text lines kept per process (:meth:`_Painter._line`), and how many at most.
_LINES: dict[tuple[str, float, bool, int], tuple[np.ndarray, float, float, float, float]] = {}
_LINES_KEPT = 2048


class _Painter:
    """Text and boxes on an RGB page (uint8 (h, w, 3), origin top left), with matplotlib's fonts, hinting and line layout.

    Each line is laid out and rasterised by FreeType in one call
    (:class:`matplotlib.ft2font.FT2Font`, the font matplotlib itself uses)
    and blended onto the pixels in the text's colour.
    """

    def __init__(self, pixels: np.ndarray, dpi: int) -> None:
        self.px, self.dpi = pixels, dpi

    @staticmethod
    def _font(size_pt: float, bold: bool, dpi: int) -> Any:
        from matplotlib.font_manager import FontProperties, findfont, get_font

        font = get_font(findfont(FontProperties(weight="bold" if bold else "normal")))  # the rcParams font, as the figure's own text
        font.set_size(size_pt, dpi)
        return font

    def _line(self, s: str, size_pt: float, bold: bool) -> tuple[np.ndarray, float, float, float, float]:
        """One line laid out and rasterised: coverage (h, w) uint8, width, ascent, descent and the bitmap's x offset, pixels (kept: titles, dates and legend entries recur from page to page)."""
        from matplotlib.backends.backend_agg import get_hinting_flag

        key = (s, size_pt, bold, self.dpi)
        got = _LINES.get(key)
        if got is None:
            font = self._font(size_pt, bold, self.dpi)
            font.set_text(s, 0.0, flags=get_hinting_flag())
            w, h = font.get_width_height()
            d = font.get_descent() / 64.0
            font.draw_glyphs_to_bitmap(antialiased=True)
            got = (np.array(font.get_image()), w / 64.0, h / 64.0 - d, d, font.get_bitmap_offset()[0] / 64.0)
            if len(_LINES) >= _LINES_KEPT:
                _LINES.clear()
            _LINES[key] = got
        return got

    def width(self, s: str, size_pt: float, bold: bool = False) -> float:
        return self._line(s, size_pt, bold)[1]

    def fill(self, x0: float, y0: float, x1: float, y1: float, colour: str) -> None:
        from matplotlib.colors import to_rgb

        r0, r1 = max(int(round(y0)), 0), min(int(round(y1)), self.px.shape[0])
        c0, c1 = max(int(round(x0)), 0), min(int(round(x1)), self.px.shape[1])
        if r1 > r0 and c1 > c0:
            self.px[r0:r1, c0:c1] = np.round(np.asarray(to_rgb(colour)) * 255).astype(np.uint8)

    def text(
        self,
        xy: tuple[float, float],
        text: str,
        size_pt: float,
        *,
        ha: str = "left",
        va: str = "baseline",
        bold: bool = False,
        colour: str = "black",
        linespacing: float = 1.2,
        box: str | None = None,
        vertical: bool = False,
    ) -> float:
        """Text at pixel ``xy``, aligned as matplotlib aligns it (``va``: top, bottom, center, or the last line's baseline); lines centred when ``ha`` is center.

        ``box`` fills a background of that colour with matplotlib's 4-point
        pad first; ``vertical`` turns the text a quarter turn (reading
        upwards; ``ha`` and ``va`` then apply to the turned block). Returns the
        pixel row of the block's bottom edge (unturned text).
        """
        from matplotlib.colors import to_rgb

        font = self._font(size_pt, bold, self.dpi)
        os2 = font.get_sfnt_table("OS/2")
        scale = size_pt * self.dpi / 72 / font.get_sfnt_table("head")["unitsPerEm"]
        asc_min, desc_min = os2["sTypoAscender"] * scale, -os2["sTypoDescender"] * scale
        lines = text.split("\n")
        # matplotlib's layout: with several lines, each is linespacing × the font's height, its ink centred in it.
        step = linespacing * (asc_min + desc_min) if len(lines) > 1 else None
        laid = []
        y = 0.0
        d = 0.0
        for s in lines:
            glyphs, w, a, d, xo = self._line(s, size_pt, bold)
            if step is not None:
                lead = step - (a + d)
                a, d = a + lead / 2, d + lead / 2
            laid.append((glyphs, w, y + a, xo))
            y += a + d
        total_h, last_d = y, d
        total_w = max((w for _, w, _, _ in laid), default=0.0)
        bw, bh = (total_h, total_w) if vertical else (total_w, total_h)
        x, yy = xy
        left = {"left": x, "center": x - bw / 2, "right": x - bw}[ha]
        top = {"top": yy, "bottom": yy - bh, "center": yy - bh / 2}.get(va, yy - (total_h - last_d))
        if box is not None:
            pad = 4 * self.dpi / 72
            self.fill(left - pad, top - pad, left + bw + pad, top + bh + pad, box)
        rgb = np.asarray(to_rgb(colour), np.float32) * 255
        for (glyphs, w, base, xo), s in zip(laid, lines, strict=True):
            if not s:
                continue
            desc = self._line(s, size_pt, bold)[3]
            lx = (total_w - w) / 2 if ha == "center" else 0.0
            # The bitmap's bottom row sits at the baseline plus the descent.
            r0, c0 = base + desc - glyphs.shape[0], lx + xo
            if vertical:
                # A quarter turn anticlockwise: (row, col) of the block → (total_w - col, row).
                r0, c0 = top + total_w - (c0 + glyphs.shape[1]), left + r0
                glyphs = np.rot90(glyphs)
            else:
                r0, c0 = top + r0, left + c0
            self._blend(glyphs, int(round(r0)), int(round(c0)), rgb)
        return top + bh

    def _blend(self, alpha: np.ndarray, r0: int, c0: int, rgb: np.ndarray) -> None:
        h, w = alpha.shape
        ra, ca = max(r0, 0), max(c0, 0)
        rb, cb = min(r0 + h, self.px.shape[0]), min(c0 + w, self.px.shape[1])
        if rb <= ra or cb <= ca:
            return
        a = alpha[ra - r0 : rb - r0, ca - c0 : cb - c0, None].astype(np.float32) / 255.0
        dst = self.px[ra:rb, ca:cb]
        dst[...] = np.round(dst * (1.0 - a) + rgb * a).astype(np.uint8)


_CANVASES: dict[tuple[Any, ...], PageCanvas] = {}


def draw_page(ev: PlotEvidence, row: dict[str, Any], cutoff_date: date, *, plot_level: float, map_level: float | None, years: Sequence[int], dpi: int = _DPI) -> bytes:
    """The page as PNG bytes (matplotlib's Agg canvas, no pyplot state), drawn on this process's :class:`PageCanvas` for the page's layout (made once, then reused)."""
    cols = max(len(ev.chip_dates), 4)
    key = (cols, dpi, cutoff_date, tuple(int(y) for y in years), ev.dates.tobytes())
    canvas = _CANVASES.get(key)
    if canvas is None:
        if len(_CANVASES) >= 4:  # a few layouts at most in one run; don't let figures pile up
            _CANVASES.clear()
        canvas = _CANVASES[key] = PageCanvas(cols, ev.dates, years, cutoff_date, dpi)
    return canvas.draw(ev, row, plot_level=plot_level, map_level=map_level)


# --------------------------------------------------------------------------- the pages


def page_name(plot_id: str, taken: set[str]) -> str:
    """A file name for a plot's page: the id with characters other than letters, digits, '.', '_' and '-' replaced, plus a short hash of the id where that changed it or it is taken."""
    base = _SAFE.sub("_", plot_id).strip("._") or "plot"
    base = base[:80]
    name = f"{base}.png"
    if base != plot_id or name.lower() in taken:
        name = f"{base}-{hashlib.sha256(plot_id.encode('utf-8')).hexdigest()[:8]}.png"
    taken.add(name.lower())
    return name


@dataclass
class _Job:
    """One page to draw (picklable: sent to worker processes)."""

    index: int
    plot_id: str
    file: str
    tile: str
    geom_wkb: bytes
    row: dict[str, Any]


@dataclass
class _Context:
    """What every page needs (picklable)."""

    region: RegionConfig
    map_paths: dict[str, str]
    map_scale: dict[str, tuple[float, float]]
    map_levels: dict[str, float | None]
    years: list[int]
    cutoff_date: date
    plot_level: float
    cfg: EvidenceConfig
    folder: str


_STATE: dict[str, Any] = {}


def _init(ctx: _Context) -> None:
    """Get a process ready to draw: each tile is opened (headers only) when its first plot comes, then kept."""
    _STATE["ctx"] = ctx
    _STATE["stacks"] = {}


def _stack(tile: str) -> Any:
    """This process's reader of a tile of the region, opened on first use: a worker opens only the tiles its plots lie in."""
    stacks = _STATE["stacks"]
    if tile not in stacks:
        ctx: _Context = _STATE["ctx"]
        stacks[tile] = open_tile(next(t for t in ctx.region.tiles if t.name == tile), ctx.region)
    return stacks[tile]


def _init_worker(ctx: _Context) -> None:
    """:func:`_init` in a worker process, with GDAL's block cache capped: each window is read once, so a large cache only holds memory."""
    os.environ.setdefault("GDAL_CACHEMAX", str(_WORKER_GDAL_CACHE_MB))
    _init(ctx)


#: GDAL's block cache in a page-drawing worker, MB (GDAL's default is 5% of RAM per process).
_WORKER_GDAL_CACHE_MB = 64


def _draw(job: _Job) -> dict[str, Any]:
    ctx: _Context = _STATE["ctx"]
    stack = _stack(job.tile)
    scale, offset = ctx.map_scale[job.tile]
    ev = gather(shapely.from_wkb(job.geom_wkb), Path(ctx.map_paths[job.tile]), stack, ctx.region.bands, ctx.cutoff_date, ctx.cfg, scale=scale, offset=offset)
    png = draw_page(ev, job.row, ctx.cutoff_date, plot_level=ctx.plot_level, map_level=ctx.map_levels.get(job.tile), years=ctx.years)
    dest = Path(ctx.folder) / job.file
    tmp = dest.with_name(dest.name + ".partial")
    tmp.write_bytes(png)
    os.replace(tmp, dest)
    return {
        "id": job.plot_id,
        "file": job.file,
        "verdict": job.row.get("verdict"),
        "tile": ev.tile,
        "window": list(ev.window),
        "onset_year": ev.onset_year,
        "onset_interval": [ev.onset_lo, ev.onset_hi] if ev.onset_year is not None else None,
        "boundary": ev.boundary.isoformat(),
        "before": _day(ev.dates[ev.before]) if ev.before is not None else None,
        "after": [_day(ev.dates[t]) for t in ev.after],
        "clear_views": int(ev.clear.sum()),
        "dates": len(ev.dates),
    }


@dataclass
class EvidenceResult:
    """What :func:`write_pages` wrote."""

    folder: Path
    pages: list[dict[str, Any]]
    skipped: list[dict[str, str]]
    seconds: float

    def lines(self) -> list[str]:
        out = [f"evidence pages: {len(self.pages)} in {self.folder} ({self.seconds:.1f} s)"]
        out.extend(f"  no page for {s['id']}: {s['reason']}" for s in self.skipped)
        return out


@dataclass
class PagePlot:
    """A plot that gets a page: its id, its polygon in the plots file's CRS, and its record in plots.json (numbers, verdict, reasons)."""

    id: str
    geometry: Any
    record: dict[str, Any]


def select(rows: Sequence[Any], cfg: EvidenceConfig) -> tuple[list[Any], list[dict[str, str]]]:
    """Rows (:class:`plantation.farmplots.cutoff.PlotRow`) that get a page, in the order given, and the ids asked for that cannot have one."""
    asked = {str(p) for p in cfg.plots}
    chosen = [r for r in rows if r.status == "ok" and (r.verdict in cfg.verdicts or r.id in asked)]
    known = {r.id: r for r in rows}
    skipped = []
    for pid in sorted(asked):
        if pid not in known:
            skipped.append({"id": pid, "reason": "no plot with this id in the plots file"})
        elif known[pid].status != "ok":
            skipped.append({"id": pid, "reason": f"the plot was not measured ({known[pid].status})"})
    return chosen, skipped


def _tile_for(geoms_by_crs: dict[str, Any], tiles: Sequence[Any]) -> Any | None:
    """The map tile holding the plot's representative point, else the one it overlaps most; None if none."""
    best, best_area = None, 0.0
    for t in tiles:
        g = geoms_by_crs[t.grid.crs.to_wkt()]
        box = shapely.box(*t.grid.bounds)
        if box.contains(shapely.point_on_surface(g)):
            return t
        a = g.intersection(box).area
        if a > best_area:
            best, best_area = t, a
    return best


def imagery_summary(stacks: Sequence[Any], region: RegionConfig, survey: str | None) -> dict[str, Any]:
    """The imagery section's record: dates, sensors, and clear-view shares by year and month from the survey (when its record is at hand and of this region)."""
    first = stacks[0]
    dates = [_day(d) for d in first.dates]
    sensors = first.date_sensors() if hasattr(first, "date_sensors") else [""] * len(dates)
    by_year: dict[str, int] = {}
    for d in dates:
        by_year[d[:4]] = by_year.get(d[:4], 0) + 1
    sens: dict[str, int] = {}
    for s in sensors:
        sens[s or "unnamed"] = sens.get(s or "unnamed", 0) + 1
    out: dict[str, Any] = {
        "region": region.name,
        "format": region.format,
        "tiles": [s.name for s in stacks],
        "bands": list(region.bands),
        "dates": len(dates),
        "first": dates[0] if dates else None,
        "last": dates[-1] if dates else None,
        "dates_by_year": by_year,
        "sensors": sens,
        "clear_source": None,
    }
    if survey:
        p = Path(survey)
        if not p.is_file():
            out["clear_note"] = f"no survey record at {p.name}: run `plantation survey` for the clear-view shares"
            return out
        try:
            doc = load_object(p, what="a survey record", again="write it again with `plantation survey`")
        except FileFormatError as exc:
            out["clear_note"] = str(exc)
            return out
        if doc.get("region") != region.name:
            out["clear_note"] = f"the survey record is of region {doc.get('region')!r}, not {region.name!r}"
            return out
        by_date = doc.get("clear_share_by_date")
        if isinstance(by_date, dict):
            cells: dict[str, dict[str, list[float]]] = {}
            for per_tile in by_date.values():
                for d, v in (per_tile or {}).items() if isinstance(per_tile, dict) else ():
                    if isinstance(v, int | float):
                        cells.setdefault(str(d)[:4], {}).setdefault(str(int(str(d)[5:7])), []).append(float(v))
            out["clear_share_by_year_month"] = {y: {m: round(float(np.mean(v)), 4) for m, v in sorted(ms.items(), key=lambda kv: int(kv[0]))} for y, ms in sorted(cells.items())}
            out["clear_share_by_year"] = {y: round(float(np.mean([x for v in ms.values() for x in v])), 4) for y, ms in sorted(cells.items())}
        by_month = doc.get("clear_share_by_month")
        if isinstance(by_month, dict):
            out["clear_share_by_month"] = {str(k): float(v) for k, v in by_month.items() if isinstance(v, int | float)}
        out["clear_source"] = "survey.json (share of each tile's pixels valid on each date, averaged over tiles)"
    return out


def open_imagery(mapped: Any, region: RegionConfig) -> list[Any]:
    """The region's imagery tiles of the map's tiles (lazily: headers only), checked to be the same grids.

    Raises:
        RegionError: a map tile has no imagery tile of its name in the region, or their grids differ; the message says how to fix it.
    """
    by_name = {t.name: t for t in region.tiles}
    stacks = []
    for mt in mapped.tiles:
        if mt.name not in by_name:
            raise RegionError(
                f"{mt.path}: map tile {mt.name!r} has no imagery tile of that name in region {region.name!r}; name the region the map was made from (region=...) or set evidence.enabled=false"
            )
        st = open_tile(by_name[mt.name], region)
        if not st.grid.same_as(mt.grid):
            raise RegionError(
                f"{mt.path}: the map's grid ({mt.grid.describe()}) is not the imagery's ({st.grid.describe()}) in region {region.name!r}; "
                "name the region the map was made from (region=...) or set evidence.enabled=false"
            )
        stacks.append(st)
    return stacks


def write_pages(
    plots: Sequence[PagePlot],
    plots_crs: CRS,
    mapped: Any,
    region: RegionConfig,
    cutoff_date: date,
    out_dir: Path,
    cfg: EvidenceConfig,
    *,
    plot_level: float,
    plots_json: Path,
    skipped: Sequence[dict[str, str]] = (),
    progress: bool = False,
) -> EvidenceResult:
    """Draw a page per plot into ``out_dir/evidence/`` and write its ``evidence.json``.

    Args:
        plots: the plots to draw (:func:`select`), in the order the report lists them.
        plots_crs: the CRS of their geometries.
        mapped: the map (:class:`plantation.mapping.folder.MappedRegion`).
        region: the region whose imagery the map was made from.
        plots_json: the plot check's record the pages go with (its sha256 is recorded).
        skipped: plots asked for that get no page, with the reason (:func:`select`).

    Raises:
        RegionError: a map tile has no imagery tile of its name in the region, or their grids differ.
    """
    import time
    from concurrent.futures import ProcessPoolExecutor
    from multiprocessing import get_context

    from tqdm import tqdm

    t0 = time.perf_counter()
    check_evidence_config(cfg)
    skipped = list(skipped)
    stacks = open_imagery(mapped, region)
    levels: dict[str, float | None] = {}
    for mt in mapped.tiles:
        with rasterio.open(mt.path) as src:
            lv = src.tags().get("interval_level")
            levels[mt.name] = float(lv) if lv not in (None, "") else None
    summary = imagery_summary(stacks, region, cfg.survey)
    for st in stacks:
        if st.reader is not None:
            st.reader.close()

    jobs: list[_Job] = []
    taken: set[str] = {EVIDENCE_JSON.lower()}
    to_tile: dict[str, Any] = {}
    for k, pp in enumerate(plots):
        per_crs = {}
        for mt in mapped.tiles:
            wkt = mt.grid.crs.to_wkt()
            if wkt not in to_tile:
                dst = CRS.from_user_input(wkt)
                to_tile[wkt] = None if dst == plots_crs else Transformer.from_crs(plots_crs, dst, always_xy=True)
            if wkt not in per_crs:
                tr = to_tile[wkt]
                per_crs[wkt] = pp.geometry if tr is None else shapely.transform(pp.geometry, tr.transform, interleaved=False)
        tile = _tile_for(per_crs, mapped.tiles)
        if tile is None:
            skipped.append({"id": pp.id, "reason": "the plot lies outside every map tile"})
            continue
        jobs.append(_Job(k, pp.id, page_name(pp.id, taken), tile.name, shapely.to_wkb(per_crs[tile.grid.crs.to_wkt()]), pp.record))

    out_dir = Path(out_dir)
    final = out_dir / FOLDER
    work = out_dir / (FOLDER + ".partial")
    shutil.rmtree(work, ignore_errors=True)
    work.mkdir(parents=True)
    ctx = _Context(
        region=region,
        map_paths={t.name: str(t.path) for t in mapped.tiles},
        map_scale={t.name: (t.scale, t.offset) for t in mapped.tiles},
        map_levels=levels,
        years=list(mapped.years),
        cutoff_date=cutoff_date,
        plot_level=plot_level,
        cfg=cfg,
        folder=str(work),
    )
    pages: list[dict[str, Any]] = []
    try:
        workers = min(cfg.workers, max(1, len(jobs) // 20))
        bar = tqdm(total=len(jobs), unit="page", desc="evidence", disable=not progress, dynamic_ncols=True)
        if workers <= 1:
            _init(ctx)
            try:
                for j in jobs:
                    pages.append(_draw(j))
                    bar.update()
            finally:
                _STATE.clear()
                _CANVASES.clear()
        else:
            # spawn: a fresh process holds no GDAL handle or thread of this one.
            with ProcessPoolExecutor(max_workers=workers, mp_context=get_context("spawn"), initializer=_init_worker, initargs=(ctx,)) as pool:
                for res in pool.map(_draw, jobs, chunksize=8):
                    pages.append(res)
                    bar.update()
        bar.close()
        doc = {
            "kind": KIND,
            "plots_json_sha256": file_digest([plots_json]),
            "cutoff_date": cutoff_date.isoformat(),
            "stretch": {"true_colour": [list(c) for c in TRUE_COLOUR], "false_colour": [list(c) for c in FALSE_COLOUR], "masked_rgb": list(MASKED_RGB)},
            "min_clear_share": cfg.min_clear_share,
            "imagery": summary,
            "pages": pages,
            "skipped": skipped,
        }
        (work / EVIDENCE_JSON).write_text(json.dumps(doc, indent=1, ensure_ascii=False) + "\n")
        old = out_dir / (FOLDER + ".old")
        shutil.rmtree(old, ignore_errors=True)
        if final.exists():
            os.replace(final, old)
        os.replace(work, final)
        shutil.rmtree(old, ignore_errors=True)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    return EvidenceResult(folder=final, pages=pages, skipped=skipped, seconds=time.perf_counter() - t0)


def read_evidence(path: str | Path) -> dict[str, Any]:
    """``evidence.json`` as :func:`write_pages` wrote it.

    Args:
        path: the file, the ``evidence`` folder, or the plot check's ``out_dir`` holding it.

    Raises:
        InputNotFoundError: there is no such file.
        FileFormatError: not valid JSON, not an evidence record (its ``kind``), or a section of the wrong shape; one line naming the file.
    """
    p = Path(path)
    if p.is_dir() and (p / FOLDER).is_dir():
        p = p / FOLDER
    p = locate(p, EVIDENCE_JSON, missing="run `plantation farmplots` with evidence.enabled=true to write it")
    again = "write it again with `plantation farmplots`"
    doc = load_object(p, what="an evidence record", again=again)
    if doc.get("kind") != KIND:
        raise FileFormatError(f"{p}: kind {doc.get('kind')!r}, expected {KIND!r}; is this the right file?")
    check_shapes(p, doc, objects=("imagery", "stretch"), records=("pages", "skipped"), again=again)
    for i, page in enumerate(doc.get("pages") or [], start=1):
        f = page.get("file")
        if not isinstance(f, str) or "/" in f or "\\" in f or f.startswith("."):
            raise FileFormatError(f"{p}: pages entry {i} has no plain file name; {again}")
    return doc
