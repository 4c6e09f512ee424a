"""Farm-plot verdicts against the simulator's truth (``plantation benchmark-plots``).

Reads the verdicts ``plantation farmplots`` wrote (``plots.json``, through
:func:`plantation.farmplots.cutoff.read_plots_json`), the plots file they were
made from, and the region's truth rasters (simulated regions only: the
``truth`` of each tile in the region file; bands 1 class as
:data:`plantation.reference.labels.LABEL_CODES`, 2 onset year of the
conversion (0 if none), 3 event code as
:data:`plantation.simulation.scenario.EVENTS` (0 none), 4 event year, 5
parcel id). Writes ``bench/results/farmplots.json`` (configs/benchmark_plots.yaml).

Per plot, the truth is the truth pixels whose centres lie inside the polygon
(rasterio's geometry mask with ``all_touched=False``), the polygon being
reprojected from the plots file's CRS to each truth raster's CRS. Areas are
pixel counts × the pixel area of the raster's transform (m², projected CRS
only), reported in ha. A plot's category, the first that applies:

* ``no_truth``: no truth pixel centre lies inside it (outside the truth, or
  thinner than a pixel); not scored.
* ``converted_after``: the area of class-2 (conversion) pixels with onset
  year > the cutoff year is at least the verdict rules' ``review_min_ha``,
  the smallest converted area the rules treat as worth review
  (:class:`plantation.farmplots.cutoff.VerdictConfig`), taken from the
  thresholds plots.json records.
* ``minor_after``: some after-cutoff conversion, less than that.
* ``converted_before_only``: conversion pixels, none after the cutoff year.
* ``other_disturbance``: no conversion pixel but some event pixel (logging,
  fire, clearing for crops, old plantation, road, ...).
* ``untouched``: no conversion pixel and no event pixel at all.

The truth resolves years only: with a cutoff date inside a year, a
conversion in that year counts as before the cutoff here.

The two targets: no ``untouched`` plot above ``low_evidence``, and no
``converted_after`` plot at ``low_evidence``.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import rasterio.features
import rasterio.windows
import shapely
from affine import Affine
from pyproj import CRS, Transformer

from plantation.errors import ConfigError, FileFormatError, InputNotFoundError, PlantationError
from plantation.farmplots.cutoff import PLOTS_JSON, VERDICTS, PlotSet, check_plots, read_plots, read_plots_json, reproject
from plantation.imagery.config import RegionConfig, TileConfig
from plantation.mapping.folder import file_digest
from plantation.records import write_object
from plantation.reference.labels import LABEL_CODES
from plantation.simulation.scenario import EVENTS

#: Truth categories of a plot, in the order they are decided (see the module docstring).
CATEGORIES: tuple[str, ...] = ("no_truth", "converted_after", "minor_after", "converted_before_only", "other_disturbance", "untouched")
#: The verdict column of a plot plots.json holds no verdict for (a problem plot, or one missing from it).
NOT_MEASURED = "not_measured"
#: Truth bands read: class, onset year, event code (1-based).
_TRUTH_BANDS = [1, 2, 3]
#: Areas are compared after rounding to this many decimals of a hectare (float noise of summed pixel areas).
_DECIMALS = 9


@dataclass
class PlotCheckConfig:
    """Schema of ``configs/benchmark_plots.yaml``."""

    region: RegionConfig = field(default_factory=RegionConfig)
    plots: str = "toy_tiles/plots.geojson"
    id_field: str = "id"
    plots_json: str = "outputs/assess/selvara_toy/plots.json"
    result: str = "bench/results/farmplots.json"


# --------------------------------------------------------------------------- truth per plot


@dataclass(frozen=True)
class PlotTruth:
    """What the truth says of one plot.

    Attributes:
        area_px: truth pixels whose centres lie inside the plot.
        after_ha: area of those converted (class 2) with onset year > the cutoff year, ha.
        any_conversion: a class-2 pixel of any onset year.
        any_event: a pixel with an event code other than 0 (none).
        category: one of :data:`CATEGORIES`.
    """

    area_px: int
    after_ha: float
    any_conversion: bool
    any_event: bool
    category: str


def pixel_area_m2(transform: Affine, crs: CRS, where: str | Path = "truth raster") -> float:
    """Area of one pixel in m² from a raster's affine transform in a projected CRS.

    Raises:
        PlantationError: the CRS is missing or geographic (degrees have no fixed area), naming ``where``.
    """
    if crs is None:
        raise PlantationError(f"{where}: the raster has no CRS; a truth raster needs a projected CRS (metres)")
    crs = CRS.from_user_input(crs)
    if not crs.is_projected:
        raise PlantationError(f"{where}: CRS {crs.to_string()} is not projected; a truth raster needs a projected CRS (metres) for pixel areas")
    metres = crs.axis_info[0].unit_conversion_factor
    return abs(transform.a * transform.e - transform.b * transform.d) * metres**2


def categorise(*, area_px: int, after_ha: float, any_conversion: bool, any_event: bool, review_min_ha: float) -> str:
    """The plot's category (:data:`CATEGORIES`, the first that applies); ``after_ha`` and ``review_min_ha`` in ha."""
    if area_px == 0:
        return "no_truth"
    after = round(after_ha, _DECIMALS)
    if after > 0 and after >= round(review_min_ha, _DECIMALS):
        return "converted_after"
    if after > 0:
        return "minor_after"
    if any_conversion:
        return "converted_before_only"
    if any_event:
        return "other_disturbance"
    return "untouched"


