"""The farm-plot cutoff report: for each plot, how much of it the map says was converted after a cutoff date.

Input: a mapped region (the folder ``plantation map`` writes: one COG per
tile with the bands of :data:`plantation.mapping.folder.LAYERS`, and its
``manifest.json``) and a vector file of farm plots (GeoPackage or GeoJSON
polygons, any CRS, an id attribute).

For each plot, every map pixel under it counts with the exact share of the
pixel the polygon covers (``exactextract``'s coverage fractions), times the
pixel's area (:meth:`plantation.imagery.region.Grid.row_areas_m2`: the pixel size for a
projected CRS, geodesic rows for a geographic one). A plot may straddle tiles:
its pixels are gathered from every tile it touches. Per plot (areas in
hectares):

* ``area_ha``: geodesic area of the polygon on the WGS 84 ellipsoid (pyproj
  ``Geod``). In a projected map CRS the pixels' areas are grid areas, so a
  plot wholly inside the map can show a ``mapped_share`` a little off 1 (UTM:
  at most about 0.1%, the projection's scale error).
* ``mapped_ha``: covered area of pixels with data (bands 1–7 are nodata where
  a pixel had too few clear dates); ``mapped_share`` = mapped_ha / area_ha.
* ``expected_after_ha`` = Σ p_after_cutoff × covered area: the area the map
  expects converted after the cutoff; ``share_after`` = it / mapped_ha.
* ``after_lo_ha``, ``after_hi_ha``: the comonotone range at
  ``interval_level`` L. If the plot's pixels convert together (a holding is
  cleared as one piece, so neighbours are strongly dependent), conversion of
  pixel i is the event U ≤ p_i for one uniform U, and the converted area's
  (1 − L)/2 and (1 + L)/2 quantiles are the covered area of pixels with
  p > 1 − (1 − L)/2 and with p ≥ (1 − L)/2. The range is wider than one that
  assumes pixels independent (which would shrink as the plot grows). It is
  a range of the area under the map's model, not a sampling interval: the
  model's own errors are not in it; estimate those from a reference sample.
* ``converted_ha``: area mapped as conversion (class 2); ``years``: that
  area by onset year (in the tables one column ``converted_ha_<year>`` per
  year of the map, 0 where none; in plots.json ``{"<year>": ha}`` with the
  years that have some); ``straddle_ha``: of it, the area in the cutoff's own
  year when the cutoff falls inside a year (the map resolves years only, so
  those conversions may lie either side of the date); ``mean_clear``: mean
  clear dates under the plot, weighted by covered area.
* fire in the clearing (the map's fire layers, :mod:`plantation.mapping.fire`;
  None for a map made before them): ``fire_ha``, the converted area cleared
  with fire; ``fire_share`` = fire_ha / converted_ha; ``fire_unknown_ha``,
  converted area whose clearing had no clear view close enough to tell (not
  "no fire"); ``fire_after_ha``, converted area cleared with fire in a year
  after the cutoff year; ``escaped_fire_ha``, forest burnt by fire escaped
  from a clearing (not converted).
* ``verdict``: ``low_evidence``, ``review`` or ``strong_evidence`` by the
  rules of :class:`VerdictConfig`, and ``reasons`` in words.

Outputs (:func:`write_outputs`): ``plots.csv``; ``plots.geojson`` (EPSG:4326,
RFC 7946); ``plots.gpkg`` (layer ``plots``, the polygons in the plots file's
own CRS), all three with the columns of :func:`table_columns` and their rows
in :func:`sort_rows` order (most attention first); and ``plots.json``, the
record, with its plots in file order.

Plots that cannot be measured are listed with a problem (never dropped, never
fatal): :data:`PROBLEMS`. The verdicts are probabilistic evidence to be
verified, not findings (:data:`plantation.mapping.folder.NOTICE`).
"""

from __future__ import annotations

import json
import logging
import os
import re
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field
from datetime import date
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import rasterio
import rasterio.windows
import shapely
from pyproj import CRS, Geod, Transformer

from plantation.errors import ConfigError, FileFormatError, InputNotFoundError, PlantationError
from plantation.farmplots.evidence import VERDICT_NAMES, EvidenceConfig, EvidenceResult, PagePlot, check_evidence_config, open_imagery, select, write_pages
from plantation.imagery.config import RegionConfig
from plantation.mapping.folder import BAND, FIRE, NO_CORRECTION, NODATA, NOTICE, MapTile, file_digest, open_map
from plantation.records import check_shapes, load_object, locate
from plantation.reference.labels import LABEL_CODES

KIND = "plantation-plots/1"
#: Fire code of a pixel whose map tile has no fire layers (a map made before them).
NO_FIRE_LAYERS = -1
#: The plot check's record, written by :func:`run` and read by :func:`read_plots_json` (this module is its one reader and writer).
PLOTS_JSON = "plots.json"
VERDICTS: tuple[str, ...] = VERDICT_NAMES
#: Per-plot problems, in the order they are checked (a plot gets the first that applies).
PROBLEMS: tuple[str, ...] = ("missing_id", "duplicate_id", "empty_geometry", "not_a_polygon", "invalid_geometry", "outside_map")
_VECTOR_SUFFIXES = (".gpkg", ".geojson", ".json")
_YEAR = re.compile(r"^\d{4}$")
_ISO_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")
#: Map probabilities are stored to 1e-4; comparisons round to this many
#: decimals first, so a pixel stored exactly at an interval bound falls on the
#: side the rule says rather than on float noise (0.95 vs 0.9500000000000001).
_DECIMALS = 9
#: The tables' columns before the per-year ones (CSV, GeoJSON and GeoPackage; :func:`table_columns`).
LEAD_COLUMNS: tuple[str, ...] = (
    "id",
    "feature",
    "status",
    "area_ha",
    "mapped_ha",
    "mapped_share",
    "expected_after_ha",
    "after_lo_ha",
    "after_hi_ha",
    "share_after",
    "converted_ha",
)
#: The tables' columns after the per-year ones.
TAIL_COLUMNS: tuple[str, ...] = ("straddle_ha", "mean_clear", "fire_ha", "fire_share", "fire_unknown_ha", "fire_after_ha", "escaped_fire_ha", "verdict", "reasons")
#: Layer name in plots.gpkg.
GPKG_LAYER = "plots"
_GEOD = Geod(ellps="WGS84")
_WGS84 = CRS.from_epsg(4326)


