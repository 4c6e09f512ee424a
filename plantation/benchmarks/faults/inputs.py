"""Bad data inside valid files, and broken files, fed to the ``plantation`` command on a damaged copy of the demo region.

Two kinds of case:

* **masked**: values no surface gives (NaN, ±inf, reflectance far outside
  0–1, saturated values, a date of zeros, cloud on every date) inside files
  that read well. The run must finish and leave those pixel-dates out: the
  survey's clear-date count (``clear_count_<tile>.tif``) at each damaged
  pixel drops by exactly the damaged dates that were clear, and nowhere
  else. The expected count is worked out here from the files' own QA band
  and nodata value with rasterio and numpy, not through the reader tried.
* **refused**: a broken file (a date file garbage after its first blocks, one
  cut short, a NetCDF of the wrong dims, labels in another encoding or
  without a column, a GeoPackage without a layer or points, a region file
  with a typo'd key or a wrong type, a STAC item whose asset is missing).
  The run must exit non-zero with one ``error:`` line naming the file and
  the problem, no traceback, and leave no finished-looking output (a
  ``survey.json``, ``manifest.json``, ``model.json`` or map tile).

Every case copies what it damages into its scratch folder
(:meth:`~plantation.benchmarks.faults.Workspace.copy_tiles`).
"""

from __future__ import annotations

import csv
import datetime as dt
import json
import sqlite3
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np
import rasterio

from plantation.benchmarks.faults import Case, Outcome, Ran, Workspace
from plantation.mapping.folder import BAND, NODATA

#: The demo region's QA rule (configs/region/toy.yaml): bits 0 cloud, 1 shadow, 2 fill; nodata −9999.
TOY_QA_BITS = 0b111
TOY_NODATA = -9999
#: Band of the QA layer in the demo region's files.
TOY_QA_BAND = 7
#: The block damaged in the masking cases: rows and columns of tile t01.
BLOCK = (slice(40, 72), slice(100, 140))
#: Files whose presence means an output was finished.
FINISHED = ("survey.json", "manifest.json", "model.json", "summary.json")


# ------------------------------------------------------------------ helpers


def _dates(tiles: Path, tile: str = "t01") -> list[Path]:
    return sorted((tiles / tile / "imagery").glob("*.tif"))


def _clear(path: Path) -> np.ndarray:
    """(y, x) bool: clear by the file's own QA band and nodata value, read directly (the reference the reader's count is checked against)."""
    with rasterio.open(path) as src:
        data = src.read()
    refl, qa = data[: TOY_QA_BAND - 1], data[TOY_QA_BAND - 1].astype(np.int64)
    return ((qa & TOY_QA_BITS) == 0) & ~(refl == TOY_NODATA).any(0)


def _finished(out: Path) -> list[str]:
    """Outputs under ``out`` that look finished (a refused run must leave none)."""
    if not out.exists():
        return []
    return sorted(str(p.relative_to(out)) for p in out.rglob("*") if p.is_file() and (p.name in FINISHED or (p.suffix == ".tif" and p.parent == out)))


def _refusal(ran: Ran, out: Path, names: Sequence[str]) -> Outcome:
    """A refusal held: non-zero exit, one ``error:`` line naming each of ``names``, no traceback, nothing finished left in ``out``."""
    missing = [n for n in names if n not in ran.last_line]
    left = _finished(out)
    held = ran.refused_in_one_line() and not missing and not left
    detail = {"returncode": ran.returncode, "not_named": missing, "left": left, "seconds": round(ran.seconds, 1)}
    return Outcome(held, ran.last_line or f"exit {ran.returncode}, nothing on stderr", corrupt_outputs=len(left), traceback=ran.traceback, detail=detail)


def _survey_refuses(ws: Workspace, scratch: Path, damage: Callable[[Path], None], names: Callable[[Path], Sequence[str]], region: Path | None = None) -> Outcome:
    """Damage a copy of the tiles (``damage(scratch)``), run the survey, expect a refusal naming ``names(scratch)``."""
    region = region or ws.copy_tiles(scratch)
    damage(scratch)
    out = scratch / "survey"
    return _refusal(ws.cli("survey", f"region={region}", f"out_dir={out}"), out, names(scratch))


