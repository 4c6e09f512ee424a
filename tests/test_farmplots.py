"""The farm-plot cutoff report on tiny maps built in code, with answers computed by hand.

Sources: geodesic areas from pyproj's ``Geod`` (Karney 2013, GeographicLib);
the areal scale factor of UTM from pyproj's ``Proj.get_factors`` (PROJ);
coverage fractions of axis-aligned squares worked out by hand; the
comonotone (fully dependent) range from the Fréchet–Hoeffding upper bound,
where all pixels convert on one uniform draw (common practice for bounds
under unknown dependence).
"""

from __future__ import annotations

import hashlib
import json
import shutil
import subprocess
import sys
from datetime import date
from pathlib import Path

import numpy as np
import pandas as pd
import pyogrio
import pytest
import rasterio
import shapely
from affine import Affine
from pyproj import CRS as ProjCRS
from pyproj import Geod, Proj, Transformer

from plantation.errors import ConfigError, FileFormatError, InputNotFoundError, PlantationError
from plantation.farmplots.cutoff import (
    KIND,
    Cutoff,
    PlotRow,
    PlotsConfig,
    VerdictConfig,
    comonotone_range_ha,
    parse_cutoff,
    read_plots_json,
    run,
    sort_rows,
    table_columns,
    verdict,
    write_outputs,
)
from plantation.farmplots.evidence import EvidenceConfig, read_evidence
from plantation.mapping.folder import FIRE, FORMAT, MAP_LAYERS, NODATA
from tests.conftest import write_map_tile

ROOT = Path(__file__).resolve().parents[1]
CRS = "EPSG:32650"
#: 30 m pixels in UTM zone 50N, about 100 km east of its central meridian (a fictional place).
TRANSFORM = Affine(30.0, 0.0, 600000.0, 0.0, -30.0, 200010.0)
X0, Y0 = 600000.0, 200010.0


def corner(row: float, col: float, transform: Affine = TRANSFORM) -> tuple[float, float]:
    """CRS coordinates of a (fractional) pixel position."""
    x, y = transform * (col, row)
    return float(x), float(y)


def pixel_box(r0: float, c0: float, r1: float, c1: float) -> shapely.Polygon:
    """A rectangle from pixel position (r0, c0) to (r1, c1), in CRS metres."""
    (xa, ya), (xb, yb) = corner(r0, c0), corner(r1, c1)
    return shapely.box(min(xa, xb), min(ya, yb), max(xa, xb), max(ya, yb))


def write_tile(
    folder: Path, name: str = "t01", *, cls=None, onset=None, p_after=None, clear=None, transform: Affine = TRANSFORM, shape=(10, 10), cutoff_year: int = 2020, years=None, fire=None, fire_year=None
) -> Path:
    """A map tile like scripts/map.py writes (8 int16 bands, p_* stored × 10000 with scale 1e-4), added to ``folder/manifest.json``.

    ``p_after`` is given as stored integers; ``cls`` may hold NODATA;
    ``years``: the onset years the map can hold, recorded as the manifest's
    ``converted_ha`` keys as the mapper does (None: none recorded).
    ``fire``, ``fire_year``: the fire layers, written after the eight as the
    mapper writes them (None: a tile of a map made before them, 8 bands).
    """
    folder.mkdir(parents=True, exist_ok=True)
    h, w = shape
    cls = np.ones(shape, np.int16) if cls is None else np.asarray(cls, np.int16)
    onset = np.zeros(shape, np.int16) if onset is None else np.asarray(onset, np.int16)
    p_after = np.zeros(shape, np.int16) if p_after is None else np.asarray(p_after, np.int16)
    clear = np.full(shape, 20, np.int16) if clear is None else np.asarray(clear, np.int16)
    bands = np.zeros((8, h, w), np.int16)
    bands[0], bands[1], bands[5], bands[7] = cls, onset, p_after, clear
    bands[:7, cls == NODATA] = NODATA
    path = folder / f"{name}.tif"
    tags = {"cutoff_year": str(cutoff_year), "interval_level": "0.8"}
    if fire is None:
        write_map_tile(path, bands, crs=CRS, transform=transform, tags=tags)
    else:
        extra = np.stack([np.asarray(fire, np.int16), np.zeros(shape, np.int16) if fire_year is None else np.asarray(fire_year, np.int16), np.full(shape, NODATA, np.int16)])
        extra[:, cls == NODATA] = NODATA
        prof = {"driver": "GTiff", "width": w, "height": h, "count": len(MAP_LAYERS), "dtype": "int16", "crs": CRS, "transform": transform, "nodata": NODATA}
        with rasterio.open(path, "w", **prof) as dst:
            dst.write(np.concatenate([bands, extra]))
            for i, (desc, _, units) in enumerate(MAP_LAYERS, start=1):
                dst.set_band_description(i, desc)
                dst.update_tags(i, units=units)
            dst.scales = [sc for _, sc, _ in MAP_LAYERS]
            dst.offsets = [0.0] * len(MAP_LAYERS)
            dst.update_tags(**tags)
    man = folder / "manifest.json"
    doc = json.loads(man.read_text()) if man.exists() else {"format": FORMAT, "producer": "test", "tiles": {}}
    doc["tiles"][name] = {"file": path.name, "sha256": hashlib.sha256(path.read_bytes()).hexdigest(), "tile": name}
    if years is not None:
        doc["tiles"][name]["converted_ha"] = {str(y): float(((cls == 2) & (onset == y)).sum()) * 0.09 for y in years}
    man.write_text(json.dumps(doc))
    return folder


def write_plots(path: Path, geoms: list, ids: list, crs: str = CRS, field: str = "id") -> Path:
    """A GeoPackage or GeoJSON of the given shapely geometries (None: no geometry) and ids."""
    wkb = np.array([None if g is None else shapely.to_wkb(g) for g in geoms], dtype=object)
    pyogrio.raw.write(path, wkb, [np.array(ids, dtype=object)], [field], geometry_type="Unknown", crs=crs, driver="GPKG" if path.suffix == ".gpkg" else "GeoJSON")
    return path