# --------------------------------------------------------------------------- configuration


@dataclass
class VerdictConfig:
    """Thresholds of the three verdicts (documented in ``configs/plots.yaml``).

    ``strong_evidence`` when ``after_lo_ha ≥ strong_min_ha``; otherwise
    ``review`` when any of: ``expected_after_ha ≥ review_min_ha``,
    ``share_after ≥ review_min_share``, ``after_hi_ha ≥ strong_min_ha``,
    ``straddle_ha ≥ review_min_ha``, ``mean_clear < min_mean_clear``,
    ``mapped_share < min_mapped_share``; otherwise ``low_evidence``.
    Areas in hectares, shares as fractions, clear dates as counts.
    """

    strong_min_ha: float = 0.5
    review_min_ha: float = 0.1
    review_min_share: float = 0.02
    min_mean_clear: float = 8.0
    min_mapped_share: float = 0.9


@dataclass
class PlotsConfig:
    """Schema of ``configs/plots.yaml``."""

    region: RegionConfig = field(default_factory=RegionConfig)
    plots: str = "toy_tiles/plots.geojson"
    map: str = "outputs/maps"
    #: A year (the end of it) or an ISO date ("after this date"); None: the map's cutoff year.
    cutoff: str | None = None
    id_field: str = "id"
    out_dir: str = "outputs/assess"
    interval_level: float = 0.9
    verdict: VerdictConfig = field(default_factory=VerdictConfig)
    progress: bool = True
    #: A page of evidence per flagged plot (:mod:`plantation.farmplots.evidence`).
    evidence: EvidenceConfig = field(default_factory=EvidenceConfig)


def year_column(year: int) -> str:
    """The tables' column of the area mapped as converted in onset year ``year``: ``converted_ha_2016``."""
    return f"converted_ha_{int(year)}"


def table_columns(years: Sequence[int]) -> list[str]:
    """The tables' columns, in order: :data:`LEAD_COLUMNS`, one :func:`year_column` per year (ascending), :data:`TAIL_COLUMNS`."""
    return [*LEAD_COLUMNS, *(year_column(y) for y in sorted(set(int(y) for y in years))), *TAIL_COLUMNS]


def check_config(cfg: PlotsConfig) -> None:
    """Reject values no report could use, naming the key."""
    if not 0 < cfg.interval_level < 1:
        raise ConfigError(f"interval_level: {cfg.interval_level!r} must be in (0, 1)")
    if not str(cfg.id_field).strip():
        raise ConfigError("id_field: must name the plots' id attribute (e.g. id)")
    v = cfg.verdict
    for key in ("strong_min_ha", "review_min_ha", "review_min_share", "min_mean_clear", "min_mapped_share"):
        if getattr(v, key) < 0:
            raise ConfigError(f"verdict.{key}: {getattr(v, key)!r} must be 0 or more")
    for key in ("review_min_share", "min_mapped_share"):
        if getattr(v, key) > 1:
            raise ConfigError(f"verdict.{key}: {getattr(v, key)!r} is a share, at most 1")
    if cfg.evidence.enabled:
        check_evidence_config(cfg.evidence)


# --------------------------------------------------------------------------- cutoff


@dataclass(frozen=True)
class Cutoff:
    """What "converted after the cutoff" means.

    Attributes:
        date: conversions after this day count.
        year: the map's cutoff year this needs (p_after_cutoff counts
            conversions from ``year + 1`` on).
        straddle_year: the year a conversion mapped in may fall on either side
            of ``date`` (the map resolves years only); None when the cutoff
            is the end of a year.
    """

    date: date
    year: int
    straddle_year: int | None

    def describe(self) -> str:
        return f"after {self.date.isoformat()}"


def parse_cutoff(value: int | str | date) -> Cutoff:
    """A cutoff from a year (``2020``: the end of 2020) or an ISO date (``"2020-06-30"``: after that day).

    Raises:
        ConfigError: the value is neither, naming it.
    """
    if isinstance(value, bool):
        raise ConfigError(f"cutoff: {value!r} is not a year (2020) or an ISO date (2020-12-31)")
    if isinstance(value, date):
        day = value
    elif isinstance(value, int) or (isinstance(value, str) and _YEAR.match(value.strip())):
        year = int(value)
        if not 1000 <= year <= 9999:
            raise ConfigError(f"cutoff: {value!r} is not a year (2020) or an ISO date (2020-12-31)")
        return Cutoff(date(year, 12, 31), year, None)
    elif isinstance(value, str) and _ISO_DATE.match(value.strip()):
        try:
            day = date.fromisoformat(value.strip())
        except ValueError:
            raise ConfigError(f"cutoff: {value!r} is not a calendar date (YYYY-MM-DD)") from None
    else:
        raise ConfigError(f"cutoff: {value!r} is not a year (2020) or an ISO date (2020-12-31)")
    end_of_year = day.month == 12 and day.day == 31
    return Cutoff(day, day.year, None if end_of_year else day.year)