def _masked(ws: Workspace, scratch: Path, damage: Callable[[list[Path]], np.ndarray]) -> Outcome:
    """Damage tile t01's date files in place (``damage`` returns the (date, y, x) pixel-dates it spoilt), run the survey, check the clear-date count.

    Held: exit 0, and the count is the files' own clear count minus the
    spoilt pixel-dates that were clear, everywhere.
    """
    region = ws.copy_tiles(scratch)
    files = _dates(scratch / "tiles")
    before = np.stack([_clear(f) for f in files])
    spoilt = damage(files)
    want = (before & ~spoilt).sum(0)
    out = scratch / "survey"
    ran = ws.cli("survey", f"region={region}", f"out_dir={out}")
    detail: dict = {"returncode": ran.returncode, "seconds": round(ran.seconds, 1), "pixel_dates_spoilt": int((before & spoilt).sum())}
    if ran.returncode != 0:
        return Outcome(False, ran.last_line or f"exit {ran.returncode}", traceback=ran.traceback, detail=detail)
    with rasterio.open(out / "clear_count_t01.tif") as src:
        got = src.read(1)
    wrong = got != want
    detail.update(pixels_wrong=int(wrong.sum()), pixels_spoilt=int(spoilt.any(0).sum()))
    if wrong.any():
        r, c = np.argwhere(wrong)[0]
        return Outcome(False, f"clear-date count at row {r}, col {c} is {got[r, c]}, expected {want[r, c]} ({int(wrong.sum())} pixels wrong)", detail=detail)
    if detail["pixel_dates_spoilt"] < 100:
        return Outcome(False, f"only {detail['pixel_dates_spoilt']} spoilt pixel-dates were clear: the case tests too little", detail=detail)
    return Outcome(True, f"survey finished; {detail['pixel_dates_spoilt']} spoilt pixel-dates left out of the clear count, none elsewhere", detail=detail)


def _clearest(files: list[Path], rank: int) -> int:
    """The date whose block is clear on the most pixels (``rank`` 0), the next (1), ...: a spoilt cloudy date would test nothing."""
    counts = [int(_clear(f)[BLOCK].sum()) for f in files]
    return int(np.argsort(counts, kind="stable")[::-1][rank])


def _rewrite(path: Path, change: Callable[[np.ndarray], np.ndarray], dtype: str | None = None) -> None:
    """Rewrite a date file with ``change`` applied to its (band, y, x) values, optionally as another type."""
    with rasterio.open(path) as src:
        data, prof = src.read(), src.profile
    data = change(data.astype(dtype) if dtype else data)
    if dtype:
        prof.update(dtype=dtype)
    with rasterio.open(path, "w", **prof) as dst:
        dst.write(data)


def _spoil(files: list[Path], k: int, change: Callable[[np.ndarray], None], dtype: str | None = None) -> np.ndarray:
    """Apply ``change`` to the block of date ``k``'s reflectance bands; the (date, y, x) mask of what was spoilt."""

    def edit(data: np.ndarray) -> np.ndarray:
        change(data[: TOY_QA_BAND - 1, BLOCK[0], BLOCK[1]])
        return data

    _rewrite(files[k], edit, dtype)
    with rasterio.open(files[0]) as src:
        shape = (len(files), src.height, src.width)
    spoilt = np.zeros(shape, bool)
    spoilt[k, BLOCK[0], BLOCK[1]] = True
    return spoilt


# ------------------------------------------------------- bad data, masked


def _nan_inf(ws: Workspace, scratch: Path) -> Outcome:
    def damage(files: list[Path]) -> np.ndarray:
        def change(b: np.ndarray) -> None:
            b[0, ::3] = np.nan
            b[2, 1::3] = np.inf
            b[4, 2::3] = -np.inf

        # A float32 date among int16 ones: NaN and inf are only storable as floats.
        return _spoil(files, _clearest(files, 0), change, dtype="float32")

    return _masked(ws, scratch, damage)


def _out_of_range(ws: Workspace, scratch: Path) -> Outcome:
    def damage(files: list[Path]) -> np.ndarray:
        def change(b: np.ndarray) -> None:
            b[3] = 25000  # 2.5 after scaling: a value no surface reflects
            b[1, ::2] = -5000  # −0.5

        return _spoil(files, _clearest(files, 1), change)

    return _masked(ws, scratch, damage)


