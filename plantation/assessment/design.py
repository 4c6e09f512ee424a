"""A stratified random validation sample drawn from a mapped region, for interpreters to label.

Strata are built from the map (the COGs written by :mod:`plantation.mapping.tiles`):

* ``conversion_<first>_<last>``: mapped conversion, in groups of onset years
  that never straddle the cutoff (so the after-cutoff area has strata of its own);
* ``forest_buffer``: mapped stable forest within ``buffer_px`` pixels of mapped
  conversion — where omitted conversion hides (edges of clearings, the part of
  an estate cleared a year later), so it gets its own stratum rather than
  being lost in the large stable-forest stratum;
* ``stable_forest``, ``old_plantation``, ``other``: the remaining map classes;
* ``no_data``: pixels with too few clear dates to map; they are part of the
  region, so they are sampled too and area estimates cover the whole region.

The total sample size comes from the target standard error of overall accuracy
(Cochran's formula as in Olofsson et al. 2014, eq. 13, with assumed user's
accuracies per stratum kind), a floor per stratum protects rare strata, and
the rest is allocated by area (:func:`plantation.assessment.estimators.allocate`).
Pixels are drawn without replacement within each stratum, in two passes over
the map (count, then pick), so memory follows the strip, not the tile.

The interpreters' sheet is blind (response design, Olofsson et al. 2014,
section 4): ``samples.csv`` and ``samples.gpkg`` hold where each point is and
blank reference columns (:data:`SHEET_COLUMNS`), nothing of the map's answer;
even a stratum name such as ``conversion_2017_2020`` or ``forest_buffer``
gives it away. The bookkeeping of each point — stratum, map class, mapped
onset year, inclusion probability (:data:`BOOKKEEPING`) — is kept in
``design.json`` under ``points``, beside the strata. This module is the one
that writes and reads ``design.json`` (:func:`read_design`).
"""

from __future__ import annotations

import json
import os
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field, fields
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import rasterio
import rasterio.windows
from pyproj import Transformer
from scipy.ndimage import maximum_filter

from plantation.assessment.estimators import allocate, cochran_sample_size, expected_overall_se
from plantation.errors import ConfigError, FileFormatError, InputNotFoundError, PlantationError
from plantation.imagery.config import RegionConfig
from plantation.imagery.region import Grid
from plantation.mapping.folder import MappedRegion, MapTile, open_map, sha256_of
from plantation.records import load_object, locate
from plantation.reference.labels import LABEL_CODES, LABEL_NAMES

#: Version 2 keeps each point's bookkeeping (``points``) here instead of on the sheet.
FORMAT = "plantation-sample-design/2"
#: The design's file name, beside the sheet.
DESIGN_NAME = "design.json"
MAP_NODATA = -32768
#: Classes a point's map_class can take: the label classes and pixels without data.
MAP_CLASSES = (*LABEL_NAMES, "no_data")
#: Blank columns the interpreters fill in, in this order.
REFERENCE_COLUMNS = ("label", "onset_year", "confidence", "interpreter", "note")
#: The interpreters' sheet (samples.csv, samples.gpkg): where each point is, and the blank reference columns. Nothing of the map's answer.
SHEET_COLUMNS = ("point_id", "tile", "row", "col", "x", "y", "crs", "lon", "lat", "pixel_ha", *REFERENCE_COLUMNS)
#: What only the design keeps per point: these give the map's answer away, so they stay off the sheet.
BOOKKEEPING = ("stratum", "map_class", "map_onset_year", "inclusion_probability")
#: Fields of each entry of design.json's ``points``: the point's id and pixel (to check a sheet belongs to the design) and its bookkeeping.
POINT_FIELDS = ("point_id", "tile", "row", "col", *BOOKKEEPING)
#: Interpreter entry of points whose reference was filled from simulated truth.
SIMULATED = "simulated truth (demo only)"