def check_map_cutoff(map_year: int, cutoff: Cutoff, where: str | Path) -> None:
    """The map's ``cutoff_year`` tag must be the cutoff's year.

    Raises:
        PlantationError: it is not; the message says how to re-map.
    """
    if map_year != cutoff.year:
        raise PlantationError(
            f"{where}: the map was made with cutoff {map_year} (p_after_cutoff counts conversions from {map_year + 1} on), "
            f"not {cutoff.year} as cutoff {cutoff.date.isoformat()} needs; re-map with cutoff_year={cutoff.year} for this cutoff"
        )


# --------------------------------------------------------------------------- plots


@dataclass
class PlotSet:
    """Features of a plots file, unchecked.

    Attributes:
        path: the file read.
        crs: its CRS.
        ids: each feature's id as text; None where missing.
        geoms: shapely geometries in ``crs`` (2D), None where a feature has none.
    """

    path: Path
    crs: CRS
    ids: list[str | None]
    geoms: list[Any]


@dataclass
class Problem:
    """A plot that could not be measured. ``index`` is the 1-based feature number in the file."""

    index: int
    id: str | None
    problem: str
    detail: str

    def message(self, path: str | Path) -> str:
        ident = f"id {self.id!r}" if self.id is not None else "no id"
        return f"{path}: feature {self.index} ({ident}): {self.problem}: {self.detail}"


def _id_text(value: Any) -> str | None:
    """An id attribute as text; None for null, NaN or blank."""
    if value is None:
        return None
    if isinstance(value, float | np.floating):
        if np.isnan(value):
            return None
        # A GeoPackage Real column holding whole numbers: 12.0 means plot 12.
        return str(int(value)) if float(value).is_integer() else str(value)
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    text = str(value).strip()
    return text or None


def read_plots(path: str | Path, id_field: str = "id") -> PlotSet:
    """Read a GeoPackage or GeoJSON file of plot polygons.

    ``id_field=fid`` takes the file's feature ids (a GeoPackage's fid, a
    GeoJSON's top-level integer ids) when no attribute has that name.

    Raises:
        InputNotFoundError: the file does not exist.
        PlantationError: it is unreadable, has no CRS, or lacks the id field
            (the message lists the fields it has).
    """
    import pyogrio

    path = Path(path)
    if not path.exists():
        raise InputNotFoundError(f"{Path(path).absolute()}: plots file does not exist")
    if path.suffix.lower() not in _VECTOR_SUFFIXES:
        raise PlantationError(f"{path}: unsupported plots format {path.suffix!r}; use .gpkg or .geojson")
    try:
        meta, fids, wkb, fields = pyogrio.raw.read(path, return_fids=True)
    except Exception as exc:  # pyogrio raises several error types for unreadable files
        raise PlantationError(f"{path}: cannot read as a vector file ({str(exc).splitlines()[0]})") from None
    if meta["crs"] is None:
        raise PlantationError(f"{path}: the file has no CRS; assign one when exporting it (GeoJSON is EPSG:4326 by its standard)")
    names = [str(n) for n in meta["fields"]]
    if id_field in names:
        raw_ids = fields[names.index(id_field)]
    elif id_field.lower() == "fid" and fids is not None:
        raw_ids = fids
    else:
        raise PlantationError(f"{path}: no id field {id_field!r}; the file has fields {names}; set id_field=<one of them> (or id_field=fid for the feature ids)")
    geoms = []
    for g in wkb:
        geoms.append(None if g is None else shapely.force_2d(shapely.from_wkb(g)))
    return PlotSet(path=path, crs=CRS.from_user_input(meta["crs"]), ids=[_id_text(v) for v in raw_ids], geoms=geoms)


def check_plots(plots: PlotSet) -> tuple[list[int], list[Problem]]:
    """Split features into measurable ones (0-based positions) and problems (the first of :data:`PROBLEMS` but ``outside_map`` that applies)."""
    good: list[int] = []
    problems: list[Problem] = []
    seen: dict[str, int] = {}
    for i, (pid, g) in enumerate(zip(plots.ids, plots.geoms, strict=True)):
        n = i + 1
        if pid is None:
            problems.append(Problem(n, None, "missing_id", "the id attribute is empty"))
            continue
        if pid in seen:
            problems.append(Problem(n, pid, "duplicate_id", f"id already used by feature {seen[pid]}"))
            continue
        seen[pid] = n
        if g is None or g.is_empty:
            problems.append(Problem(n, pid, "empty_geometry", "the feature has no geometry"))
            continue
        if shapely.get_type_id(g) not in (shapely.GeometryType.POLYGON, shapely.GeometryType.MULTIPOLYGON):
            problems.append(Problem(n, pid, "not_a_polygon", f"geometry is a {g.geom_type}, expected a Polygon or MultiPolygon"))
            continue
        if not g.is_valid:
            problems.append(Problem(n, pid, "invalid_geometry", f"{shapely.is_valid_reason(g)}; repair it (e.g. QGIS Fix Geometries) and run again"))
            continue
        good.append(i)
    return good, problems


def geodesic_area_ha(geom_wgs84: Any) -> float:
    """Area in ha of a (Multi)Polygon in EPSG:4326 (x = longitude) on the WGS 84 ellipsoid (pyproj ``Geod``).

    Rings are oriented first (exterior counter-clockwise, holes clockwise),
    since ``Geod.geometry_area_perimeter`` signs each ring's area by its
    orientation.
    """
    area, _ = _GEOD.geometry_area_perimeter(shapely.orient_polygons(geom_wgs84))
    return abs(float(area)) / 1e4