def _saturated(ws: Workspace, scratch: Path) -> Outcome:
    def damage(files: list[Path]) -> np.ndarray:
        return _spoil(files, _clearest(files, 2), lambda b: b[5].fill(np.iinfo(np.int16).max))

    return _masked(ws, scratch, damage)


def _zero_date(ws: Workspace, scratch: Path) -> Outcome:
    def damage(files: list[Path]) -> np.ndarray:
        # A clear date after 2021-01-01, where the scaling's −0.1 offset would make 0 stored a plausible −0.1.
        k = max((i for i, f in enumerate(files) if f.name >= "2021"), key=lambda i: int(_clear(files[i]).sum()))
        _rewrite(files[k], lambda d: np.concatenate([np.zeros_like(d[: TOY_QA_BAND - 1]), np.zeros_like(d[TOY_QA_BAND - 1 :])]))
        spoilt = np.zeros((len(files), *_clear(files[0]).shape), bool)
        spoilt[k] = True
        return spoilt

    return _masked(ws, scratch, damage)


def _cloud(ws: Workspace, scratch: Path) -> Outcome:
    """Cloud on every date over the block, and one date cloudy everywhere: read without error, left out."""

    def damage(files: list[Path]) -> np.ndarray:
        spoilt = np.zeros((len(files), *_clear(files[0]).shape), bool)
        for k, f in enumerate(files):
            with rasterio.open(f, "r+") as ds:
                qa = ds.read(TOY_QA_BAND)
                if k == 20:
                    qa[:] = 1
                    spoilt[k] = True
                qa[BLOCK] = 1
                ds.write(qa, TOY_QA_BAND)
            spoilt[k][BLOCK] = True
        return spoilt

    out = _masked(ws, scratch, damage)
    if out.held:
        with rasterio.open(scratch / "survey" / "clear_count_t01.tif") as src:
            zero = int((src.read(1)[BLOCK] == 0).all())
        out.detail["block_count_zero"] = bool(zero)
        out.held = bool(zero)
    return out


def _map_nodata(ws: Workspace, scratch: Path) -> Outcome:
    """Tile t02 without one valid pixel and a year (2016) without a clear view anywhere: the map finishes, t02 all nodata with clear_dates 0."""
    region = ws.copy_tiles(scratch)
    for tile in ("t01", "t02"):
        for f in _dates(scratch / "tiles", tile):
            if tile == "t02" or f.name.startswith("2016-"):
                with rasterio.open(f, "r+") as ds:
                    ds.write(np.ones((ds.height, ds.width), np.int16), TOY_QA_BAND)
    out = scratch / "map"
    ran = ws.cli("map", f"region={region}", f"model={ws.model}", f"out_dir={out}", *ws.map_keys)
    detail: dict = {"returncode": ran.returncode, "seconds": round(ran.seconds, 1)}
    if ran.returncode != 0:
        return Outcome(False, ran.last_line or f"exit {ran.returncode}", traceback=ran.traceback, detail=detail)
    with rasterio.open(out / "t02.tif") as src:
        layers = src.read()
    clear = layers[BAND["clear_dates"] - 1]
    others = np.delete(layers, BAND["clear_dates"] - 1, axis=0)
    detail.update(t02_clear_dates_max=int(clear.max()), t02_pixels_with_a_value=int((others != NODATA).any(0).sum()))
    held = clear.max() == 0 and detail["t02_pixels_with_a_value"] == 0
    return Outcome(held, f"map finished; t02: {detail['t02_pixels_with_a_value']} pixels with a value, clear_dates at most {detail['t02_clear_dates_max']}", detail=detail)


# ------------------------------------------------------ broken files, refused


def _corrupt_mid_run(ws: Workspace, scratch: Path) -> Outcome:
    """A date file whose header and first blocks are intact and the rest garbage: found while mapping, refused naming it and its date."""
    region = ws.copy_tiles(scratch)
    f = _dates(scratch / "tiles")[17]
    data = f.read_bytes()
    cut = len(data) // 2
    f.write_bytes(data[:cut] + np.random.default_rng(16).bytes(len(data) - cut))
    out = scratch / "map"
    ran = ws.cli("map", f"region={region}", f"model={ws.model}", f"out_dir={out}", "tiles=[t01]", *ws.map_keys)
    return _refusal(ran, out, [f.name, f"date {f.stem}", "corrupt"])


