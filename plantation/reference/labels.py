"""Reference points labelled by interpreters, checked and placed on the imagery grid.

Accepted files:

* CSV with columns ``x``, ``y``, ``label``, ``onset_year`` (coordinates in the
  CRS the region config names, EPSG:4326 by default: x = longitude,
  y = latitude);
* GeoPackage or GeoJSON points with attributes ``label`` and ``onset_year``
  (their own CRS is used).

Labels are one of :data:`LABEL_NAMES`. ``onset_year`` (the calendar year in
which forest was cleared for the plantation) is required for ``conversion``,
must lie inside the imagery's years, and is ignored for the other labels.

Where the region config names an ``inclusion_column``, that column (or
attribute) holds each point's inclusion probability π in (0, 1] under the
sampling design; it is kept as the points' ``inclusion`` column.

Broken files are refused in one line naming the file and, where there is
one, the line or feature: a CSV must be UTF-8 (a byte-order mark, as
spreadsheet programs write "CSV UTF-8", is read and dropped; another
encoding is refused at the line of its first undecodable byte); a
GeoPackage must hold a layer, and that layer points (a GeoPackage whose
layer was dropped, a table without geometry, or polygons are refused).

A point may fall on a pixel the imagery never sees clear (cloud on every
date, nodata, masked values): it is placed and kept here, since the reader
does not look at pixel values. Such a pixel has an all-masked input; the
map marks it nodata (fewer than ``min_clear`` clear dates), so the point
tells nothing about the map there.
"""

from __future__ import annotations

import hashlib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
from pyproj import CRS, Transformer

from plantation.errors import InputNotFoundError, LabelError
from plantation.imagery.region import Grid

#: Label names in code order (code = index + 1; 0 is reserved for "no data").
LABEL_NAMES: tuple[str, ...] = ("stable_forest", "conversion", "old_plantation", "other")
LABEL_CODES: dict[str, int] = {n: i + 1 for i, n in enumerate(LABEL_NAMES)}

_VECTOR_SUFFIXES = (".gpkg", ".geojson", ".json")


@dataclass
class LabelSet:
    """Validated reference points on the imagery grid.

    Attributes:
        points: one row per labelled pixel with columns ``label`` (str),
            ``code`` (int, see :data:`LABEL_CODES`), ``onset_year`` (int,
            0 unless ``label == "conversion"``), ``tile`` (tile name),
            ``row``/``col`` (pixel indices in that tile), ``x``/``y``
            (coordinates in the imagery CRS), ``source`` (the file's line
            or feature number, for messages) and, when an inclusion column
            was read, ``inclusion`` (float64 π in (0, 1]).
        fingerprint: SHA-256 of the sorted (tile, row, col, label, onset)
            records: two label sets with the same content share it.
        path: the file read.
    """

    points: pd.DataFrame
    fingerprint: str
    path: Path

    def counts(self) -> dict[str, int]:
        """Number of points per label (every label present, zeros included)."""
        c = self.points["label"].value_counts()
        return {n: int(c.get(n, 0)) for n in LABEL_NAMES}