def _transformer(src: CRS, dst: CRS) -> Transformer | None:
    return None if src == dst else Transformer.from_crs(src, dst, always_xy=True)


def reproject(geom: Any, tr: Transformer | None) -> Any:
    """A shapely geometry through a pyproj transformer (x, y order); unchanged when ``tr`` is None."""
    if tr is None:
        return geom
    return shapely.transform(geom, tr.transform, interleaved=False)


# --------------------------------------------------------------------------- the map


@dataclass
class Pixels:
    """Map pixels under a plot, one entry per (tile, pixel).

    Attributes:
        covered_m2: covered area: fraction of the pixel inside the plot × pixel area (m²).
        cls: class code; :data:`plantation.mapping.folder.NODATA` where the pixel has no data.
        onset: onset year (0 where no conversion is mapped).
        p_after: p_after_cutoff (scaled to a probability); NaN where no data.
        clear: clear dates.
        fire, fire_year: the fire layers (codes of :data:`plantation.mapping.folder.FIRE`); :data:`NO_FIRE_LAYERS` where the tile has none.
    """

    covered_m2: np.ndarray
    cls: np.ndarray
    onset: np.ndarray
    p_after: np.ndarray
    clear: np.ndarray
    fire: np.ndarray | None = None
    fire_year: np.ndarray | None = None

    def __post_init__(self) -> None:
        if self.fire is None:
            self.fire = np.full(self.cls.shape, NO_FIRE_LAYERS, np.int32)
        if self.fire_year is None:
            self.fire_year = np.zeros(self.cls.shape, np.int32)

    @staticmethod
    def empty() -> Pixels:
        z = np.zeros(0)
        return Pixels(z, z.astype(np.int32), z.astype(np.int32), z, z)

    @staticmethod
    def concat(parts: Sequence[Pixels]) -> Pixels:
        if not parts:
            return Pixels.empty()
        return Pixels(*(np.concatenate([getattr(p, k) for p in parts]) for k in ("covered_m2", "cls", "onset", "p_after", "clear", "fire", "fire_year")))


class TileReader:
    """Coverage fractions (exactextract) and band values (rasterio windowed reads) of one map tile."""

    def __init__(self, tile: MapTile) -> None:
        from exactextract.raster import NumPyRasterSource

        self.tile = tile
        g = tile.grid
        west, south, east, north = g.bounds
        # A broadcast array takes no memory: exactextract only needs the grid
        # here, and a source without nodata reports every cell the polygon
        # touches (values, with their nodata, are read below).
        grid_only = np.broadcast_to(np.zeros((1, 1), np.uint8), (g.height, g.width))
        self._source = NumPyRasterSource(grid_only, west, south, east, north)
        self._areas = g.row_areas_m2()
        self._bands = [BAND["class"], BAND["onset_year"], BAND["p_after_cutoff"], BAND["clear_dates"]] + ([BAND["fire"], BAND["fire_year"]] if tile.has_fire else [])
        self.footprint = shapely.box(west, south, east, north)
        self._ds = rasterio.open(tile.path)

    def close(self) -> None:
        self._ds.close()

    def pixels(self, geom: Any) -> Pixels:
        """Pixels of this tile under ``geom`` (a (Multi)Polygon in the tile's CRS)."""
        from exactextract import exact_extract

        if not geom.intersects(self.footprint):
            return Pixels.empty()
        feature = {"type": "Feature", "properties": {}, "geometry": shapely.geometry.mapping(geom)}
        res = exact_extract(self._source, [feature], ["cell_id", "coverage"], output="geojson")
        props = res[0]["properties"] if res else {}
        cells = np.asarray(props.get("cell_id", []), np.int64)
        frac = np.asarray(props.get("coverage", []), np.float64)
        keep = frac > 0
        cells, frac = cells[keep], frac[keep]
        if cells.size == 0:
            return Pixels.empty()
        w = self.tile.grid.width
        rows, cols = cells // w, cells % w
        r0, c0 = int(rows.min()), int(cols.min())
        win = rasterio.windows.Window(c0, r0, int(cols.max()) - c0 + 1, int(rows.max()) - r0 + 1)
        block = self._ds.read(self._bands, window=win)
        vals = block[:, rows - r0, cols - c0]
        cls = vals[0].astype(np.int32)
        data = cls != NODATA
        p = np.where(data, vals[2].astype(np.float64) * self.tile.scale + self.tile.offset, np.nan)
        fire = (vals[4].astype(np.int32), vals[5].astype(np.int32)) if self.tile.has_fire else (None, None)
        return Pixels(frac * self._areas[rows], cls, vals[1].astype(np.int32), p, vals[3].astype(np.float64), *fire)


# --------------------------------------------------------------------------- per-plot numbers


@dataclass
class PlotRow:
    """One plot's line in the outputs (areas in ha). Problem rows have ``status`` = the problem and None numbers.

    ``feature`` is the 1-based feature number in the plots file; ``geometry``
    the polygon in EPSG:4326 and ``plot_geometry`` the same in the plots
    file's CRS (None where the feature had none).
    """

    feature: int
    id: str | None
    status: str
    area_ha: float | None = None
    mapped_ha: float | None = None
    mapped_share: float | None = None
    expected_after_ha: float | None = None
    after_lo_ha: float | None = None
    after_hi_ha: float | None = None
    share_after: float | None = None
    converted_ha: float | None = None
    years: dict[int, float] = field(default_factory=dict)
    straddle_ha: float | None = None
    mean_clear: float | None = None
    fire_ha: float | None = None
    fire_share: float | None = None
    fire_unknown_ha: float | None = None
    fire_after_ha: float | None = None
    escaped_fire_ha: float | None = None
    verdict: str | None = None
    reasons: list[str] = field(default_factory=list)
    geometry: Any = None
    plot_geometry: Any = None