def _truncated(ws: Workspace, scratch: Path) -> Outcome:
    f: list[Path] = []

    def damage(s: Path) -> None:
        f.append(_dates(s / "tiles", "t02")[3])
        f[0].write_bytes(f[0].read_bytes()[:300])

    return _survey_refuses(ws, scratch, damage, lambda s: [f[0].name, "cannot read as a raster"])


def _cube_wrong_dims(ws: Workspace, scratch: Path) -> Outcome:
    import xarray as xr

    cube = scratch / "t01.nc"
    xr.DataArray(np.zeros((6, 3, 8, 8), np.int16), dims=("band", "time", "y", "x"), name="reflectance").to_dataset().to_netcdf(cube)
    region = scratch / "region.yaml"
    text = ws.region.read_text().replace("format: geotiff_folder", "format: cube")
    lines = [ln for ln in text.splitlines() if not ln.strip().startswith("- {name: t0")]
    region.write_text("\n".join(ln if ln.strip() != "tiles:" else f"tiles:\n  - {{name: t01, path: {cube}}}" for ln in lines) + "\n")
    return _survey_refuses(ws, scratch, lambda s: None, lambda s: ["t01.nc", "has dims ('band', 'time', 'y', 'x')"], region=region)


def _labels_path(tiles: Path) -> Path:
    return tiles / "labels.csv"


def _labels_latin1(ws: Workspace, scratch: Path) -> Outcome:
    def damage(s: Path) -> None:
        p = _labels_path(s / "tiles")
        text = p.read_text(encoding="utf-8").splitlines()
        text[0] += ",note"
        text[1:] = [ln + ",forêt" for ln in text[1:]]
        p.write_bytes("\n".join(text).encode("latin-1"))

    return _survey_refuses(ws, scratch, damage, lambda s: ["labels.csv", "line 2", "not UTF-8"])


def _labels_missing_column(ws: Workspace, scratch: Path) -> Outcome:
    def damage(s: Path) -> None:
        p = _labels_path(s / "tiles")
        with p.open(newline="") as fh:
            rows = list(csv.DictReader(fh))
        keep = [k for k in rows[0] if k != "onset_year"]
        with p.open("w", newline="") as fh:
            w = csv.DictWriter(fh, keep, extrasaction="ignore")
            w.writeheader()
            w.writerows(rows)

    return _survey_refuses(ws, scratch, damage, lambda s: ["labels.csv", "missing column", "onset_year"])


def _labels_bom(ws: Workspace, scratch: Path) -> Outcome:
    """A byte-order mark (spreadsheets' "CSV UTF-8") is accepted: the survey counts the same labels as from the file without it."""
    region = ws.copy_tiles(scratch)
    p = _labels_path(scratch / "tiles")
    p.write_bytes(p.read_text(encoding="utf-8").encode("utf-8-sig"))
    out = scratch / "survey"
    ran = ws.cli("survey", f"region={region}", f"out_dir={out}")
    detail: dict = {"returncode": ran.returncode, "seconds": round(ran.seconds, 1)}
    if ran.returncode != 0:
        return Outcome(False, ran.last_line or f"exit {ran.returncode}", traceback=ran.traceback, detail=detail)
    counts = json.loads((out / "survey.json").read_text())["labels"]["counts"]
    with p.open(encoding="utf-8-sig", newline="") as fh:
        rows = list(csv.DictReader(fh))
    want = {lab: sum(r["label"].strip() == lab for r in rows) for lab in counts}
    detail.update(counts=counts, rows=len(rows))
    # Repeated identical points are kept once: the survey may count fewer, never more, and every label must be there.
    held = all(0 < counts[k] <= want[k] for k in counts if want[k]) and sum(counts.values()) > 0.95 * len(rows)
    return Outcome(held, f"survey finished with {sum(counts.values())} of {len(rows)} label rows", detail=detail)