@dataclass
class AssumedAccuracy:
    """User's accuracies assumed for planning, per stratum kind (Olofsson et al. 2014, section 5.1.2).

    Lower values ask for more points; change strata are usually assumed lower
    than stable ones.
    """

    conversion: float = 0.7
    forest_buffer: float = 0.8
    stable_forest: float = 0.95
    old_plantation: float = 0.85
    other: float = 0.85
    no_data: float = 0.5


@dataclass
class DesignConfig:
    """What ``plantation sample`` needs (see ``configs/sample.yaml``)."""

    region: RegionConfig = field(default_factory=RegionConfig)
    #: A mapped region folder (holding manifest.json and one COG per tile).
    map: str = "outputs/maps/selvara_toy"
    out_dir: str = "outputs/assess/selvara_toy"
    #: Target standard error of overall accuracy for the total sample size.
    target_se: float = 0.01
    assumed_users_accuracy: AssumedAccuracy = field(default_factory=AssumedAccuracy)
    #: Fewest points in any stratum that has pixels.
    min_per_stratum: int = 50
    #: Fix the total instead of deriving it (null: Cochran's formula).
    total: int | None = None
    #: Onset years per conversion stratum; groups end at the cutoff year.
    group_years: int = 4
    #: Explicit groups [[first, last], ...] (null: built from group_years).
    year_groups: list[list[int]] | None = None
    #: Mapped stable forest within this many pixels of mapped conversion is the buffer stratum (0: none).
    buffer_px: int = 2
    seed: int = 0
    #: Rows per strip read at a time.
    strip: int = 1024
    #: Show the allocation and stop without writing.
    dry_run: bool = False
    #: Demo only: fill the reference columns from the region's truth rasters (simulated regions).
    fill_from_truth: bool = False


@dataclass
class Stratum:
    name: str
    kind: str
    pixels: int = 0
    area_ha: float = 0.0
    weight: float = 0.0
    assumed_users_accuracy: float = 0.0
    n: int = 0


def year_groups(years: list[int], cutoff_year: int, size: int) -> list[tuple[int, int]]:
    """Consecutive groups of at most ``size`` onset years, with a boundary at the cutoff.

    Counted outwards from the cutoff, so the groups right before and after it
    are full: years 2013–2024, cutoff 2020, size 4 → 2013–2016, 2017–2020, 2021–2024.
    """
    if size < 1:
        raise ConfigError(f"group_years: {size!r} must be at least 1")
    before = [y for y in years if y <= cutoff_year]
    after = [y for y in years if y > cutoff_year]
    groups = []
    for k in range(len(before), 0, -size):
        chunk = before[max(0, k - size) : k]
        groups.append((chunk[0], chunk[-1]))
    groups.reverse()
    for k in range(0, len(after), size):
        chunk = after[k : k + size]
        groups.append((chunk[0], chunk[-1]))
    return groups


def stratum_list(groups: list[tuple[int, int]], buffer_px: int) -> list[tuple[str, str]]:
    """(name, kind) of every stratum, in code order (code = index + 1; 0 is unused)."""
    out = [(f"conversion_{a}_{b}" if a != b else f"conversion_{a}", "conversion") for a, b in groups]
    out.append(("stable_forest", "stable_forest"))
    if buffer_px > 0:
        out.append(("forest_buffer", "forest_buffer"))
    out += [("old_plantation", "old_plantation"), ("other", "other"), ("no_data", "no_data")]
    return out