def comonotone_range_ha(covered_m2: np.ndarray, p: np.ndarray, level: float) -> tuple[float, float]:
    """(lo, hi) converted area in ha if all pixels convert together: the covered area with p > 1 − (1 − level)/2, and with p ≥ (1 − level)/2.

    NaN probabilities (no data) count in neither.
    """
    tail = (1.0 - level) / 2.0
    pr = np.round(p, _DECIMALS)
    lo_cut, hi_cut = round(1.0 - tail, _DECIMALS), round(tail, _DECIMALS)
    ok = ~np.isnan(pr)
    lo = float(covered_m2[ok & (pr > lo_cut)].sum()) / 1e4
    hi = float(covered_m2[ok & (pr >= hi_cut)].sum()) / 1e4
    return lo, hi


def measure(px: Pixels, area_ha: float, cutoff: Cutoff, level: float) -> dict[str, Any]:
    """The numbers of one plot from its pixels (see the module docstring); areas in ha."""
    data = px.cls != NODATA
    cov = px.covered_m2
    mapped_ha = float(cov[data].sum()) / 1e4
    expected = float((cov[data] * px.p_after[data]).sum()) / 1e4
    lo, hi = comonotone_range_ha(cov, px.p_after, level)
    conv = data & (px.cls == LABEL_CODES["conversion"])
    years: dict[int, float] = {}
    for y in np.unique(px.onset[conv]):
        years[int(y)] = float(cov[conv & (px.onset == y)].sum()) / 1e4
    straddle = years.get(cutoff.straddle_year, 0.0) if cutoff.straddle_year is not None else 0.0
    total = float(cov.sum())
    converted_ha = float(cov[conv].sum()) / 1e4
    # Fire layers count only where the plot's pixels all have them (a tile of an older map has none).
    has_fire = bool(cov.size) and not (px.fire == NO_FIRE_LAYERS).any()

    def fire_area(m: np.ndarray) -> float | None:
        return float(cov[data & m].sum()) / 1e4 if has_fire else None

    fire_ha = fire_area(px.fire == FIRE["converted_burnt"])
    return {
        "area_ha": area_ha,
        "mapped_ha": mapped_ha,
        "mapped_share": mapped_ha / area_ha if area_ha > 0 else None,
        "expected_after_ha": expected,
        "after_lo_ha": lo,
        "after_hi_ha": hi,
        "share_after": expected / mapped_ha if mapped_ha > 0 else None,
        "converted_ha": converted_ha,
        "years": years,
        "straddle_ha": straddle,
        "mean_clear": float((px.clear * cov).sum()) / total if total > 0 else None,
        "fire_ha": fire_ha,
        "fire_share": fire_ha / converted_ha if fire_ha is not None and converted_ha > 0 else None,
        "fire_unknown_ha": fire_area(px.fire == FIRE["converted_unknown"]),
        "fire_after_ha": fire_area((px.fire == FIRE["converted_burnt"]) & (px.fire_year > cutoff.year)),
        "escaped_fire_ha": fire_area(px.fire == FIRE["escaped_fire"]),
    }


def verdict(m: dict[str, Any], rules: VerdictConfig, cutoff: Cutoff) -> tuple[str, list[str]]:
    """Verdict and the rules that fired, in words, for one plot's numbers (from :func:`measure`)."""
    after = cutoff.describe()
    strong: list[str] = []
    review: list[str] = []
    if m["after_lo_ha"] >= rules.strong_min_ha:
        strong.append(f"at least {m['after_lo_ha']:.2f} ha converted {after} even at the low end of the range (≥ {rules.strong_min_ha:g} ha)")
    if m["expected_after_ha"] >= rules.review_min_ha:
        review.append(f"{m['expected_after_ha']:.2f} ha expected converted {after} (≥ {rules.review_min_ha:g} ha)")
    if m["share_after"] is not None and m["share_after"] >= rules.review_min_share:
        review.append(f"{m['share_after']:.1%} of the mapped area expected converted {after} (≥ {rules.review_min_share:.1%})")
    if not strong and m["after_hi_ha"] >= rules.strong_min_ha:
        review.append(f"up to {m['after_hi_ha']:.2f} ha converted {after} at the high end of the range (≥ {rules.strong_min_ha:g} ha)")
    if m["straddle_ha"] >= rules.review_min_ha:
        review.append(f"{m['straddle_ha']:.2f} ha mapped as converted in {cutoff.straddle_year}, which may fall on either side of {cutoff.date.isoformat()} (≥ {rules.review_min_ha:g} ha)")
    if m["mean_clear"] is not None and m["mean_clear"] < rules.min_mean_clear:
        review.append(f"only {m['mean_clear']:.1f} clear dates per pixel on average (< {rules.min_mean_clear:g}): little evidence either way")
    if m["mapped_share"] is not None and m["mapped_share"] < rules.min_mapped_share:
        review.append(f"only {m['mapped_share']:.0%} of the plot has mapped pixels (< {rules.min_mapped_share:.0%})")
    if strong:
        return "strong_evidence", strong + review
    if review:
        return "review", review
    return "low_evidence", [f"no rule fired: {m['expected_after_ha']:.2f} ha expected converted {after}, at most {m['after_hi_ha']:.2f} ha at the high end of the range"]