def truth_of(cls: np.ndarray, onset: np.ndarray, event: np.ndarray, area_m2: np.ndarray, *, cutoff_year: int, review_min_ha: float) -> PlotTruth:
    """A plot's truth from its pixels (1-D arrays, one entry per pixel inside it).

    Args:
        cls: truth class codes (:data:`plantation.reference.labels.LABEL_CODES`).
        onset: onset year of the conversion (0 where none).
        event: event codes (:data:`plantation.simulation.scenario.EVENTS`).
        area_m2: each pixel's area, m².
        cutoff_year: conversions with onset year > this count as after the cutoff.
        review_min_ha: the verdict rules' smallest area worth review, ha.
    """
    conv = cls == LABEL_CODES["conversion"]
    after = conv & (onset > cutoff_year)
    after_ha = float(area_m2[after].sum()) / 1e4
    any_conversion = bool(conv.any())
    any_event = bool((event != EVENTS["none"]).any())
    n = int(cls.size)
    category = categorise(area_px=n, after_ha=after_ha, any_conversion=any_conversion, any_event=any_event, review_min_ha=review_min_ha)
    return PlotTruth(area_px=n, after_ha=after_ha, any_conversion=any_conversion, any_event=any_event, category=category)


class TruthTile:
    """One truth raster, read window by window under each plot."""

    def __init__(self, tile: TileConfig) -> None:
        if not tile.truth:
            raise ConfigError(f"region tile {tile.name!r}: no truth raster (tiles.truth); this benchmark needs a simulated region with truth rasters")
        path = Path(tile.truth)
        if not path.is_file():
            raise InputNotFoundError(f"{path.absolute()}: truth raster of tile {tile.name!r} not found; regenerate the region with `plantation simulate`")
        self.name = tile.name
        self.path = path
        self._ds = rasterio.open(path)
        if self._ds.count < len(_TRUTH_BANDS):
            count = self._ds.count
            self._ds.close()
            raise FileFormatError(f"{path}: {count} band(s); a truth raster has 5 (class, onset year, event, event year, parcel)")
        self.crs = CRS.from_user_input(self._ds.crs.to_wkt()) if self._ds.crs else None
        try:
            self.area_m2 = pixel_area_m2(self._ds.transform, self.crs, path)
        except PlantationError:
            self._ds.close()
            raise
        h, w = self._ds.height, self._ds.width
        corners = [self._ds.transform * (c, r) for c, r in ((0, 0), (w, 0), (w, h), (0, h))]
        self.footprint = shapely.Polygon(corners)

    def close(self) -> None:
        self._ds.close()

    def pixels(self, geom: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Class, onset year and event code of the pixels whose centres lie inside ``geom`` (a polygon in this raster's CRS), 1-D."""
        empty = np.zeros(0, np.int32)
        if geom.is_empty or not geom.intersects(self.footprint):
            return empty, empty, empty
        ds = self._ds
        inv = ~ds.transform
        x0, y0, x1, y1 = geom.bounds
        cols, rows = zip(*(inv * xy for xy in ((x0, y0), (x0, y1), (x1, y0), (x1, y1))), strict=True)
        c0, c1 = max(math.floor(min(cols)), 0), min(math.ceil(max(cols)), ds.width)
        r0, r1 = max(math.floor(min(rows)), 0), min(math.ceil(max(rows)), ds.height)
        if c1 <= c0 or r1 <= r0:
            return empty, empty, empty
        win = rasterio.windows.Window(c0, r0, c1 - c0, r1 - r0)
        inside = rasterio.features.geometry_mask([geom], out_shape=(r1 - r0, c1 - c0), transform=ds.window_transform(win), all_touched=False, invert=True)
        block = ds.read(_TRUTH_BANDS, window=win)
        return block[0][inside], block[1][inside], block[2][inside]


def _earlier_cover(tiles: Sequence[TruthTile], k: int) -> Any:
    """Footprints of the tiles before ``k``, in tile ``k``'s CRS, or None: pixels there were counted already."""
    here = tiles[k]
    parts = []
    for prev in tiles[:k]:
        fp = prev.footprint
        if prev.crs != here.crs:
            # Densified, so the footprint stays exact through a curved reprojection.
            tr = Transformer.from_crs(prev.crs, here.crs, always_xy=True)
            fp = reproject(shapely.segmentize(fp, max(fp.length / 400, 1e-9)), tr)
        if fp.intersects(here.footprint):
            parts.append(fp)
    return shapely.union_all(parts) if parts else None


def plot_truths(plots: PlotSet, tiles: Sequence[TileConfig], *, cutoff_year: int, review_min_ha: float) -> dict[str, PlotTruth]:
    """Truth of every measurable plot (:func:`plantation.farmplots.cutoff.check_plots`), by id, in file order.

    A plot straddling tiles gathers the pixels of every tile it covers; where
    tiles overlap, a pixel of an earlier tile is not counted again.

    Args:
        plots: the plots file as read (any CRS).
        tiles: the region's tiles; each needs a ``truth`` raster in a projected CRS.
        cutoff_year: conversions with onset year > this count as after the cutoff.
        review_min_ha: the verdict rules' smallest area worth review, ha.
    """
    good, _ = check_plots(plots)
    readers: list[TruthTile] = []
    try:
        for t in tiles:
            readers.append(TruthTile(t))
        covers = [_earlier_cover(readers, k) for k in range(len(readers))]
        to_tile = [None if plots.crs == rd.crs else Transformer.from_crs(plots.crs, rd.crs, always_xy=True) for rd in readers]
        out: dict[str, PlotTruth] = {}
        for i in good:
            parts: list[tuple[np.ndarray, ...]] = []
            for rd, cover, tr in zip(readers, covers, to_tile, strict=True):
                g = reproject(plots.geoms[i], tr)
                if cover is not None:
                    g = g.difference(cover)
                cls, onset, event = rd.pixels(g)
                parts.append((cls, onset, event, np.full(cls.size, rd.area_m2)))
            cls, onset, event, area = (np.concatenate([p[j] for p in parts]) if parts else np.zeros(0) for j in range(4))
            out[str(plots.ids[i])] = truth_of(cls, onset, event, area, cutoff_year=cutoff_year, review_min_ha=review_min_ha)
        return out
    finally:
        for rd in readers:
            rd.close()


# --------------------------------------------------------------------------- the comparison


@dataclass
class Comparison:
    """Truth categories against verdicts.

    Attributes:
        table: plot id → (category, verdict); verdict None where plots.json has none.
        counts: category → verdict (or :data:`NOT_MEASURED`) → number of plots; every pair listed.
        untouched_above_low_evidence: ids of ``untouched`` plots with verdict ``review`` or ``strong_evidence``.
        converted_after_at_low_evidence: ids of ``converted_after`` plots with verdict ``low_evidence``.
    """

    table: dict[str, tuple[str, str | None]]
    counts: dict[str, dict[str, int]]
    untouched_above_low_evidence: list[str]
    converted_after_at_low_evidence: list[str]

    @property
    def targets_met(self) -> dict[str, bool]:
        """Each target, met or not."""
        return {
            "no_untouched_above_low_evidence": not self.untouched_above_low_evidence,
            "no_converted_after_at_low_evidence": not self.converted_after_at_low_evidence,
        }


def compare(categories: Mapping[str, str], verdicts: Mapping[str, str | None]) -> Comparison:
    """Cross each plot's truth category (id → :data:`CATEGORIES`) with its verdict (id → :data:`plantation.farmplots.cutoff.VERDICTS` or None).

    Plots are those of ``categories``, in its order; a plot missing from
    ``verdicts`` has verdict None (:data:`NOT_MEASURED` in the counts).
    """
    table = {pid: (cat, verdicts.get(pid)) for pid, cat in categories.items()}
    counts = {cat: {v: 0 for v in (*VERDICTS, NOT_MEASURED)} for cat in CATEGORIES}
    for cat, v in table.values():
        counts[cat][v if v is not None else NOT_MEASURED] += 1
    above = [pid for pid, (cat, v) in table.items() if cat == "untouched" and v in ("review", "strong_evidence")]
    missed = [pid for pid, (cat, v) in table.items() if cat == "converted_after" and v == "low_evidence"]
    return Comparison(table=table, counts=counts, untouched_above_low_evidence=above, converted_after_at_low_evidence=missed)


# --------------------------------------------------------------------------- the job


def _plots_json_path(value: str | Path) -> Path:
    p = Path(value)
    return p / PLOTS_JSON if p.is_dir() else p


def _number(doc: dict[str, Any], path: Path, *keys: str) -> Any:
    """``doc[keys[0]][keys[1]]...`` as a number, or a one-line FileFormatError naming the file and the key."""
    node: Any = doc
    for k in keys:
        node = node.get(k) if isinstance(node, dict) else None
    if isinstance(node, bool) or not isinstance(node, int | float):
        raise FileFormatError(f"{path}: {'.'.join(keys)} is {node!r}, expected a number; write it again with `plantation farmplots`")
    return node


def run(cfg: PlotCheckConfig) -> dict[str, Any]:
    """Score the verdicts of ``cfg.plots_json`` against the region's truth, write ``cfg.result`` and return what it holds.

    Raises:
        InputNotFoundError: plots.json, the plots file or a truth raster is missing.
        FileFormatError: plots.json is damaged or lacks the cutoff year or ``review_min_ha``.
        PlantationError: plots.json was written for another plots file, or a truth raster is not in a projected CRS.
    """
    pj = _plots_json_path(cfg.plots_json)
    if not pj.is_file():
        raise InputNotFoundError(f"{pj.absolute()}: plots.json not found; run `plantation farmplots` first (or set plots_json= to the plots.json it wrote)")
    doc = read_plots_json(pj)
    cutoff_year = int(_number(doc, pj, "cutoff", "year"))
    review_min_ha = float(_number(doc, pj, "thresholds", "review_min_ha"))
    plots = read_plots(cfg.plots, cfg.id_field)
    recorded = doc.get("plots_sha256")
    if recorded and recorded != file_digest([Path(cfg.plots)]):
        raise PlantationError(f"{pj}: written for another plots file than {cfg.plots} (its sha256 differs); run `plantation farmplots plots={cfg.plots}` first")
    if not cfg.region.tiles:
        raise ConfigError(f"region {cfg.region.name!r}: no tiles; the benchmark needs the region's truth rasters")
    truths = plot_truths(plots, cfg.region.tiles, cutoff_year=cutoff_year, review_min_ha=review_min_ha)
    entries = {str(p.get("id")): p for p in doc.get("plots") or []}
    cmp = compare({pid: t.category for pid, t in truths.items()}, {pid: e.get("verdict") for pid, e in entries.items()})
    correction = {k: doc[k] for k in ("probability_correction", "probability_correction_text") if k in doc} or None
    result = {
        "region": cfg.region.name,
        "plots_file": str(cfg.plots),
        "plots_json": str(pj),
        "cutoff_year": cutoff_year,
        "thresholds": doc.get("thresholds"),
        # What plots.json says about the map's probability correction; null: it says nothing (no correction recorded).
        "map_probability_correction": correction,
        "plots": [
            {
                "id": pid,
                "category": t.category,
                "verdict": cmp.table[pid][1],
                "area_px": t.area_px,
                "true_after_ha": round(t.after_ha, 4),
                "expected_after_ha": (entries.get(pid) or {}).get("expected_after_ha"),
            }
            for pid, t in truths.items()
        ],
        "counts": cmp.counts,
        "untouched_above_low_evidence": cmp.untouched_above_low_evidence,
        "converted_after_at_low_evidence": cmp.converted_after_at_low_evidence,
        "targets_met": cmp.targets_met,
    }
    write_object(result, cfg.result)
    return result


def summary_lines(result: dict[str, Any]) -> list[str]:
    """A short account of :func:`run`'s result for the terminal: counts per category × verdict, then the targets."""
    cols = (*VERDICTS, NOT_MEASURED)
    out = [f"farm plots against the truth: {len(result['plots'])} plots, converted after {result['cutoff_year']}", f"{'category':<22}" + "".join(f"{c:>17}" for c in cols)]
    for cat, row in result["counts"].items():
        if any(row.values()):
            out.append(f"{cat:<22}" + "".join(f"{row[c]:>17}" for c in cols))
    for key, met in result["targets_met"].items():
        ids = result[key.removeprefix("no_")]
        out.append(f"{key}: {'met' if met else 'NOT met: ' + ', '.join(ids)}")
    return out