def stratify(cls: np.ndarray, onset: np.ndarray, groups: list[tuple[int, int]], buffer_px: int, core: tuple[slice, slice] | None = None) -> np.ndarray:
    """Stratum codes (uint8, 1-based in :func:`stratum_list` order) of a block of the map.

    ``cls`` and ``onset`` are the class and onset_year bands; when ``core``
    is given they carry a halo of ``buffer_px`` rows/columns and only the
    core is returned (the halo lets the buffer see conversions next door).
    """
    names = stratum_list(groups, buffer_px)
    code = {n: i + 1 for i, (n, _) in enumerate(names)}
    out = np.zeros(cls.shape, np.uint8)
    conv = cls == LABEL_CODES["conversion"]
    for i, (a, b) in enumerate(groups):
        out[conv & (onset >= a) & (onset <= b)] = i + 1
    forest = cls == LABEL_CODES["stable_forest"]
    out[forest] = code["stable_forest"]
    if buffer_px > 0:
        near = maximum_filter(conv.astype(np.uint8), size=2 * buffer_px + 1, mode="constant", cval=0).astype(bool)
        out[forest & near] = code["forest_buffer"]
    out[cls == LABEL_CODES["old_plantation"]] = code["old_plantation"]
    out[cls == LABEL_CODES["other"]] = code["other"]
    out[cls == MAP_NODATA] = code["no_data"]
    if conv.any() and (out[conv] == 0).any():
        bad = int(onset[conv & (out == 0)][0])
        raise PlantationError(f"mapped conversion with onset year {bad} is in no year group {groups}")
    return out[core] if core is not None else out


def _strips(tile: MapTile, groups: list[tuple[int, int]], buffer_px: int, strip: int) -> Iterator[tuple[int, np.ndarray, np.ndarray, np.ndarray]]:
    """(first row, strata, class, onset) of each strip of rows of a tile."""
    h, w = tile.grid.height, tile.grid.width
    with rasterio.open(tile.path) as src:
        for r0 in range(0, h, strip):
            r1 = min(h, r0 + strip)
            a, b = max(0, r0 - buffer_px), min(h, r1 + buffer_px)
            win = rasterio.windows.Window(0, a, w, b - a)
            cls = src.read(1, window=win)
            onset = src.read(2, window=win)
            core = (slice(r0 - a, r0 - a + (r1 - r0)), slice(None))
            yield r0, stratify(cls, onset, groups, buffer_px, core), cls[core], onset[core]


def _row_ha(grid: Grid) -> np.ndarray:
    return grid.row_areas_m2() / 1e4


def check_config(cfg: DesignConfig) -> None:
    if not 0 < cfg.target_se < 0.5:
        raise ConfigError(f"target_se: {cfg.target_se!r} must be in (0, 0.5)")
    for k, v in asdict(cfg.assumed_users_accuracy).items():
        if not 0 <= v <= 1:
            raise ConfigError(f"assumed_users_accuracy.{k}: {v!r} must be in [0, 1]")
    if cfg.min_per_stratum < 2:
        raise ConfigError(f"min_per_stratum: {cfg.min_per_stratum!r} must be at least 2 (a stratum's variance needs two points)")
    if cfg.total is not None and cfg.total < 2:
        raise ConfigError(f"total: {cfg.total!r} must be at least 2 or null")
    if cfg.buffer_px < 0 or cfg.strip < 1:
        raise ConfigError("buffer_px must be 0 or more and strip at least 1")
    if cfg.year_groups is not None:
        for g in cfg.year_groups:
            if len(g) != 2 or g[0] > g[1]:
                raise ConfigError(f"year_groups: {g!r} is not [first, last]")


@dataclass
class Design:
    """The strata of a map with sizes, areas and the allocated sample sizes."""

    mapped: MappedRegion
    groups: list[tuple[int, int]]
    strata: list[Stratum]
    n_cochran: int
    n_total: int
    expected_overall_se: float

    def table(self) -> list[str]:
        lines = [f"{'stratum':<22}{'pixels':>12}{'area ha':>14}{'weight':>9}{'U assumed':>11}{'points':>8}"]
        for s in self.strata:
            lines.append(f"{s.name:<22}{s.pixels:>12,}{s.area_ha:>14,.1f}{s.weight:>9.4f}{s.assumed_users_accuracy:>11.2f}{s.n:>8}")
        lines.append(f"total {self.n_total} points (Cochran's n for the target SE: {self.n_cochran}); expected SE of overall accuracy if the assumed accuracies hold: {self.expected_overall_se:.4f}")
        return lines