def cfg_for(tmp_path: Path, plots: Path, map_dir: Path, **kw) -> PlotsConfig:
    """A plot check of these maps; no evidence pages (the maps here have no imagery: tests/test_evidence.py draws pages)."""
    kw.setdefault("evidence", EvidenceConfig(enabled=False))
    return PlotsConfig(plots=str(plots), map=str(map_dir), out_dir=str(tmp_path / "out"), progress=False, **kw)


def areal_scale(x: float, y: float) -> float:
    """Planar UTM area / true area at a point (PROJ's areal scale factor)."""
    lon, lat = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True).transform(x, y)
    return float(Proj(CRS).get_factors(lon, lat).areal_scale)


# ------------------------------------------------------------------ cutoff


def test_parse_cutoff_year_dec31_and_mid_year():
    assert parse_cutoff(2020) == Cutoff(date(2020, 12, 31), 2020, None)
    assert parse_cutoff("2020") == Cutoff(date(2020, 12, 31), 2020, None)
    assert parse_cutoff("2020-12-31") == Cutoff(date(2020, 12, 31), 2020, None)
    # After 30 June 2020: the map must count from 2021 (cutoff year 2020), and 2020's conversions straddle the date.
    assert parse_cutoff("2020-06-30") == Cutoff(date(2020, 6, 30), 2020, 2020)
    assert parse_cutoff("2021-01-01") == Cutoff(date(2021, 1, 1), 2021, 2021)
    assert parse_cutoff(date(2019, 3, 1)).straddle_year == 2019


@pytest.mark.parametrize("bad", ["2020/06/30", "June 2020", "2020-02-30", "20", "", True])
def test_parse_cutoff_rejects_with_the_value(bad):
    with pytest.raises(ConfigError, match=f"cutoff: {bad!r}"):
        parse_cutoff(bad)


# ------------------------------------------------------------------ interval and verdict


def test_comonotone_range_on_a_known_set():
    cov = np.full(6, 1e4)  # 1 ha each
    # As the map stores them: integers × 1e-4 (9500 × 1e-4 is 0.9500000000000001 in floating point).
    p = np.array([9600, 9500, 5000, 500, 400, 0]) * 1e-4
    p[-1] = np.nan  # no data: in neither bound
    lo, hi = comonotone_range_ha(cov, p, 0.9)
    # lo: p > 0.95 → only 0.96; hi: p ≥ 0.05 → 0.96, 0.95, 0.5, 0.05.
    assert lo == pytest.approx(1.0) and hi == pytest.approx(4.0)
    # Independent pixels would give about 2.45 ± 1.07 ha (normal approximation,
    # sd = sqrt(Σ p(1 − p)) = 0.65 ha): the comonotone range is wider on both sides.
    lo50, hi50 = comonotone_range_ha(cov, p, 0.5)
    assert (lo50, hi50) == (pytest.approx(2.0), pytest.approx(3.0))


def _numbers(**kw):
    base = {
        "area_ha": 2.0,
        "mapped_ha": 2.0,
        "mapped_share": 1.0,
        "expected_after_ha": 0.01,
        "after_lo_ha": 0.0,
        "after_hi_ha": 0.02,
        "share_after": 0.005,
        "years": {},
        "straddle_ha": 0.0,
        "mean_clear": 20.0,
    }
    return base | kw


def test_verdict_rules_fire_in_words():
    rules, cut = VerdictConfig(), parse_cutoff(2020)
    assert verdict(_numbers(), rules, cut)[0] == "low_evidence"
    v, why = verdict(_numbers(after_lo_ha=0.6, after_hi_ha=1.0, expected_after_ha=0.8, share_after=0.4), rules, cut)
    assert v == "strong_evidence" and "at least 0.60 ha" in why[0]
    v, why = verdict(_numbers(mean_clear=5.0), rules, cut)
    assert v == "review" and why == ["only 5.0 clear dates per pixel on average (< 8): little evidence either way"]
    v, why = verdict(_numbers(mapped_share=0.5, mapped_ha=1.0), rules, cut)
    assert v == "review" and "only 50% of the plot has mapped pixels" in why[0]
    v, why = verdict(_numbers(after_hi_ha=0.5), rules, cut)
    assert v == "review" and "up to 0.50 ha" in why[0]
    v, why = verdict(_numbers(straddle_ha=0.3), rules, parse_cutoff("2020-06-30"))
    assert v == "review" and "converted in 2020, which may fall on either side of 2020-06-30" in why[0]


# ------------------------------------------------------------------ measuring plots


def test_partial_pixels_exact_area_by_hand(tmp_path):
    p = np.zeros((10, 10), np.int16)
    p[3, 2:5] = [1000, 2000, 3000]
    p[4, 2:5] = [4000, 5000, 9000]
    cls = np.ones((10, 10), np.int16)
    onset = np.zeros((10, 10), np.int16)
    cls[3, 2], onset[3, 2] = 2, 2019
    cls[4, 4], onset[4, 4] = 2, 2022
    clear = np.full((10, 10), 20, np.int16)
    clear[3, 4] = 10
    maps = write_tile(tmp_path / "map", cls=cls, onset=onset, p_after=p, clear=clear)
    # Rows 3-4, columns 2 to 4.5: two whole columns and half of column 4.
    plot = pixel_box(3, 2, 5, 4.5)
    plots = write_plots(tmp_path / "plots.gpkg", [plot], ["A"])
    res = run(cfg_for(tmp_path, plots, maps))
    (row,) = res.rows
    # Covered fractions, row by row: 1, 1, 0.5 / 1, 1, 0.5 of 900 m² pixels.
    w = np.array([1, 1, 0.5, 1, 1, 0.5])
    pv = np.array([0.1, 0.2, 0.3, 0.4, 0.5, 0.9])
    assert row.status == "ok"
    assert row.mapped_ha == pytest.approx(w.sum() * 0.09, abs=1e-9)  # 0.45 ha
    assert row.expected_after_ha == pytest.approx((w * pv).sum() * 0.09, abs=1e-9)  # 1.8 × 0.09 = 0.162 ha
    assert row.years == {2019: pytest.approx(0.09), 2022: pytest.approx(0.045)}
    assert row.mean_clear == pytest.approx((20 + 20 + 10 * 0.5 + 20 + 20 + 20 * 0.5) / 5)  # 19.0
    # The 90% range: nothing above 0.95; everything at or above 0.05.
    assert row.after_lo_ha == pytest.approx(0.0) and row.after_hi_ha == pytest.approx(0.45)
    # area_ha is geodesic: the polygon's corners on the WGS 84 ellipsoid.
    lon, lat = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True).transform(*plot.exterior.xy)
    geod_ha = abs(Geod(ellps="WGS84").polygon_area_perimeter(lon, lat)[0]) / 1e4
    assert row.area_ha == pytest.approx(geod_ha, rel=1e-9)
    assert row.mapped_share == pytest.approx(areal_scale(*plot.centroid.coords[0]), abs=1e-5)
    assert row.share_after == pytest.approx(row.expected_after_ha / row.mapped_ha)
    assert row.verdict == "review" and row.straddle_ha == 0.0