# --------------------------------------------------------------------------- the job


@dataclass
class PlotsResult:
    """What :func:`run` wrote and found."""

    out_dir: Path
    files: dict[str, Path]
    rows: list[PlotRow]
    problems: list[Problem]
    counts: dict[str, int]
    cutoff: Cutoff
    plots_file: str
    #: Which probability correction the map carries (:meth:`plantation.mapping.folder.MappedRegion.correction_text`).
    correction: str = NO_CORRECTION
    #: The evidence pages written (None: not asked for).
    evidence: EvidenceResult | None = None

    def lines(self) -> list[str]:
        """A short account for the terminal: verdict counts, problems, and which probability correction the map carries."""
        out = [f"plots: {len(self.rows)} in {self.plots_file}; cutoff: converted {self.cutoff.describe()}", f"map probabilities: {self.correction}", "verdict            plots"]
        for k in (*VERDICTS, "problem"):
            out.append(f"  {k:<16} {self.counts.get(k, 0):5d}")
        if self.problems:
            out.append(f"{len(self.problems)} plot(s) not measured (rows kept with status = the problem):")
            out.extend(f"  {p.message(self.plots_file)}" for p in self.problems)
        if self.evidence is not None:
            out.extend(self.evidence.lines())
        return out


def _round(x: float | None, nd: int = 4) -> float | None:
    return None if x is None or (isinstance(x, float) and np.isnan(x)) else round(float(x), nd)


def _record(r: PlotRow) -> dict[str, Any]:
    """The row as plots.json holds it (areas and shares to 4 decimals, mean_clear to 2)."""
    return {
        "id": r.id if r.id is not None else "",
        "status": r.status,
        "area_ha": _round(r.area_ha),
        "mapped_ha": _round(r.mapped_ha),
        "mapped_share": _round(r.mapped_share),
        "expected_after_ha": _round(r.expected_after_ha),
        "after_lo_ha": _round(r.after_lo_ha),
        "after_hi_ha": _round(r.after_hi_ha),
        "share_after": _round(r.share_after),
        "years": {str(y): _round(a) for y, a in sorted(r.years.items())},
        "straddle_ha": _round(r.straddle_ha),
        "mean_clear": _round(r.mean_clear, 2),
        "fire_ha": _round(r.fire_ha),
        "fire_share": _round(r.fire_share),
        "fire_unknown_ha": _round(r.fire_unknown_ha),
        "fire_after_ha": _round(r.fire_after_ha),
        "escaped_fire_ha": _round(r.escaped_fire_ha),
        "verdict": r.verdict,
        "reasons": list(r.reasons),
    }


#: Verdicts by the attention they call for, most first: the strongest evidence of conversion after the cutoff, then review, then the rest.
_ATTENTION: dict[str, int] = {v: k for k, v in enumerate(reversed(VERDICTS))}


def _attention_key(r: PlotRow) -> tuple[int, bool, float, bool, str]:
    e = _round(r.expected_after_ha)
    return (_ATTENTION.get(r.verdict or "", len(_ATTENTION)), e is None, -(e or 0.0), r.id is None, r.id or "")


def sort_rows(rows: Sequence[PlotRow]) -> list[PlotRow]:
    """The rows in the tables' order: most attention first.

    By verdict (``strong_evidence``, ``review``, ``low_evidence``, then plots
    not measured), then ``expected_after_ha`` as the tables show it (4
    decimals) descending, then plot id (as text; a missing id last).
    """
    return sorted(rows, key=_attention_key)


def _table(rows: Sequence[PlotRow], years: Sequence[int]) -> pd.DataFrame:
    """Flat columns of :func:`table_columns` in the rows' order: ``converted_ha_<year>`` for each of ``years`` (0 where none; blank on rows not measured), reasons joined by "; "."""
    cols = table_columns(years)
    recs = []
    for r in rows:
        d = _record(r)
        d["id"] = r.id
        d["feature"] = r.feature
        d["converted_ha"] = _round(r.converted_ha)
        measured = r.status == "ok"
        for y in years:
            d[year_column(y)] = _round(r.years.get(int(y), 0.0)) if measured else None
        d["reasons"] = "; ".join(r.reasons)
        recs.append({k: d[k] for k in cols})
    return pd.DataFrame.from_records(recs, columns=cols)


def _is_polygonal(g: Any) -> bool:
    return g is not None and shapely.get_type_id(g) in (shapely.GeometryType.POLYGON, shapely.GeometryType.MULTIPOLYGON)


def _field_data(table: pd.DataFrame) -> list[np.ndarray]:
    """The table's columns as pyogrio field arrays: ``feature`` as integers, text columns as objects (None for blank), the rest as floats (NaN, written as null, for blank)."""
    out = []
    for c in table.columns:
        col = table[c]
        if c == "feature":
            out.append(col.to_numpy(np.int64))
        elif c in ("id", "status", "verdict", "reasons"):
            out.append(np.array([None if v is None or (isinstance(v, float) and np.isnan(v)) else str(v) for v in col], dtype=object))
        else:
            out.append(col.to_numpy(np.float64, na_value=np.nan))
    return out