def plan(cfg: DesignConfig) -> Design:
    """Count the strata of the map (first pass) and allocate the sample."""
    check_config(cfg)
    mapped = open_map(cfg.map)
    groups = [tuple(g) for g in cfg.year_groups] if cfg.year_groups is not None else year_groups(mapped.years, mapped.cutoff_year, cfg.group_years)
    for a, b in groups:
        if a <= mapped.cutoff_year < b:
            raise ConfigError(f"year_groups: [{a}, {b}] straddles the map's cutoff year {mapped.cutoff_year}; end a group at it")
    names = stratum_list(groups, cfg.buffer_px)
    assumed = asdict(cfg.assumed_users_accuracy)
    strata = [Stratum(n, k, assumed_users_accuracy=assumed[k]) for n, k in names]
    for tile in mapped.tiles:
        row_ha = _row_ha(tile.grid)
        for r0, codes, _, _ in _strips(tile, groups, cfg.buffer_px, cfg.strip):
            rows = row_ha[r0 : r0 + codes.shape[0]]
            for i, s in enumerate(strata):
                m = codes == i + 1
                s.pixels += int(m.sum())
                s.area_ha += float((m * rows[:, None]).sum())
    total_ha = sum(s.area_ha for s in strata)
    for s in strata:
        s.weight = s.area_ha / total_ha
    w = np.array([s.weight for s in strata])
    u = np.array([s.assumed_users_accuracy for s in strata])
    n_c = cochran_sample_size(w, u, cfg.target_se)
    alloc = allocate(cfg.total if cfg.total is not None else n_c, [s.pixels for s in strata], cfg.min_per_stratum)
    for s, n in zip(strata, alloc, strict=True):
        s.n = int(n)
    return Design(mapped, [(int(a), int(b)) for a, b in groups], strata, n_c, int(alloc.sum()), expected_overall_se(w, u, alloc))


def draw(plan_: Design, seed: int, strip: int, buffer_px: int) -> pd.DataFrame:
    """Draw the allocated pixels without replacement within each stratum (second pass).

    Returns one row per point: tile, row, col, stratum, map class and onset
    year, x/y (pixel centre, map CRS), lon/lat (EPSG:4326), inclusion
    probability n_h / N_h and the pixel's area in ha. The sheet written from
    it keeps only :data:`SHEET_COLUMNS`; the rest goes to ``design.json``.
    """
    rng = np.random.default_rng(np.random.SeedSequence([seed, 7]))
    chosen = [np.sort(rng.choice(s.pixels, s.n, replace=False)) if s.n else np.zeros(0, np.int64) for s in plan_.strata]
    seen = np.zeros(len(plan_.strata), np.int64)
    names_by_code = {v: k for k, v in LABEL_CODES.items()}
    rows: list[dict[str, Any]] = []
    for tile in plan_.mapped.tiles:
        row_ha = _row_ha(tile.grid)
        for r0, codes, cls, onset in _strips(tile, plan_.groups, buffer_px, strip):
            for i, s in enumerate(plan_.strata):
                flat = np.flatnonzero(codes.ravel() == i + 1)
                if flat.size == 0:
                    continue
                lo, hi = np.searchsorted(chosen[i], [seen[i], seen[i] + flat.size])
                pick = flat[chosen[i][lo:hi] - seen[i]]
                seen[i] += flat.size
                rr, cc = np.divmod(pick, codes.shape[1])
                for r, c in zip(rr, cc, strict=True):
                    x, y = tile.grid.transform * (c + 0.5, r0 + r + 0.5)
                    k = int(cls[r, c])
                    rows.append(
                        {
                            "tile": tile.name,
                            "row": int(r0 + r),
                            "col": int(c),
                            "x": float(x),
                            "y": float(y),
                            "crs": tile.grid.crs.to_string(),
                            "stratum": s.name,
                            "map_class": "no_data" if k == MAP_NODATA else names_by_code[k],
                            "map_onset_year": int(onset[r, c]) if k == LABEL_CODES["conversion"] else 0,
                            "inclusion_probability": s.n / s.pixels,
                            "pixel_ha": float(row_ha[r0 + r]),
                        }
                    )
    table = pd.DataFrame(rows)
    if len(table):
        lon, lat = np.empty(len(table)), np.empty(len(table))
        for crs, idx in table.groupby("crs").groups.items():
            t = Transformer.from_crs(crs, "EPSG:4326", always_xy=True)
            lon[idx], lat[idx] = t.transform(table.loc[idx, "x"].to_numpy(), table.loc[idx, "y"].to_numpy())
        table["lon"], table["lat"] = np.round(lon, 7), np.round(lat, 7)
    # Shuffle the order interpreters see, so that strata are not labelled in blocks.
    table = table.iloc[rng.permutation(len(table))].reset_index(drop=True)
    table.insert(0, "point_id", [f"P{i + 1:05d}" for i in range(len(table))])
    for col in REFERENCE_COLUMNS:
        table[col] = ""
    return table