def test_fire_columns_by_hand(tmp_path):
    """Share of the converted area cleared with fire, fire after the cutoff, unknown and escaped fire: whole 900 m² pixels counted by hand."""
    cls = np.ones((10, 10), np.int16)
    onset = np.zeros((10, 10), np.int16)
    fire = np.zeros((10, 10), np.int16)
    year = np.zeros((10, 10), np.int16)
    cls[0:4, 0:5], onset[0:4, 0:5] = 2, 2019  # 20 converted pixels
    fire[0:4, 0:5] = FIRE["converted_not_burnt"]
    fire[0:2, 0:5], year[0:2, 0:5] = FIRE["converted_burnt"], 2019  # 10 burnt ...
    year[0, 0:4] = 2021  # ... 4 of them after the 2020 cutoff
    fire[2, 0:5] = FIRE["converted_unknown"]  # 5 unknown
    fire[4, 0:3], year[4, 0:3] = FIRE["escaped_fire"], 2019  # 3 forest pixels burnt by an escaped fire
    fire[6, 6], cls[6, 6], onset[6, 6] = FIRE["converted_burnt"], 2, 2019  # outside the plot
    maps = write_tile(tmp_path / "map", cls=cls, onset=onset, fire=fire, fire_year=year)
    plots = write_plots(tmp_path / "plots.gpkg", [pixel_box(0, 0, 5, 5)], ["A"])
    (row,) = run(cfg_for(tmp_path, plots, maps)).rows
    assert row.converted_ha == pytest.approx(20 * 0.09)
    assert row.fire_ha == pytest.approx(10 * 0.09) and row.fire_share == pytest.approx(0.5)
    assert row.fire_after_ha == pytest.approx(4 * 0.09)
    assert row.fire_unknown_ha == pytest.approx(5 * 0.09)
    assert row.escaped_fire_ha == pytest.approx(3 * 0.09)
    doc = json.loads((tmp_path / "out" / "plots.json").read_text())
    assert doc["plots"][0]["fire_share"] == pytest.approx(0.5)
    table = pd.read_csv(tmp_path / "out" / "plots.csv")
    assert table.loc[0, "fire_after_ha"] == pytest.approx(0.36)
    # A map made before the fire layers says nothing of fire: blank, never 0.
    old = write_tile(tmp_path / "old", cls=cls, onset=onset)
    (row,) = run(cfg_for(tmp_path, plots, old)).rows
    assert row.converted_ha == pytest.approx(20 * 0.09)
    assert row.fire_ha is None and row.fire_share is None and row.fire_after_ha is None and row.escaped_fire_ha is None


def test_plot_half_outside_the_map(tmp_path):
    maps = write_tile(tmp_path / "map")
    # Columns -3 to 3: half of it west of the map's edge.
    plot = pixel_box(2, -3, 6, 3)
    res = run(cfg_for(tmp_path, write_plots(tmp_path / "plots.gpkg", [plot], ["half"]), maps))
    (row,) = res.rows
    assert row.mapped_ha == pytest.approx(4 * 3 * 0.09)
    # Half the plot, in grid area over true area (the UTM scale error, < 0.1%).
    assert row.mapped_share == pytest.approx(0.5 * areal_scale(*corner(4, 0)), abs=1e-5)
    assert row.verdict == "review" and any("only 50% of the plot has mapped pixels" in r for r in row.reasons)


def test_nodata_pixels_are_not_mapped_area(tmp_path):
    cls = np.ones((10, 10), np.int16)
    cls[5, 5] = NODATA
    clear = np.full((10, 10), 20, np.int16)
    clear[5, 5] = 2
    maps = write_tile(tmp_path / "map", cls=cls, clear=clear)
    res = run(cfg_for(tmp_path, write_plots(tmp_path / "plots.gpkg", [pixel_box(5, 5, 6, 7)], ["n"]), maps))
    (row,) = res.rows
    assert row.mapped_ha == pytest.approx(0.09)  # one of its two pixels has data
    assert row.mean_clear == pytest.approx(11.0)  # clear_dates counts everywhere: (2 + 20) / 2