def _gpkg_region(ws: Workspace, scratch: Path, gpkg: Path) -> Path:
    region = ws.copy_tiles(scratch)
    text = region.read_text()
    start = text.index("path:", text.index("labels:"))
    end = text.index("\n", start)
    region.write_text(text[:start] + f"path: {gpkg}" + text[end:])
    return region


def _labels_gpkg_no_layer(ws: Workspace, scratch: Path) -> Outcome:
    import pyogrio
    import shapely

    gpkg = scratch / "points.gpkg"
    fields = [np.array(["other"], dtype=object), np.zeros(1, np.int32)]
    pyogrio.raw.write(gpkg, shapely.to_wkb(np.array([shapely.Point(117.1, 1.5)])), fields, ["label", "onset_year"], crs="EPSG:4326", geometry_type="Point", driver="GPKG", layer="pts")
    # The layer dropped, as a GIS leaves a GeoPackage whose only layer was deleted.
    with sqlite3.connect(gpkg) as con:
        con.execute("DELETE FROM gpkg_contents")
        con.execute("DELETE FROM gpkg_geometry_columns")
        con.execute("DROP TABLE pts")
    region = _gpkg_region(ws, scratch, gpkg)
    return _survey_refuses(ws, scratch, lambda s: None, lambda s: ["points.gpkg", "no layer"], region=region)


def _labels_gpkg_polygons(ws: Workspace, scratch: Path) -> Outcome:
    import pyogrio
    import shapely

    gpkg = scratch / "plots.gpkg"
    polys = np.array([shapely.box(117.1, 1.5, 117.101, 1.501), shapely.box(117.11, 1.51, 117.111, 1.511)])
    fields = [np.array(["other", "stable_forest"], dtype=object), np.zeros(2, np.int32)]
    pyogrio.raw.write(gpkg, shapely.to_wkb(polys), fields, ["label", "onset_year"], crs="EPSG:4326", geometry_type="Polygon", driver="GPKG")
    region = _gpkg_region(ws, scratch, gpkg)
    return _survey_refuses(ws, scratch, lambda s: None, lambda s: ["plots.gpkg", "feature 1", "not a point"], region=region)


def _config_typo(ws: Workspace, scratch: Path) -> Outcome:
    region = scratch / "region.yaml"
    region.write_text(ws.region.read_text().replace("\nchunk: 512", "\nchunck: 512"))
    return _survey_refuses(ws, scratch, lambda s: None, lambda s: ["region.yaml", "'chunck'", "did you mean 'chunk'"], region=region)


def _config_wrong_type(ws: Workspace, scratch: Path) -> Outcome:
    region = scratch / "region.yaml"
    region.write_text(ws.region.read_text().replace("\nchunk: 512", "\nchunk: large"))
    return _survey_refuses(ws, scratch, lambda s: None, lambda s: ["region.yaml", "chunk", "'large'"], region=region)


def _stac_missing_asset(ws: Workspace, scratch: Path) -> Outcome:
    """A STAC ItemCollection of one toy date split into one file per band; the nir file is not there."""
    import pystac

    first = _dates(ws.tiles)[0]
    bands = ["blue", "green", "red", "nir", "swir1", "swir2"]
    with rasterio.open(first) as src:
        data, prof = src.read(), src.profile
    prof.update(count=1)
    folder = scratch / "scene"
    folder.mkdir()
    lon, lat = 117.1, 1.5
    when = dt.datetime(2013, 2, 14, 2, tzinfo=dt.UTC)
    item = pystac.Item(id="toy_2013-02-14", geometry={"type": "Point", "coordinates": [lon, lat]}, bbox=[lon, lat, lon, lat], datetime=when, properties={"instruments": ["oli"]})
    for i, b in enumerate(bands):
        f = folder / f"{b}.tif"
        with rasterio.open(f, "w", **prof) as dst:
            dst.write(data[i], 1)
        item.add_asset(b, pystac.Asset(href=str(f), media_type=pystac.MediaType.GEOTIFF, extra_fields={"raster:bands": [{"nodata": TOY_NODATA, "scale": 1e-4, "offset": 0.0}]}))
    (folder / "nir.tif").unlink()
    items = scratch / "items.json"
    pystac.ItemCollection([item]).save_object(dest_href=str(items))
    region = scratch / "region.yaml"
    text = ws.region.read_text().replace("format: geotiff_folder", "format: stac")
    lines = [ln for ln in text.splitlines() if not ln.strip().startswith("- {name: t0")]
    region.write_text("\n".join(ln if ln.strip() != "tiles:" else f"tiles:\n  - {{name: t01, path: {items}}}" for ln in lines) + "\n")
    return _survey_refuses(ws, scratch, lambda s: None, lambda s: ["items.json", "toy_2013-02-14", "'nir'", "does not exist"], region=region)