def fill_from_truth(table: pd.DataFrame, region: RegionConfig) -> pd.DataFrame:
    """Demo only: copy the truth rasters' class and onset year into the reference columns, marked as simulated."""
    truths = {t.name: t.truth for t in region.tiles}
    out = table.copy()
    labels = np.empty(len(out), dtype=object)
    years = np.zeros(len(out), dtype=np.int64)
    for name, idx in out.groupby("tile").groups.items():
        path = truths.get(name)
        if not path or not Path(path).is_file():
            raise InputNotFoundError(f"{path or name}: fill_from_truth needs the truth raster of tile {name} (region.tiles[].truth); only simulated regions have one")
        with rasterio.open(path) as src:
            cls, onset = src.read(1), src.read(2)
        r, c = out.loc[idx, "row"].to_numpy(), out.loc[idx, "col"].to_numpy()
        labels[idx] = np.array(LABEL_NAMES, dtype=object)[cls[r, c] - 1]
        years[idx] = onset[r, c]
    out["label"] = labels
    out["onset_year"] = [str(y) if lab == "conversion" else "" for lab, y in zip(labels, years, strict=True)]
    out["confidence"] = "simulated"
    out["interpreter"] = SIMULATED
    out["note"] = "reference copied from the simulator's truth raster; not an interpretation"
    return out


def _atomic_text(path: Path, text: str) -> None:
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text(text)
    os.replace(tmp, path)


def write_samples(table: pd.DataFrame, out_dir: Path, *, stem: str = "samples") -> tuple[Path, Path]:
    """The interpreters' sheet: ``<stem>.csv`` and ``<stem>.gpkg`` (points in EPSG:4326, layer ``<stem>``), atomically.

    Only :data:`SHEET_COLUMNS` are written: the map's answer stays in ``design.json``.
    ``stem``: the files' and layer's name (``samples`` for the validation
    sample; ``plantation suggest`` writes the same form as ``suggestions``).
    """
    import logging

    import pyogrio
    import shapely

    logging.getLogger("pyogrio").setLevel(logging.WARNING)
    out_dir.mkdir(parents=True, exist_ok=True)
    csv = out_dir / f"{stem}.csv"
    tmp = csv.with_name(csv.name + ".partial")
    table.loc[:, list(SHEET_COLUMNS)].to_csv(tmp, index=False, lineterminator="\n")
    os.replace(tmp, csv)
    gpkg = out_dir / f"{stem}.gpkg"
    tmpg = gpkg.with_name(f"{stem}.partial.gpkg")
    if tmpg.exists():
        tmpg.unlink()
    geom = shapely.to_wkb(shapely.points(table["lon"].to_numpy(), table["lat"].to_numpy()))
    cols = [c for c in SHEET_COLUMNS if c not in ("lon", "lat")]
    data = [table[c].to_numpy() if table[c].dtype != object else table[c].astype(str).to_numpy() for c in cols]
    pyogrio.raw.write(str(tmpg), geom, data, cols, crs="EPSG:4326", geometry_type="Point", driver="GPKG", layer=stem)
    os.replace(tmpg, gpkg)
    return csv, gpkg