def test_plot_across_two_tiles_and_overlapping_tiles_count_once(tmp_path):
    p1 = np.full((10, 10), 2000, np.int16)
    p2 = np.full((10, 10), 6000, np.int16)
    side = write_tile(tmp_path / "side", "t01", p_after=p1)
    write_tile(side, "t02", p_after=p2, transform=TRANSFORM * Affine.translation(10, 0))
    # Columns 8-12 of the mosaic: 2 columns in t01, 2 in t02, rows 0-1.
    plot = pixel_box(0, 8, 2, 12)
    (row,) = run(cfg_for(tmp_path, write_plots(tmp_path / "plots.gpkg", [plot], ["x"]), side)).rows
    assert row.mapped_ha == pytest.approx(8 * 0.09)
    assert row.expected_after_ha == pytest.approx(4 * 0.09 * 0.2 + 4 * 0.09 * 0.6)
    # Tiles overlapping by 5 columns: the shared pixels count once (the first tile's).
    over = write_tile(tmp_path / "over", "t01", p_after=p1)
    write_tile(over, "t02", p_after=p2, transform=TRANSFORM * Affine.translation(5, 0))
    plot = pixel_box(0, 6, 2, 12)  # columns 6-9 in t01 (and t02), 10-11 in t02 only
    (row,) = run(cfg_for(tmp_path, write_plots(tmp_path / "plots2.gpkg", [plot], ["y"]), over)).rows
    assert row.mapped_ha == pytest.approx(12 * 0.09)
    assert row.expected_after_ha == pytest.approx(8 * 0.09 * 0.2 + 4 * 0.09 * 0.6)


def test_plot_in_epsg4326_lands_on_the_right_pixel(tmp_path):
    rows, cols = np.mgrid[0:10, 0:10]
    p = (100 * rows + cols + 1).astype(np.int16)  # a distinct probability per pixel
    maps = write_tile(tmp_path / "map", p_after=p)
    to_lonlat = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)
    lon, lat = to_lonlat.transform(*corner(6.5, 7.5))  # centre of pixel (6, 7)
    d = 0.00008  # about 9 m: the square stays inside that 30 m pixel
    plot = shapely.box(lon - d, lat - d, lon + d, lat + d)
    res = run(cfg_for(tmp_path, write_plots(tmp_path / "plots.geojson", [plot], ["ll"], crs="EPSG:4326"), maps))
    (row,) = res.rows
    # Where pyproj puts the square, independently of the report.
    to_utm = Transformer.from_crs("EPSG:4326", CRS, always_xy=True)
    x, y = to_utm.transform(lon, lat)
    c, r = ~TRANSFORM * (x, y)
    assert (int(r), int(c)) == (6, 7)
    assert row.share_after == pytest.approx((100 * 6 + 7 + 1) * 1e-4)
    utm = shapely.transform(plot, to_utm.transform, interleaved=False)
    assert row.mapped_ha == pytest.approx(utm.area / 1e4, rel=1e-6)


def test_mid_year_cutoff_reports_the_straddle_year(tmp_path):
    cls = np.ones((10, 10), np.int16)
    onset = np.zeros((10, 10), np.int16)
    cls[:2, :2], onset[:2, :2] = 2, 2020
    maps = write_tile(tmp_path / "map", cls=cls, onset=onset)
    res = run(cfg_for(tmp_path, write_plots(tmp_path / "plots.gpkg", [pixel_box(0, 0, 2, 3)], ["s"]), maps, cutoff="2020-06-30"))
    (row,) = res.rows
    assert row.straddle_ha == pytest.approx(4 * 0.09)
    assert row.verdict == "review" and "converted in 2020, which may fall on either side of 2020-06-30" in row.reasons[0]
    doc = json.loads((tmp_path / "out" / "plots.json").read_text())
    assert doc["cutoff"] == {"date": "2020-06-30", "year": 2020, "straddle_year": 2020}


# ------------------------------------------------------------------ bad inputs


def test_each_bad_plot_gets_its_row_and_message(tmp_path):
    maps = write_tile(tmp_path / "map")
    good = pixel_box(1, 1, 3, 3)
    bowtie = shapely.Polygon([corner(4, 4), corner(6, 6), corner(6, 4), corner(4, 6)])
    far = shapely.box(X0 + 5000, Y0 - 5000, X0 + 5100, Y0 - 4900)
    point = shapely.Point(corner(5, 5))
    geoms = [good, far, bowtie, None, good, point, good]
    ids = ["g", "far", "bow", "none", "g", "pt", None]
    path = write_plots(tmp_path / "plots.gpkg", geoms, ids)
    res = run(cfg_for(tmp_path, path, maps))
    status = [r.status for r in res.rows]
    assert status == ["ok", "outside_map", "invalid_geometry", "empty_geometry", "duplicate_id", "not_a_polygon", "missing_id"]
    assert [r.feature for r in res.rows] == list(range(1, 8))
    for r in res.rows[1:]:
        assert r.area_ha is None and r.mapped_ha is None and r.verdict is None
    lines = "\n".join(res.lines())
    assert f"{path}: feature 3 (id 'bow'): invalid_geometry: Self-intersection" in lines
    assert f"{path}: feature 2 (id 'far'): outside_map" in lines
    assert f"{path}: feature 5 (id 'g'): duplicate_id: id already used by feature 1" in lines
    assert f"{path}: feature 6 (id 'pt'): not_a_polygon: geometry is a Point" in lines
    assert f"{path}: feature 7 (no id): missing_id" in lines
    assert res.counts == {"low_evidence": 1, "review": 0, "strong_evidence": 0, "problem": 6}
    doc = json.loads((tmp_path / "out" / "plots.json").read_text())
    assert [(p["index"], p["id"], p["problem"]) for p in doc["problems"]] == [
        (2, "far", "outside_map"),
        (3, "bow", "invalid_geometry"),
        (4, "none", "empty_geometry"),
        (5, "g", "duplicate_id"),
        (6, "pt", "not_a_polygon"),
        (7, None, "missing_id"),
    ]
    # The tables: the measured plot first, then the problem rows by id (the one without an id last).
    table = pd.read_csv(tmp_path / "out" / "plots.csv", keep_default_na=False)
    assert table["id"].tolist() == ["g", "bow", "far", "g", "none", "pt", ""]
    assert table["status"].tolist() == ["ok", "invalid_geometry", "outside_map", "duplicate_id", "empty_geometry", "not_a_polygon", "missing_id"]
    assert table["feature"].tolist() == [1, 3, 2, 5, 4, 6, 7]
    assert table.loc[2, "area_ha"] == "" and table.loc[2, "converted_ha"] == ""
    # Problem rows keep their geometry where they had one; plots.gpkg holds polygons only (the point's row has none there).
    gj = pyogrio.raw.read(tmp_path / "out" / "plots.geojson")
    assert [g is None for g in gj[2]] == [False, False, False, False, True, False, False]
    gp = pyogrio.raw.read(tmp_path / "out" / "plots.gpkg")
    assert [g is None for g in gp[2]] == [False, False, False, False, True, True, False]
    assert list(gp[3][0]) == [v or None for v in table["id"]]