def _write_layer(dest: Path, geoms: Sequence[Any], table: pd.DataFrame, *, driver: str, crs: str, geometry_type: str, layer_options: dict[str, str] | None = None) -> None:
    """One vector file of ``table``'s rows with ``geoms`` (None: a null geometry), through pyogrio."""
    import pyogrio

    wkb = np.array([None if g is None else shapely.to_wkb(g) for g in geoms], dtype=object)
    # pyogrio logs "Created N records" at INFO, which a script's log handler would print.
    io_log = logging.getLogger("pyogrio._io")
    level = io_log.level
    io_log.setLevel(max(level, logging.WARNING))
    try:
        pyogrio.raw.write(
            dest,
            wkb,
            _field_data(table),
            list(table.columns),
            layer=GPKG_LAYER,
            driver=driver,
            geometry_type=geometry_type,
            promote_to_multi=geometry_type == "MultiPolygon",
            crs=crs,
            layer_options=layer_options,
        )
    finally:
        io_log.setLevel(level)


def _write_geojson(rows: Sequence[PlotRow], table: pd.DataFrame, dest: Path) -> None:
    """GeoJSON per RFC 7946 (EPSG:4326, x = longitude) with every column; rows without geometry get a null one."""
    geoms = [r.geometry for r in rows]
    polygonal = all(g is None or _is_polygonal(g) for g in geoms)
    _write_layer(dest, geoms, table, driver="GeoJSON", crs="EPSG:4326", geometry_type="MultiPolygon" if polygonal else "Unknown", layer_options={"RFC7946": "YES", "COORDINATE_PRECISION": "7"})


def _crs_text(crs: CRS) -> str:
    """``EPSG:<code>`` where the CRS is exactly one, else its WKT."""
    auth = crs.to_authority(min_confidence=100)
    return f"{auth[0]}:{auth[1]}" if auth is not None else crs.to_wkt()


def _write_gpkg(rows: Sequence[PlotRow], table: pd.DataFrame, dest: Path, crs: CRS | None) -> None:
    """GeoPackage layer :data:`GPKG_LAYER` of MultiPolygons in ``crs`` (the plots' own geometries) with every column.

    Rows without a polygon (no geometry, or a not_a_polygon problem) get a
    null geometry, so the layer holds polygons only. ``crs`` None: the rows'
    EPSG:4326 geometries.
    """
    geoms = [r.plot_geometry if crs is not None else r.geometry for r in rows]
    geoms = [g if _is_polygonal(g) else None for g in geoms]
    _write_layer(dest, geoms, table, driver="GPKG", crs=_crs_text(crs) if crs is not None else "EPSG:4326", geometry_type="MultiPolygon")