def run(cfg: DesignConfig, resolved_config: str | None = None, echo: Any = print) -> Design:
    """Plan the sample, show the allocation, and (unless ``dry_run``) draw and write it.

    Writes into ``out_dir``: the interpreters' blind sheet, ``samples.csv``
    and ``samples.gpkg`` (:data:`SHEET_COLUMNS`: blank reference columns, or
    filled from truth with ``fill_from_truth``), and ``design.json`` (strata,
    sizes, areas, allocation, the map's digests, and each point's
    :data:`BOOKKEEPING` under ``points``).
    """
    design = plan(cfg)
    for line in design.table():
        echo(line)
    if cfg.dry_run:
        echo("dry run: nothing written")
        return design
    table = draw(design, cfg.seed, cfg.strip, cfg.buffer_px)
    if cfg.fill_from_truth:
        table = fill_from_truth(table, cfg.region)
    out = Path(cfg.out_dir)
    csv, gpkg = write_samples(table, out)
    doc = {
        "kind": FORMAT,
        "region": cfg.region.name,
        "map_dir": str(design.mapped.folder),
        "map_manifest_sha256": design.mapped.manifest_sha256,
        "tiles": {t.name: t.sha256 for t in design.mapped.tiles},
        "cutoff_year": design.mapped.cutoff_year,
        "year_groups": [list(g) for g in design.groups],
        "buffer_px": cfg.buffer_px,
        "target_se": cfg.target_se,
        "n_cochran": design.n_cochran,
        "n_total": design.n_total,
        "expected_overall_se": round(design.expected_overall_se, 6),
        "seed": cfg.seed,
        "simulated_reference": cfg.fill_from_truth,
        "samples_sha256": sha256_of(csv),
        "strata": [asdict(s) for s in design.strata],
        "config": resolved_config,
        "points": design_points(table),
    }
    path = write_design(doc, out)
    echo(f"{design.n_total} points written to {csv} and {gpkg} (for the interpreters: no map class on them); design and each point's map class in {path} (keep it from them)")
    return design


def design_points(table: pd.DataFrame) -> list[dict[str, Any]]:
    """The ``points`` entries of design.json from a drawn table: :data:`POINT_FIELDS` per point, in the sheet's order."""
    return [
        {
            "point_id": str(r.point_id),
            "tile": str(r.tile),
            "row": int(r.row),
            "col": int(r.col),
            "stratum": str(r.stratum),
            "map_class": str(r.map_class),
            "map_onset_year": int(r.map_onset_year),
            "inclusion_probability": float(r.inclusion_probability),
        }
        for r in table.itertuples(index=False)
    ]


def write_design(doc: dict[str, Any], out_dir: Path) -> Path:
    """Write ``design.json`` into ``out_dir`` atomically, one line per point so it reads (and diffs) as a table."""
    head = json.dumps({k: v for k, v in doc.items() if k != "points"}, indent=1)
    points = ",\n".join("  " + json.dumps(q) for q in doc.get("points", []))
    # head ends with "\n}": reopen it to append the points.
    path = Path(out_dir) / DESIGN_NAME
    _atomic_text(path, head[:-2] + ',\n "points": [\n' + points + "\n ]\n}\n")
    return path


def _is_int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: Any) -> bool:
    return isinstance(v, int | float) and not isinstance(v, bool) and np.isfinite(v)