def test_missing_id_field_names_file_and_fields(tmp_path):
    maps = write_tile(tmp_path / "map")
    path = write_plots(tmp_path / "plots.gpkg", [pixel_box(1, 1, 2, 2)], ["a"], field="plot_code")
    with pytest.raises(PlantationError, match=r"plots.gpkg: no id field 'id'; the file has fields \['plot_code'\]"):
        run(cfg_for(tmp_path, path, maps))
    assert run(cfg_for(tmp_path, path, maps, id_field="plot_code")).rows[0].id == "a"
    # A GeoPackage's own feature ids, when asked for.
    assert run(cfg_for(tmp_path, path, maps, id_field="fid")).rows[0].id == "1"


def test_cutoff_mismatch_is_one_line_and_writes_nothing(tmp_path):
    maps = write_tile(tmp_path / "map", cutoff_year=2020)
    path = write_plots(tmp_path / "plots.gpkg", [pixel_box(1, 1, 2, 2)], ["a"])
    with pytest.raises(PlantationError, match=r"t01.tif: the map was made with cutoff 2020 \(p_after_cutoff counts conversions from 2021 on\).*re-map with cutoff_year=2021") as e:
        run(cfg_for(tmp_path, path, maps, cutoff="2021-12-31"))
    assert "\n" not in str(e.value)
    assert not (tmp_path / "out").exists()


def test_missing_inputs(tmp_path):
    maps = write_tile(tmp_path / "map")
    with pytest.raises(InputNotFoundError, match="nope.gpkg: plots file does not exist"):
        run(cfg_for(tmp_path, tmp_path / "nope.gpkg", maps))
    path = write_plots(tmp_path / "plots.gpkg", [pixel_box(1, 1, 2, 2)], ["a"])
    with pytest.raises(InputNotFoundError, match="no mapped region here"):
        run(cfg_for(tmp_path, path, tmp_path / "nomap"))
    with pytest.raises(ConfigError, match="interval_level"):
        run(cfg_for(tmp_path, path, maps, interval_level=1.5))


# ------------------------------------------------------------------ outputs


def test_outputs_schema_and_geojson_in_wgs84(tmp_path):
    maps = write_tile(tmp_path / "map", p_after=np.full((10, 10), 9700, np.int16))
    plot = pixel_box(1, 1, 4, 4)
    res = run(cfg_for(tmp_path, write_plots(tmp_path / "plots.gpkg", [plot], ["A"]), maps))
    out = tmp_path / "out"
    assert sorted(p.name for p in out.iterdir()) == ["plots.csv", "plots.geojson", "plots.gpkg", "plots.json"]
    doc = json.loads((out / "plots.json").read_text())
    assert list(doc) == ["kind", "plots_file", "plots_sha256", "map_dir", "map_manifest_sha256", "cutoff", "interval_level", "thresholds", "plots", "problems", "counts", "notice"]
    assert doc["kind"] == "plantation-plots/1" and len(doc["plots_sha256"]) == 64
    assert doc["thresholds"] == {"strong_min_ha": 0.5, "review_min_ha": 0.1, "review_min_share": 0.02, "min_mean_clear": 8.0, "min_mapped_share": 0.9}
    (p,) = doc["plots"]
    assert list(p) == [
        "id",
        "status",
        "area_ha",
        "mapped_ha",
        "mapped_share",
        "expected_after_ha",
        "after_lo_ha",
        "after_hi_ha",
        "share_after",
        "years",
        "straddle_ha",
        "mean_clear",
        "fire_ha",
        "fire_share",
        "fire_unknown_ha",
        "fire_after_ha",
        "escaped_fire_ha",
        "verdict",
        "reasons",
    ]
    assert p["verdict"] == "strong_evidence" and p["after_lo_ha"] == pytest.approx(0.81) and doc["counts"]["strong_evidence"] == 1
    assert p["years"] == {}  # plots.json: {"<year>": ha} for the years with some
    # No onset years recorded in this map and none under the plot: no year columns.
    assert list(pd.read_csv(out / "plots.csv").columns) == table_columns([])
    meta, _, geom, fields = pyogrio.raw.read(out / "plots.geojson")
    assert meta["crs"] == "EPSG:4326" and list(meta["fields"]) == table_columns([])
    g = shapely.from_wkb(geom[0])
    lon, lat = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True).transform(*plot.centroid.coords[0])
    assert g.centroid.x == pytest.approx(lon, abs=1e-6) and g.centroid.y == pytest.approx(lat, abs=1e-6)  # x = longitude
    assert res.files["json"] == out / "plots.json"


def _layer_table(path: Path) -> tuple[dict, pd.DataFrame, list]:
    """A vector output's metadata, attribute table (blank → NaN, as pandas reads the CSV) and shapely geometries."""
    meta, _, wkb, fields = pyogrio.raw.read(path)
    table = pd.DataFrame({name: pd.Series(col) for name, col in zip(meta["fields"], fields, strict=True)})
    return meta, table.fillna(value=np.nan), [None if g is None else shapely.from_wkb(g) for g in wkb]