def read_table(path: Path, csv_crs: str | None, extra: Sequence[str] = ()) -> tuple[pd.DataFrame, CRS, str]:
    """Raw table with x, y, label, onset_year (and the ``extra`` columns) and the unit of its row numbers."""
    if not path.exists():
        raise InputNotFoundError(f"{Path(path).absolute()}: labels file does not exist")
    suffix = path.suffix.lower()
    if suffix == ".csv":
        if csv_crs is None:
            raise LabelError(f"{path}: no CRS for the x/y columns; set region.labels.crs (e.g. EPSG:4326)")
        try:
            # utf-8-sig: a byte-order mark (as spreadsheet programs write) is read and dropped.
            table = pd.read_csv(path, dtype={"label": str}, encoding="utf-8-sig")
        except pd.errors.EmptyDataError:
            raise LabelError(f"{path}: the labels file is empty") from None
        except UnicodeDecodeError:
            raise LabelError(f"{path}: {_not_utf8(path)}") from None
        except pd.errors.ParserError as exc:
            raise LabelError(f"{path}: cannot parse as CSV ({str(exc).splitlines()[0]})") from None
        table.columns = [str(c).strip() for c in table.columns]
        missing = [c for c in ("x", "y", "label", "onset_year", *extra) if c not in table.columns]
        if missing:
            raise LabelError(f"{path}: missing column(s) {missing}; expected x, y, label, onset_year{''.join(', ' + c for c in extra)}")
        # Line numbers as a text editor shows them: the header is line 1.
        table["source"] = np.arange(len(table)) + 2
        for col in ("x", "y"):
            num = pd.to_numeric(table[col], errors="coerce")
            bad = num.isna()
            if bad.any():
                line = int(table.loc[bad, "source"].iloc[0])
                raise LabelError(f"{path}: line {line}: {col} {table.loc[bad, col].iloc[0]!r} is not a number")
            table[col] = num.astype(float)
        try:
            crs = CRS.from_user_input(csv_crs)
        except Exception:
            raise LabelError(f"{path}: region.labels.crs {csv_crs!r} is not a CRS pyproj knows") from None
        return table, crs, "line"
    if suffix in _VECTOR_SUFFIXES:
        import pyogrio
        import shapely

        if suffix == ".gpkg" and _geopackage_layers(path) == 0:
            raise LabelError(f"{path}: the GeoPackage has no layer; export the points into it as a point layer")
        try:
            meta, _, geom, fields = pyogrio.raw.read(path)
        except Exception as exc:  # pyogrio raises several error types for unreadable files
            raise LabelError(f"{path}: cannot read as a vector file ({str(exc).splitlines()[0]})") from None
        if geom is None:
            raise LabelError(f"{path}: the layer has no geometry (a table without points); export the points as a point layer")
        if meta["crs"] is None:
            raise LabelError(f"{path}: the file has no CRS; assign one when exporting it")
        names = list(meta["fields"])
        missing = [c for c in ("label", "onset_year", *extra) if c not in names]
        if missing:
            raise LabelError(f"{path}: missing attribute(s) {missing}; expected label, onset_year{''.join(', ' + c for c in extra)}")
        pts = shapely.from_wkb(geom)
        kinds = shapely.get_type_id(pts)
        if len(pts) and (kinds != shapely.GeometryType.POINT).any():
            i = int(np.flatnonzero(kinds != shapely.GeometryType.POINT)[0])
            kind = "missing" if pts[i] is None else pts[i].geom_type
            raise LabelError(f"{path}: feature {i + 1}: geometry is {kind}, not a point ({int((kinds != shapely.GeometryType.POINT).sum())} such); labels are points, export centroids")
        table = pd.DataFrame(
            {
                "x": shapely.get_x(pts),
                "y": shapely.get_y(pts),
                "label": fields[names.index("label")],
                "onset_year": fields[names.index("onset_year")],
                "source": np.arange(len(pts)) + 1,
                **{c: fields[names.index(c)] for c in extra},
            }
        )
        return table, CRS.from_user_input(meta["crs"]), "feature"
    raise LabelError(f"{path}: unsupported labels format {suffix!r}; use .csv, .gpkg or .geojson")


def _not_utf8(path: Path) -> str:
    """Where a file stops being UTF-8 text: its first undecodable byte, by line."""
    data = path.read_bytes()
    try:
        data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data.count(b"\n", 0, exc.start) + 1
        return f"line {line}: byte 0x{data[exc.start]:02x} is not UTF-8 text; save the file as UTF-8 (CSV UTF-8 in a spreadsheet program)"
    return "not UTF-8 text; save the file as UTF-8"


def _geopackage_layers(path: Path) -> int | None:
    """The number of vector layers a GeoPackage lists (None: not a GeoPackage's tables, left to the reader to refuse)."""
    import sqlite3

    try:
        with sqlite3.connect(f"file:{path}?mode=ro", uri=True) as con:
            return int(con.execute("SELECT count(*) FROM gpkg_contents WHERE data_type IN ('features', 'attributes')").fetchone()[0])
    except sqlite3.Error:
        return None