def read_design(path: str | Path) -> dict[str, Any]:
    """The sample design :func:`run` wrote: strata, the map's digests and each point's bookkeeping.

    Args:
        path: ``design.json``, or the folder holding it.

    Returns:
        The document as written; ``strata`` is a list of :class:`Stratum`
        fields and ``points`` a list of :data:`POINT_FIELDS` records with
        unique ``point_id``.

    Raises:
        InputNotFoundError: there is no such file.
        FileFormatError: it is not valid JSON, is a design of another kind or of
            an older version (kind ``.../1`` kept the map's classes on the
            sheet and has no ``points``), or an entry is malformed; one line
            naming the file and the entry.
    """
    p = locate(path, DESIGN_NAME, missing="`plantation sample` writes it beside samples.csv; or set design=<its path>")
    redraw = "draw the sample again with `plantation sample`"
    doc = load_object(p, what="a sample design", again=f"restore the design.json written with the sample, or {redraw}")
    kind = doc.get("kind")
    if kind == "plantation-sample-design/1":
        raise FileFormatError(f"{p}: a design of an older version ({kind!r}) that kept the map's classes on the interpreters' sheet and no per-point bookkeeping; {redraw} and label its blind sheet")
    if kind != FORMAT:
        raise FileFormatError(f"{p}: kind {kind!r}, expected {FORMAT!r}; point design= at the design.json written by `plantation sample`")

    def bad(what: str) -> FileFormatError:
        return FileFormatError(f"{p}: {what}; the file was edited or damaged: restore it, or {redraw}")

    kinds = tuple(f.name for f in fields(AssumedAccuracy))
    strata = doc.get("strata")
    if not isinstance(strata, list) or not strata:
        raise bad("no list of strata")
    for k, s in enumerate(strata, start=1):
        ok = isinstance(s, dict) and isinstance(s.get("name"), str) and s.get("kind") in kinds
        if not ok or not all(_is_int(s.get(f)) for f in ("pixels", "n")) or not _is_number(s.get("area_ha")) or s["area_ha"] < 0:
            raise bad(f"stratum {k} is not a {{name, kind (one of {list(kinds)}), pixels, area_ha, n}} entry")
    names = [s["name"] for s in strata]
    if len(set(names)) != len(names):
        raise bad(f"stratum names repeat: {names}")
    if sum(s["area_ha"] for s in strata) <= 0:
        raise bad("the strata have no area")
    if not isinstance(doc.get("tiles"), dict):
        raise bad("no 'tiles' object (the map's tile digests)")
    points = doc.get("points")
    if not isinstance(points, list):
        raise bad("no list of points")
    seen: set[str] = set()
    for k, q in enumerate(points, start=1):
        if not isinstance(q, dict) or any(f not in q for f in POINT_FIELDS):
            raise bad(f"point {k} is not a {{{', '.join(POINT_FIELDS)}}} entry")
        pid = q["point_id"]
        if not isinstance(pid, str) or not pid:
            raise bad(f"point {k}: point_id {pid!r} is not a name")
        if pid in seen:
            raise bad(f"point_id {pid!r} appears twice")
        seen.add(pid)
        if q["stratum"] not in names:
            raise bad(f"point {pid!r}: stratum {q['stratum']!r} is not one of the design's strata {names}")
        if q["map_class"] not in MAP_CLASSES:
            raise bad(f"point {pid!r}: map_class {q['map_class']!r} is not one of {list(MAP_CLASSES)}")
        if not isinstance(q["tile"], str) or not all(_is_int(q[f]) for f in ("row", "col", "map_onset_year")):
            raise bad(f"point {pid!r}: tile must be text and row, col and map_onset_year whole numbers")
        if not _is_number(q["inclusion_probability"]) or not 0 < q["inclusion_probability"] <= 1:
            raise bad(f"point {pid!r}: inclusion_probability {q['inclusion_probability']!r} is not in (0, 1]")
    return doc