def test_gpkg_has_the_plots_in_their_crs_and_the_csv_rows(tmp_path):
    cls = np.ones((10, 10), np.int16)
    onset = np.zeros((10, 10), np.int16)
    cls[0:4, 0:5], onset[0:4, 0:5] = 2, 2018
    cls[5:9, 5:9], onset[5:9, 5:9] = 2, 2022
    p = np.where(onset == 2022, 9700, 300).astype(np.int16)
    maps = write_tile(tmp_path / "map", cls=cls, onset=onset, p_after=p, years=range(2016, 2025))
    boxes = {"P-hi": pixel_box(5, 5, 9, 9), "P-old": pixel_box(0.5, 0.5, 3.5, 4.5), "P-mix": pixel_box(3, 3, 7.5, 7.25), "P-none": pixel_box(0, 8, 2, 10)}
    point = shapely.Point(corner(1, 1))
    far = shapely.box(X0 + 5000, Y0 - 5000, X0 + 5100, Y0 - 4900)
    geoms = [*boxes.values(), point, far, None]
    path = write_plots(tmp_path / "plots.gpkg", geoms, [*boxes, "P-pt", "P-far", "P-empty"])
    run(cfg_for(tmp_path, path, maps))
    out = tmp_path / "out" / "plots.gpkg"
    assert [tuple(layer) for layer in pyogrio.list_layers(out)] == [("plots", "MultiPolygon")]
    meta, gpkg, gp_geoms = _layer_table(out)
    assert ProjCRS.from_user_input(meta["crs"]) == ProjCRS.from_user_input(CRS) and meta["geometry_type"] == "MultiPolygon"
    csv = pd.read_csv(tmp_path / "out" / "plots.csv")
    assert list(meta["fields"]) == list(csv.columns) == table_columns(range(2016, 2025))
    pd.testing.assert_frame_equal(gpkg, csv, check_dtype=False)
    assert len(csv) == 7 and csv["id"].tolist()[:2] == ["P-hi", "P-mix"]
    # The polygons as the plots file has them (in UTM metres, not reprojected); no polygon: no geometry.
    for pid, g in zip(csv["id"], gp_geoms, strict=True):
        if pid in boxes:
            assert g.geom_type == "MultiPolygon" and g.normalize().equals_exact(shapely.MultiPolygon([boxes[pid]]).normalize(), 1e-6)
        elif pid == "P-far":
            assert g.normalize().equals_exact(shapely.MultiPolygon([far]).normalize(), 1e-6)
        else:
            assert g is None
    # The GeoJSON: the same rows, in the same order.
    gj_meta, gj, _ = _layer_table(tmp_path / "out" / "plots.geojson")
    assert gj_meta["crs"] == "EPSG:4326"
    pd.testing.assert_frame_equal(gj, csv, check_dtype=False)


def test_gpkg_keeps_a_crs_without_an_epsg_code(tmp_path):
    maps = write_tile(tmp_path / "map")
    laea = ProjCRS.from_proj4("+proj=laea +lat_0=1.8 +lon_0=117.9 +x_0=0 +y_0=0 +ellps=WGS84 +units=m +no_defs")
    to_laea = Transformer.from_crs(CRS, laea, always_xy=True)
    plot = shapely.transform(pixel_box(1, 1, 4, 4), to_laea.transform, interleaved=False)
    path = write_plots(tmp_path / "plots.gpkg", [plot], ["L"], crs=laea.to_wkt())
    (row,) = run(cfg_for(tmp_path, path, maps)).rows
    assert row.mapped_ha == pytest.approx(9 * 0.09, rel=1e-3)  # the plot landed where it should
    meta, _, geoms = _layer_table(tmp_path / "out" / "plots.gpkg")
    assert ProjCRS.from_user_input(meta["crs"]) == ProjCRS.from_user_input(pyogrio.read_info(path)["crs"])
    assert ProjCRS.from_user_input(meta["crs"]).to_epsg() is None
    assert geoms[0].normalize().equals_exact(shapely.MultiPolygon([plot]).normalize(), 1e-6)


def test_year_columns_sum_to_the_converted_area(tmp_path):
    cls = np.ones((10, 10), np.int16)
    onset = np.zeros((10, 10), np.int16)
    cols = np.arange(10)
    cls[0:5], onset[0:5] = 2, 2016 + cols % 9  # rows 0-4 converted, one onset year per column (2016 twice)
    maps = write_tile(tmp_path / "map", cls=cls, onset=onset, years=range(2013, 2025))
    # Rows 0.3-4.6 (4.3 rows), columns 0.25-9.7: column 0 covered 0.75, column 9 0.7, the rest whole.
    conv = pixel_box(0.3, 0.25, 4.6, 9.7)
    none = pixel_box(6, 0, 8, 3)
    path = write_plots(tmp_path / "plots.gpkg", [conv, none, shapely.Point(corner(7, 7))], ["conv", "none", "pt"])
    res = run(cfg_for(tmp_path, path, maps))
    years = list(range(2013, 2025))
    ycols = [f"converted_ha_{y}" for y in years]
    csv = pd.read_csv(tmp_path / "out" / "plots.csv").set_index("id")
    assert [c for c in csv.columns if c.startswith("converted_ha_")] == ycols and "years" not in csv.columns
    by_hand = {y: 0.0 for y in years} | {y: 4.3 * 0.09 for y in range(2017, 2025)} | {2016: (0.75 + 0.7) * 4.3 * 0.09}
    assert csv.loc["conv", ycols].tolist() == pytest.approx([by_hand[y] for y in years], abs=1e-4)  # to 4 decimals
    assert csv.loc["conv", "converted_ha"] == pytest.approx(4.3 * 9.45 * 0.09, abs=1e-4)
    assert csv.loc["none", ycols].tolist() == [0.0] * len(years) and csv.loc["none", "converted_ha"] == 0.0
    assert csv.loc["pt", ycols].isna().all() and np.isnan(csv.loc["pt", "converted_ha"])  # not measured: blank
    # Each measured row's year columns add up to its converted area, within the 4-decimal rounding of each.
    for pid in ("conv", "none"):
        assert abs(csv.loc[pid, ycols].sum() - csv.loc[pid, "converted_ha"]) <= (len(years) + 1) * 0.5e-4 + 1e-12
    conv_row = next(r for r in res.rows if r.id == "conv")
    assert conv_row.converted_ha == pytest.approx(sum(conv_row.years.values()), abs=1e-12)
    # plots.json keeps its {"<year>": ha} of the years with some, and the file's order.
    doc = json.loads((tmp_path / "out" / "plots.json").read_text())
    assert [p["id"] for p in doc["plots"]] == ["conv", "none", "pt"]
    assert list(doc["plots"][0]["years"]) == [str(y) for y in range(2016, 2025)] and doc["plots"][1]["years"] == {}
    gj = pyogrio.read_info(tmp_path / "out" / "plots.geojson")
    assert list(gj["fields"]) == list(csv.reset_index().columns)