def read_labels(path: str | Path, *, grids: dict[str, Grid], years: Sequence[int], csv_crs: str | None = "EPSG:4326", inclusion_column: str | None = None) -> LabelSet:
    """Read, check and place reference points on the imagery.

    Args:
        path: CSV, GeoPackage or GeoJSON file.
        grids: tile name → grid; every point must fall inside one tile.
        years: the calendar years the imagery covers; conversion onsets must
            lie among them.
        csv_crs: CRS of a CSV's x/y columns.
        inclusion_column: column (attribute) holding each point's inclusion
            probability π in (0, 1]; None = none read.

    Returns:
        A :class:`LabelSet`. Points repeated with identical values are kept once.

    Raises:
        LabelError: empty file, missing columns, unknown label, missing or
            out-of-range onset year, no CRS, a point outside every tile, or
            the same pixel labelled twice with different values, a missing
            inclusion column or a π not in (0, 1]. The message
            names the file and line (CSV) or feature (vector) number.
    """
    path = Path(path)
    extra = (inclusion_column,) if inclusion_column else ()
    table, crs, unit = read_table(path, csv_crs, extra)
    if table.empty:
        raise LabelError(f"{path}: the labels file has no rows")
    if inclusion_column:
        pi = pd.to_numeric(table[inclusion_column], errors="coerce").to_numpy(dtype=np.float64)
        # π = 0 means the point could not have been drawn; π > 1 is not a probability.
        bad = ~np.isfinite(pi) | (pi <= 0) | (pi > 1)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise LabelError(
                f"{path}: {unit} {table['source'].iloc[i]}: inclusion probability {table[inclusion_column].iloc[i]!r} (column {inclusion_column!r}) is not a number in (0, 1] "
                f"({int(bad.sum())} bad); fix the sampling design's probabilities or set region.labels.inclusion_column=null"
            )

    labels = table["label"].astype(str).str.strip()
    unknown = ~labels.isin(LABEL_NAMES)
    if unknown.any():
        i = int(np.flatnonzero(unknown.to_numpy())[0])
        raise LabelError(f"{path}: {unit} {table['source'].iloc[i]}: unknown label {labels.iloc[i]!r}; expected one of {list(LABEL_NAMES)}")
    onset = pd.to_numeric(table["onset_year"], errors="coerce")
    conv = (labels == "conversion").to_numpy()
    lo, hi = int(min(years)), int(max(years))
    bad_missing = conv & onset.isna().to_numpy()
    if bad_missing.any():
        i = int(np.flatnonzero(bad_missing)[0])
        raise LabelError(f"{path}: {unit} {table['source'].iloc[i]}: conversion needs an onset_year (the field is empty or not a number)")
    ov = onset.to_numpy()
    bad_range = conv & ((ov < lo) | (ov > hi) | (ov != np.round(ov)))
    if bad_range.any():
        i = int(np.flatnonzero(bad_range)[0])
        raise LabelError(f"{path}: {unit} {table['source'].iloc[i]}: onset_year {table['onset_year'].iloc[i]} is outside the imagery's years {lo}–{hi}")

    # Reproject to the imagery CRS (all tiles share one CRS) and find each point's tile.
    first = next(iter(grids.values()))
    to_img = Transformer.from_crs(crs, CRS.from_user_input(first.crs.to_wkt()), always_xy=True)
    xs, ys = to_img.transform(table["x"].to_numpy(), table["y"].to_numpy())
    xs, ys = np.asarray(xs, dtype=float), np.asarray(ys, dtype=float)
    tile = np.full(len(table), "", dtype=object)
    rows = np.full(len(table), -1, dtype=np.int64)
    cols = np.full(len(table), -1, dtype=np.int64)
    for name, g in grids.items():
        inv = ~g.transform
        c, r = inv * (xs, ys)
        r, c = np.floor(r).astype(np.int64), np.floor(c).astype(np.int64)
        inside = (r >= 0) & (r < g.height) & (c >= 0) & (c < g.width) & (tile == "")
        tile[inside], rows[inside], cols[inside] = name, r[inside], c[inside]
    outside = tile == ""
    if outside.any():
        i = int(np.flatnonzero(outside)[0])
        raise LabelError(
            f"{path}: {unit} {table['source'].iloc[i]}: point ({table['x'].iloc[i]}, {table['y'].iloc[i]}) in {crs.to_string()} "
            f"is outside the imagery ({int(outside.sum())} point(s) outside); check the coordinates' CRS"
        )

    points = pd.DataFrame(
        {
            "label": labels.to_numpy(),
            "code": labels.map(LABEL_CODES).to_numpy(dtype=np.uint8),
            "onset_year": np.where(conv, np.nan_to_num(ov), 0).astype(np.int16),
            "tile": tile.astype(str),
            "row": rows,
            "col": cols,
            "x": xs,
            "y": ys,
            "source": table["source"].to_numpy(),
        }
    )
    if inclusion_column:
        points["inclusion"] = pi
    key = ["tile", "row", "col"]
    dup = points.duplicated(key, keep=False)
    if dup.any():
        clash = points[dup].groupby(key)[["label", "onset_year"]].nunique().max(axis=1) > 1
        if clash.any():
            t, r, c = clash[clash].index[0]
            at = points[(points.tile == t) & (points.row == r) & (points.col == c)]
            srcs = ", ".join(str(s) for s in at["source"])
            vals = ", ".join(f"{lab}/{yr}" for lab, yr in zip(at["label"], at["onset_year"], strict=True))
            raise LabelError(f"{path}: {unit}s {srcs} label the same pixel (tile {t}, row {r}, col {c}) differently: {vals}")
        points = points.drop_duplicates(key, keep="first").reset_index(drop=True)
    return LabelSet(points=points, fingerprint=fingerprint(points), path=path)


def fingerprint(points: pd.DataFrame) -> str:
    """SHA-256 over the sorted (tile, row, col, label, onset_year) records."""
    rec = points[["tile", "row", "col", "label", "onset_year"]].sort_values(["tile", "row", "col"])
    text = rec.to_csv(index=False, lineterminator="\n")
    return hashlib.sha256(text.encode()).hexdigest()