def write_outputs(result_rows: Sequence[PlotRow], doc: dict[str, Any], out_dir: Path, *, years: Sequence[int] | None = None, crs: CRS | None = None) -> dict[str, Path]:
    """Write plots.csv, plots.geojson, plots.gpkg and plots.json into ``out_dir``, each under a ``.partial`` name first (``plots.partial.gpkg``), replaced into place once all are written.

    Args:
        result_rows: the plots, in any order (the tables take :func:`sort_rows` order).
        doc: plots.json's content, written as given.
        out_dir: the folder.
        years: the map's onset years, one ``converted_ha_<year>`` column each
            (with any other year a row has); None: the years the rows have.
        crs: the plots file's CRS, of the rows' ``plot_geometry`` (plots.gpkg);
            None: plots.gpkg takes the EPSG:4326 geometries.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    names = {"csv": out_dir / "plots.csv", "geojson": out_dir / "plots.geojson", "gpkg": out_dir / "plots.gpkg", "json": out_dir / PLOTS_JSON}
    # plots.partial.gpkg: GDAL warns about a GeoPackage not named *.gpkg.
    tmps = {k: p.with_name(f"{p.stem}.partial{p.suffix}" if k == "gpkg" else p.name + ".partial") for k, p in names.items()}
    found = {int(y) for r in result_rows for y in r.years}
    all_years = sorted(found | {int(y) for y in (years or ())})
    ordered = sort_rows(result_rows)
    table = _table(ordered, all_years)
    try:
        table.to_csv(tmps["csv"], index=False, lineterminator="\n")
        for k in ("geojson", "gpkg"):
            tmps[k].unlink(missing_ok=True)  # GDAL will not overwrite a leftover
        _write_geojson(ordered, table, tmps["geojson"])
        _write_gpkg(ordered, table, tmps["gpkg"], crs)
        tmps["json"].write_text(json.dumps(doc, indent=1, ensure_ascii=False) + "\n")
        for k, p in names.items():
            os.replace(tmps[k], p)
    finally:
        for t in tmps.values():
            t.unlink(missing_ok=True)
    return names


def read_plots_json(path: str | Path) -> dict[str, Any]:
    """``plots.json`` as :func:`run` wrote it.

    Args:
        path: the file, or the folder holding it (``out_dir`` of the plot check).

    Raises:
        InputNotFoundError: there is no such file.
        FileFormatError: it is not valid JSON, not a plot check (its ``kind``), or
            a section has the wrong shape; one line naming the file.
    """
    p = locate(path, PLOTS_JSON, missing="run `plantation farmplots` to write it")
    again = "write it again with `plantation farmplots`"
    doc = load_object(p, what="a plot check", again=again)
    if doc.get("kind") != KIND:
        raise FileFormatError(f"{p}: kind {doc.get('kind')!r}, expected {KIND!r}; is this the right file?")
    check_shapes(p, doc, objects=("cutoff", "thresholds", "counts"), records=("plots", "problems"), again=again)
    return doc


def _earlier_cover(readers: Sequence[TileReader], k: int) -> Any:
    """Union of the footprints of tiles before ``k`` that overlap tile ``k`` (in its CRS), or None: pixels there were counted already."""
    here = readers[k]
    dst = CRS.from_user_input(here.tile.grid.crs.to_wkt())
    parts = []
    for prev in readers[:k]:
        src = CRS.from_user_input(prev.tile.grid.crs.to_wkt())
        # Densified, so a footprint stays exact through a curved reprojection.
        fp = reproject(shapely.segmentize(prev.footprint, max(prev.footprint.length / 400, 1e-9)), _transformer(src, dst))
        inter = fp.intersection(here.footprint)
        if inter.area > 1e-9 * here.footprint.area:
            parts.append(fp)
    return shapely.union_all(parts) if parts else None


def run(cfg: PlotsConfig) -> PlotsResult:
    """Measure every plot on the map and write plots.csv, plots.geojson, plots.gpkg and plots.json into ``cfg.out_dir``.

    Raises:
        PlantationError: the config, the plots file or the map is unusable,
            or the map's cutoff year is not the cutoff's; nothing is written.
    """
    from tqdm import tqdm

    check_config(cfg)
    mapped = open_map(cfg.map)
    tiles = mapped.tiles
    cutoff = parse_cutoff(cfg.cutoff) if cfg.cutoff is not None else parse_cutoff(mapped.cutoff_year)
    check_map_cutoff(mapped.cutoff_year, cutoff, tiles[0].path)
    plots = read_plots(cfg.plots, cfg.id_field)
    good, problems = check_plots(plots)
    if cfg.evidence.enabled:
        open_imagery(mapped, cfg.region)  # fail before measuring when the pages could not be drawn
    to_wgs84 = _transformer(plots.crs, _WGS84)

    readers = [TileReader(t) for t in tiles]
    rows: dict[int, PlotRow] = {}
    try:
        covers = [_earlier_cover(readers, k) for k in range(len(readers))]
        to_tile: dict[str, Transformer | None] = {}
        for rd in readers:
            wkt = rd.tile.grid.crs.to_wkt()
            if wkt not in to_tile:
                to_tile[wkt] = _transformer(plots.crs, CRS.from_user_input(wkt))
        for i in tqdm(good, unit="plot", desc="plots", disable=not cfg.progress, dynamic_ncols=True):
            g = plots.geoms[i]
            g84 = reproject(g, to_wgs84)
            parts = []
            in_crs: dict[str, Any] = {}
            for rd, cover in zip(readers, covers, strict=True):
                wkt = rd.tile.grid.crs.to_wkt()
                if wkt not in in_crs:
                    in_crs[wkt] = reproject(g, to_tile[wkt])
                gt = in_crs[wkt] if cover is None else in_crs[wkt].difference(cover)
                if not gt.is_empty:
                    parts.append(rd.pixels(gt))
            px = Pixels.concat(parts)
            if px.covered_m2.sum() <= 0:
                problems.append(Problem(i + 1, plots.ids[i], "outside_map", f"no pixel of the map's {len(tiles)} tile(s) lies under it"))
                continue
            m = measure(px, geodesic_area_ha(g84), cutoff, cfg.interval_level)
            v, reasons = verdict(m, cfg.verdict, cutoff)
            rows[i] = PlotRow(feature=i + 1, id=plots.ids[i], status="ok", verdict=v, reasons=reasons, geometry=g84, plot_geometry=g, **m)
    finally:
        for rd in readers:
            rd.close()

    problems.sort(key=lambda p: p.index)
    for p in problems:
        g = plots.geoms[p.index - 1]
        g = None if g is None or g.is_empty else g
        rows[p.index - 1] = PlotRow(feature=p.index, id=p.id, status=p.problem, reasons=[p.detail], geometry=None if g is None else reproject(g, to_wgs84), plot_geometry=g)
    ordered = [rows[i] for i in sorted(rows)]
    counts = {k: sum(r.verdict == k for r in ordered) for k in VERDICTS} | {"problem": len(problems)}
    doc = {
        "kind": KIND,
        "plots_file": str(cfg.plots),
        "plots_sha256": file_digest([Path(cfg.plots)]),
        "map_dir": str(cfg.map),
        "map_manifest_sha256": mapped.manifest_sha256,
        "cutoff": {"date": cutoff.date.isoformat(), "year": cutoff.year, "straddle_year": cutoff.straddle_year},
        "interval_level": float(cfg.interval_level),
        "thresholds": asdict(cfg.verdict),
        "plots": [_record(r) for r in ordered],
        "problems": [{"index": p.index, "id": p.id, "problem": p.problem, "detail": p.detail} for p in problems],
        "counts": counts,
        "notice": NOTICE,
    }
    if mapped.correction is not None:
        # Which correction the map's probabilities carry; absent: none, the probabilities as the model gave them.
        doc["probability_correction"] = mapped.correction
        doc["probability_correction_text"] = mapped.correction_text()
    out = Path(cfg.out_dir)
    files = write_outputs(ordered, doc, out, years=mapped.years, crs=plots.crs)
    evidence = None
    if cfg.evidence.enabled:
        chosen, skipped = select(sort_rows(ordered), cfg.evidence)
        pages = [PagePlot(str(r.id), r.plot_geometry, _record(r)) for r in chosen]
        evidence = write_pages(pages, plots.crs, mapped, cfg.region, cutoff.date, out, cfg.evidence, plot_level=cfg.interval_level, plots_json=files["json"], skipped=skipped, progress=cfg.progress)
    return PlotsResult(out_dir=out, files=files, rows=ordered, problems=problems, counts=counts, cutoff=cutoff, plots_file=str(cfg.plots), correction=mapped.correction_text(), evidence=evidence)