def _debug(ws: Workspace, scratch: Path) -> Outcome:
    """``--debug`` on a refused input: the traceback, then the same one line; without it, one line."""
    region = scratch / "region.yaml"
    region.write_text(ws.region.read_text().replace("\nchunk: 512", "\nchunck: 512"))
    plain = ws.cli("survey", f"region={region}", f"out_dir={scratch / 'a'}")
    debug = ws.cli("--debug", "survey", f"region={region}", f"out_dir={scratch / 'b'}")
    held = plain.refused_in_one_line() and debug.returncode == 1 and debug.traceback and debug.last_line == plain.last_line
    detail = {"plain_traceback": plain.traceback, "debug_traceback": debug.traceback, "same_last_line": debug.last_line == plain.last_line}
    return Outcome(bool(held), f"without --debug: {plain.last_line!r}; with it a traceback: {debug.traceback}", detail=detail)


CASES: list[Case] = [
    Case("input_nan_inf_reflectance", "bad_input", "NaN and ±inf in a block of one date (a float32 file among int16 ones): masked, the clear count drops by exactly those pixel-dates", _nan_inf),
    Case("input_reflectance_out_of_range", "bad_input", "reflectance 2.5 and −0.5 after scaling in a block of one date: masked, not passed on as numbers", _out_of_range),
    Case("input_saturated_values", "bad_input", "one band at int16's largest value (saturated) in a block: masked", _saturated),
    Case("input_all_zero_date", "bad_input", "a date delivered as zeros in every band and the QA band (after a −0.1 offset rule): the whole date masked", _zero_date),
    Case("input_all_cloud_pixels_and_date", "bad_input", "cloud on every date over a block and one date cloudy everywhere: read without error, the block's clear count 0", _cloud),
    Case("input_tile_without_valid_pixel", "bad_input", "tile t02 cloudy on every date and 2016 cloudy everywhere: the map finishes, t02 all nodata with clear_dates 0", _map_nodata),
    Case("input_corrupt_date_mid_run", "bad_input", "a date file garbage after its first blocks, found while mapping: one line naming the file and its date, no map tile left", _corrupt_mid_run),
    Case("input_truncated_date", "bad_input", "a date file cut to 300 bytes: the survey refuses it by name", _truncated),
    Case("input_cube_wrong_dims", "bad_input", "a NetCDF cube of dims (band, time, y, x): refused naming the file and its dims", _cube_wrong_dims),
    Case("input_labels_not_utf8", "bad_input", "labels saved in Latin-1 with an accented column: refused at its line and byte", _labels_latin1),
    Case("input_labels_missing_column", "bad_input", "labels without the onset_year column: refused naming the column", _labels_missing_column),
    Case("input_labels_bom", "bad_input", "labels with a UTF-8 byte-order mark: accepted, every label counted", _labels_bom),
    Case("input_labels_gpkg_no_layer", "bad_input", "a GeoPackage whose only layer was dropped: refused, 'no layer'", _labels_gpkg_no_layer),
    Case("input_labels_gpkg_polygons", "bad_input", "a GeoPackage of polygons as labels: refused at the first feature", _labels_gpkg_polygons),
    Case("input_config_typo_key", "bad_input", "a region file with 'chunck': refused naming the key and the likely one", _config_typo),
    Case("input_config_wrong_type", "bad_input", "a region file with chunk: large: refused naming the key and value", _config_wrong_type),
    Case("input_stac_missing_asset", "bad_input", "a STAC item whose nir asset file is not there: refused naming the STAC file, item and asset", _stac_missing_asset),
    Case("input_debug_traceback", "bad_input", "--debug on a refused input prints the traceback, then the same one line", _debug),
]