def test_tables_sorted_by_verdict_then_expected_area_then_id(tmp_path):
    def row(k, pid, verdict=None, expected=None, status="ok"):
        return PlotRow(feature=k, id=pid, status=status, expected_after_ha=expected, verdict=verdict, plot_geometry=pixel_box(0, k - 1, 1, k))

    rows = [
        row(1, "b", "review", 0.3),
        row(2, "a", "review", 0.3),
        row(3, "z", "strong_evidence", 0.6),
        row(4, "c", "low_evidence", 0.09),  # more than review row k, still after every review row
        row(5, "d", "strong_evidence", 0.9),
        row(6, None, status="missing_id"),
        row(7, "e", status="outside_map"),
        row(8, "f", "review", 0.30004),  # 0.3000 as the tables show it: a tie with a and b, broken by id
        row(9, "g", "review", 0.30006),  # 0.3001: before them
        row(10, "h", "low_evidence", 0.0),
        row(11, "k", "review", 0.05),
    ]
    want = ["d", "z", "g", "a", "b", "f", "k", "c", "h", "e", None]
    assert [r.id for r in sort_rows(rows)] == want == [r.id for r in sort_rows(rows[::-1])]
    doc = {"kind": KIND, "plots": []}
    files = write_outputs(rows, doc, tmp_path / "out", crs=ProjCRS.from_user_input(CRS))
    assert [r.feature for r in rows] == list(range(1, 12))  # the caller's list is left as it was
    assert pd.read_csv(files["csv"], keep_default_na=False)["id"].tolist() == [v or "" for v in want]
    for kind in ("geojson", "gpkg"):
        assert list(pyogrio.raw.read(files[kind])[3][0]) == want
    # Every row keeps its own polygon through the sort.
    _, gp, geoms = _layer_table(files["gpkg"])
    for k, g in zip(gp["feature"], geoms, strict=True):
        assert g.normalize().equals_exact(shapely.MultiPolygon([pixel_box(0, k - 1, 1, k)]).normalize(), 1e-6)
    assert json.loads(files["json"].read_text()) == doc


def test_outputs_replace_leftovers_and_earlier_runs(tmp_path):
    maps = write_tile(tmp_path / "map")
    out = tmp_path / "out"
    out.mkdir()
    for name in ("plots.geojson.partial", "plots.csv.partial"):
        (out / name).write_bytes(b"left over from a run that was killed")
    # A GeoPackage left over: GDAL would write the plots layer into it and keep its other layers.
    write_plots(out / "plots.partial.gpkg", [pixel_box(0, 0, 1, 1)], ["old"])
    pyogrio.raw.write(
        out / "plots.partial.gpkg",
        np.array([shapely.to_wkb(pixel_box(0, 0, 1, 1))], dtype=object),
        [np.array(["x"], dtype=object)],
        ["id"],
        layer="extra",
        geometry_type="Polygon",
        crs=CRS,
        driver="GPKG",
    )
    path = write_plots(tmp_path / "plots.gpkg", [pixel_box(1, 1, 3, 3), pixel_box(5, 5, 7, 7)], ["a", "b"])
    for _ in range(2):  # the second run replaces the first's files, rather than adding to them
        run(cfg_for(tmp_path, path, maps))
        assert sorted(p.name for p in out.iterdir()) == ["plots.csv", "plots.geojson", "plots.gpkg", "plots.json"]
        assert [tuple(layer) for layer in pyogrio.list_layers(out / "plots.gpkg")] == [("plots", "MultiPolygon")]
        assert list(pyogrio.raw.read(out / "plots.gpkg")[3][0]) == ["a", "b"]


def test_read_plots_json_and_its_one_line_errors(tmp_path):
    maps = write_tile(tmp_path / "map", p_after=np.full((10, 10), 9700, np.int16))
    out = tmp_path / "out"
    with pytest.raises(InputNotFoundError, match="plots.json not found; run `plantation farmplots`"):
        read_plots_json(out)
    run(cfg_for(tmp_path, write_plots(tmp_path / "plots.gpkg", [pixel_box(1, 1, 4, 4)], ["A"]), maps))
    path = out / "plots.json"
    doc = json.loads(path.read_text())
    assert read_plots_json(out) == doc == read_plots_json(path)
    for text, message in (
        ("{not json", r"plots.json: not valid JSON \(Expecting"),
        ('"plots"', r"plots.json: holds a JSON str, not a plot check"),
        (json.dumps(doc | {"kind": "plantation-assessment/1"}), r"plots.json: kind 'plantation-assessment/1', expected 'plantation-plots/1'"),
        (json.dumps(doc | {"plots": {"A": 1}}), r"plots.json: 'plots' is a JSON dict, expected a list; the file was edited or damaged"),
        (json.dumps(doc | {"problems": ["bad"]}), r"plots.json: problems entry 1 is a JSON str, expected an object"),
    ):
        path.write_text(text)
        with pytest.raises(FileFormatError, match=message) as err:
            read_plots_json(out)
        assert "\n" not in str(err.value) and str(err.value).startswith(str(path))


# ------------------------------------------------------------------ the command and the demo plots


