"""Reference labels: reprojection onto the grid (checked against pyproj) and every bad label input."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyogrio
import pytest
import shapely
from pyproj import Transformer
from rasterio.crs import CRS as RioCRS

from plantation.errors import LabelError
from plantation.imagery.region import Grid
from plantation.reference.labels import read_labels
from tests.conftest import CRS, TRANSFORM, pixel_centre

GRIDS = {"t1": Grid(RioCRS.from_user_input(CRS), TRANSFORM, 8, 8)}
YEARS = [2015, 2016, 2017]
TO_LONLAT = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)


def lonlat(row: int, col: int) -> tuple[float, float]:
    x, y = pixel_centre(row, col)
    lon, lat = TO_LONLAT.transform(x, y)
    return float(lon), float(lat)


def write_csv(path: Path, rows: list[tuple]) -> Path:
    lines = ["x,y,label,onset_year"] + [",".join("" if v is None else str(v) for v in r) for r in rows]
    path.write_text("\n".join(lines) + "\n")
    return path


def test_lonlat_points_land_on_their_pixels(tmp_path):
    # Points placed at known pixel centres in UTM, written as lon/lat (pyproj),
    # must come back to the same row and column.
    cells = [(0, 0, "stable_forest", None), (3, 5, "conversion", 2016), (7, 7, "other", None), (6, 1, "old_plantation", "")]
    rows = [(*lonlat(r, c), lab, yr) for r, c, lab, yr in cells]
    ls = read_labels(write_csv(tmp_path / "l.csv", rows), grids=GRIDS, years=YEARS)
    assert ls.points[["row", "col"]].values.tolist() == [[r, c] for r, c, _, _ in cells]
    assert ls.points["onset_year"].tolist() == [0, 2016, 0, 0]
    assert ls.counts() == {"stable_forest": 1, "conversion": 1, "old_plantation": 1, "other": 1}
    x, y = pixel_centre(3, 5)
    assert ls.points.loc[1, "x"] == pytest.approx(x, abs=1e-3) and ls.points.loc[1, "y"] == pytest.approx(y, abs=1e-3)


def test_fingerprint_follows_content_not_order(tmp_path):
    a = [(*lonlat(1, 1), "stable_forest", None), (*lonlat(2, 2), "conversion", 2017)]
    fa = read_labels(write_csv(tmp_path / "a.csv", a), grids=GRIDS, years=YEARS).fingerprint
    fb = read_labels(write_csv(tmp_path / "b.csv", a[::-1]), grids=GRIDS, years=YEARS).fingerprint
    fc = read_labels(write_csv(tmp_path / "c.csv", [a[0], (*lonlat(2, 2), "conversion", 2016)]), grids=GRIDS, years=YEARS).fingerprint
    assert fa == fb != fc


def test_geopackage_in_its_own_crs(tmp_path):
    x, y = pixel_centre(4, 2)
    path = tmp_path / "pts.gpkg"
    geom = shapely.to_wkb(shapely.points([x], [y]))
    pyogrio.raw.write(path, geom, [np.array(["conversion"], dtype=object), np.array([2015], np.int32)], ["label", "onset_year"], crs=CRS, geometry_type="Point", driver="GPKG")
    ls = read_labels(path, grids=GRIDS, years=YEARS, csv_crs=None)
    assert ls.points[["row", "col", "onset_year"]].values.tolist() == [[4, 2, 2015]]


def test_identical_duplicates_are_kept_once(tmp_path):
    p = (*lonlat(2, 3), "stable_forest", None)
    ls = read_labels(write_csv(tmp_path / "d.csv", [p, p]), grids=GRIDS, years=YEARS)
    assert len(ls.points) == 1


@pytest.mark.parametrize(
    ("rows", "message"),
    [
        ([(*lonlat(1, 1), "forest", None)], r"line 2: unknown label 'forest'; expected one of"),
        ([(*lonlat(1, 1), "stable_forest", None), (*lonlat(2, 2), "conversion", None)], r"line 3: conversion needs an onset_year"),
        ([(*lonlat(1, 1), "conversion", 2011)], r"line 2: onset_year 2011 is outside the imagery's years 2015–2017"),
        ([(*lonlat(1, 1), "conversion", 2018)], r"line 2: onset_year 2018 is outside"),
        ([(*lonlat(1, 1), "stable_forest", None), (117.0, 5.0, "other", None)], r"line 3: point \(117.0, 5.0\) in EPSG:4326 is outside the imagery"),
        ([(*lonlat(1, 1), "stable_forest", None), (*lonlat(1, 1), "conversion", 2016)], r"lines 2, 3 label the same pixel \(tile t1, row 1, col 1\) differently"),
        ([("abc", 1.0, "other", None)], r"line 2: x 'abc' is not a number"),
    ],
)
def test_bad_rows_name_the_line(tmp_path, rows, message):
    path = write_csv(tmp_path / "bad.csv", rows)
    with pytest.raises(LabelError, match=rf"bad\.csv: {message}"):
        read_labels(path, grids=GRIDS, years=YEARS)


def test_empty_file_and_header_only(tmp_path):
    (tmp_path / "e.csv").write_text("")
    with pytest.raises(LabelError, match=r"e\.csv: the labels file is empty"):
        read_labels(tmp_path / "e.csv", grids=GRIDS, years=YEARS)
    (tmp_path / "h.csv").write_text("x,y,label,onset_year\n")
    with pytest.raises(LabelError, match=r"h\.csv: the labels file has no rows"):
        read_labels(tmp_path / "h.csv", grids=GRIDS, years=YEARS)


def test_missing_columns(tmp_path):
    (tmp_path / "m.csv").write_text("lon,lat,label\n1,2,other\n")
    with pytest.raises(LabelError, match=r"missing column\(s\) \['x', 'y', 'onset_year'\]"):
        read_labels(tmp_path / "m.csv", grids=GRIDS, years=YEARS)


def test_no_crs(tmp_path):
    path = write_csv(tmp_path / "n.csv", [(*lonlat(1, 1), "other", None)])
    with pytest.raises(LabelError, match=r"n\.csv: no CRS for the x/y columns"):
        read_labels(path, grids=GRIDS, years=YEARS, csv_crs=None)
    gj = tmp_path / "n.geojson"
    gj.write_text('{"type":"FeatureCollection","features":[{"type":"Feature","properties":{"label":"other","onset_year":null},"geometry":{"type":"Point","coordinates":[1,2]}}]}')
    # GeoJSON without a crs member is WGS 84 by RFC 7946, so GDAL reports EPSG:4326:
    # the point is then checked against the grid and found outside.
    with pytest.raises(LabelError, match=r"feature 1: point .* is outside the imagery"):
        read_labels(gj, grids=GRIDS, years=YEARS)


def test_vector_file_without_crs(tmp_path):
    x, y = pixel_centre(1, 1)
    path = tmp_path / "nocrs.gpkg"
    pyogrio.raw.write(path, shapely.to_wkb(shapely.points([x], [y])), [np.array(["other"], dtype=object), np.array([0], np.int32)], ["label", "onset_year"], geometry_type="Point", driver="GPKG")
    with pytest.raises(LabelError, match=r"nocrs\.gpkg: the file has no CRS"):
        read_labels(path, grids=GRIDS, years=YEARS)


def test_a_byte_order_mark_is_accepted(tmp_path):
    path = tmp_path / "bom.csv"
    path.write_bytes(("x,y,label,onset_year\n{},{},conversion,2016\n".format(*lonlat(3, 4))).encode("utf-8-sig"))  # as spreadsheet programs save "CSV UTF-8"
    ls = read_labels(path, grids=GRIDS, years=YEARS)
    assert ls.points[["row", "col", "onset_year"]].values.tolist() == [[3, 4, 2016]]


def test_a_file_not_in_utf8_names_the_line_and_byte(tmp_path):
    path = tmp_path / "latin.csv"
    rows = ["x,y,label,onset_year,note", "{},{},other,,ok".format(*lonlat(1, 1)), "{},{},other,,forêt".format(*lonlat(2, 2))]
    path.write_bytes("\n".join(rows).encode("latin-1"))
    with pytest.raises(LabelError, match=r"latin\.csv: line 3: byte 0xea is not UTF-8 text; save the file as UTF-8"):
        read_labels(path, grids=GRIDS, years=YEARS)


def _gpkg(path: Path, geoms: list, geometry_type: str | None) -> Path:
    wkb = None if geometry_type is None else shapely.to_wkb(np.array(geoms, dtype=object))
    fields = [np.array(["other"] * max(len(geoms), 1), dtype=object), np.zeros(max(len(geoms), 1), np.int32)]
    pyogrio.raw.write(path, wkb, fields, ["label", "onset_year"], crs=None if geometry_type is None else CRS, geometry_type=geometry_type, driver="GPKG", layer="pts")
    return path


def test_geopackages_without_a_layer_or_points_are_refused(tmp_path):
    import sqlite3

    x, y = pixel_centre(1, 1)
    poly = _gpkg(tmp_path / "poly.gpkg", [shapely.box(x - 5, y - 5, x + 5, y + 5)], "Polygon")
    with pytest.raises(LabelError, match=r"poly\.gpkg: feature 1: geometry is Polygon, not a point \(1 such\)"):
        read_labels(poly, grids=GRIDS, years=YEARS)
    table = _gpkg(tmp_path / "table.gpkg", [], None)
    with pytest.raises(LabelError, match=r"table\.gpkg: the layer has no geometry"):
        read_labels(table, grids=GRIDS, years=YEARS)
    # A GeoPackage whose only layer was dropped: GDAL no longer opens it at all.
    empty = _gpkg(tmp_path / "empty.gpkg", [shapely.Point(x, y)], "Point")
    with sqlite3.connect(empty) as con:
        con.execute("DELETE FROM gpkg_contents")
        con.execute("DELETE FROM gpkg_geometry_columns")
        con.execute("DROP TABLE pts")
    with pytest.raises(LabelError, match=r"empty\.gpkg: the GeoPackage has no layer"):
        read_labels(empty, grids=GRIDS, years=YEARS)