def test_config_composes_and_typos_are_errors():
    from plantation.cli.compose import compose_job
    from plantation.config import to_object

    cfg = to_object(compose_job("farmplots", ["cutoff=2020-06-30", "verdict.strong_min_ha=1"], verb="farmplots"), PlotsConfig)
    assert cfg.cutoff == "2020-06-30" and cfg.verdict.strong_min_ha == 1.0
    # The command draws evidence pages of the flagged plots; the library's default leaves them off (they need the imagery).
    assert cfg.evidence.enabled and cfg.evidence.verdicts == ["strong_evidence", "review"] and not PlotsConfig().evidence.enabled
    assert cfg.map == f"outputs/maps/{cfg.region.name}" and cfg.out_dir == f"outputs/assess/{cfg.region.name}"
    assert to_object(compose_job("farmplots", ["cutoff=2020"], verb="farmplots"), PlotsConfig).cutoff == "2020"
    with pytest.raises(ConfigError, match=r"unknown key 'verdict.strong_min' \(did you mean 'verdict.strong_min_ha'\?\)"):
        compose_job("farmplots", ["+verdict.strong_min=1"], verb="farmplots")


def _script(*overrides: str) -> subprocess.CompletedProcess:
    """`plantation farmplots key=value ...`, through the console entry point installed beside this interpreter."""
    return subprocess.run([str(Path(sys.executable).parent / "plantation"), "farmplots", *overrides], cwd=ROOT, capture_output=True, text=True, timeout=600)


def test_script_on_a_tiny_map(tmp_path):
    maps = write_tile(tmp_path / "map", p_after=np.full((10, 10), 9700, np.int16))
    plots = write_plots(tmp_path / "plots.gpkg", [pixel_box(1, 1, 4, 4), shapely.Point(corner(5, 5))], ["A", "B"])
    res = _script(f"plots={plots}", f"map={maps}", f"out_dir={tmp_path / 'out'}", "progress=false", "evidence.enabled=false")
    assert res.returncode == 0, res.stderr
    assert "strong_evidence      1" in res.stdout and "problem              1" in res.stdout
    assert f"{plots}: feature 2 (id 'B'): not_a_polygon" in res.stdout
    assert str(tmp_path / "out" / "plots.json") in res.stdout and "not a finding about any plot or person" in res.stdout
    bad = _script(f"plots={tmp_path / 'none.gpkg'}", f"map={maps}", f"out_dir={tmp_path / 'out2'}")
    assert bad.returncode == 1
    lines = bad.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and "none.gpkg: plots file does not exist" in lines[0]
    assert not (tmp_path / "out2").exists()


def test_demo_plots_regenerate_from_the_truth(tmp_path):
    """toy_tiles/plots.geojson is what _write_plots makes of the toy truth rasters (byte for byte)."""
    from plantation.cli.compose import compose_job
    from plantation.config import to_object
    from plantation.simulation.scenario import SimulationConfig
    from plantation.simulation.writer import _write_plots

    sim = to_object(compose_job("simulate", [], verb="simulate").sim, SimulationConfig)
    for t in ("t01", "t02"):
        (tmp_path / t).mkdir()
        shutil.copy(ROOT / "toy_tiles" / t / "truth.tif", tmp_path / t / "truth.tif")
    _write_plots(sim, tmp_path)
    assert (tmp_path / "plots.geojson").read_bytes() == (ROOT / "toy_tiles" / "plots.geojson").read_bytes()
    meta, _, wkb, fields = pyogrio.raw.read(tmp_path / "plots.geojson")
    geoms = shapely.from_wkb(wkb)
    assert meta["crs"] == "EPSG:4326" and list(meta["fields"]) == ["id", "holder"]
    assert 35 <= len(geoms) <= 45 and len(set(fields[0])) == len(geoms) and fields[0][0] == "SLV-P0001"
    assert shapely.is_valid(geoms).all() and (shapely.get_type_id(geoms) == shapely.GeometryType.POLYGON).all()
    utm = [shapely.transform(g, Transformer.from_crs("EPSG:4326", CRS, always_xy=True).transform, interleaved=False) for g in geoms]
    seam = sim.origin_x + sim.tile_size * sim.pixel_size  # t01's east edge
    assert sum(g.bounds[0] < seam - 30 and g.bounds[2] > seam + 30 for g in utm) >= 1
    # Edges off the pixel grid: vertices that are not on 30 m lines.
    xy = np.concatenate([shapely.get_coordinates(g) for g in utm]) - [sim.origin_x, sim.origin_y]
    assert np.mean(np.abs(xy / 30 - np.round(xy / 30)) > 0.01) > 0.5


TOY_MAP = ROOT / "outputs" / "maps" / "selvara_toy"


@pytest.mark.slow
@pytest.mark.skipif(not (TOY_MAP / "manifest.json").is_file(), reason="needs the toy map: plantation map")
def test_script_on_the_toy_map(tmp_path):
    res = _script(f"map={TOY_MAP}", f"out_dir={tmp_path}", "progress=false")
    assert res.returncode == 0, res.stderr
    doc = json.loads((tmp_path / "plots.json").read_text())
    assert len(doc["plots"]) == 40 and doc["counts"]["problem"] == 0
    assert sum(doc["counts"].values()) == 40
    # Demo plots lie on the map (a few cross its outer edge by their shift of
    # a few metres): mapped share is UTM's areal scale there, about 0.9995.
    shares = np.array([p["mapped_share"] for p in doc["plots"]])
    assert (shares > 0.95).all() and (shares < 1.0).all() and np.mean(np.abs(shares - 0.9995) < 5e-4) > 0.9
    # A page of evidence per flagged plot, from the toy imagery.
    ev = read_evidence(tmp_path)
    flagged = [p["id"] for p in doc["plots"] if p["verdict"] in ("strong_evidence", "review")]
    assert sorted(p["id"] for p in ev["pages"]) == sorted(flagged)
    assert all((tmp_path / "evidence" / p["file"]).stat().st_size > 20_000 for p in ev["pages"])
