"""Imagery that cannot show what is asked of it, fed to the ``plantation`` command on a damaged copy of the demo region.

* **A year with no clear view anywhere**: every 2016 date cloudy over both
  tiles. The survey must finish, warn in one line naming 2016, and record
  the year per tile and region-wide in ``survey.json``.
* **Labels on pixels never seen clear**: cloud on every date over a few
  labelled pixels. Training must leave those points out of every split with
  one warning naming how many; the expected points are worked out here from
  the files' own QA band and nodata value with rasterio, pyproj and numpy,
  not through the reader tried.
* **A NetCDF cube corrupt mid-run**: tile t01 as a compressed NetCDF cube
  whose data chunks are garbage between an intact header and trailer. Mapping must stop
  with one ``error:`` line naming the cube and the date and window it could
  not read, no traceback and no map tile left.

Every case copies what it damages into its scratch folder.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import rasterio

from plantation.benchmarks.faults import Case, Outcome, Workspace
from plantation.benchmarks.faults.inputs import TOY_QA_BAND, _clear, _dates, _refusal

#: The year clouded everywhere in the first case.
YEAR = "2016"
#: How many labelled pixels of tile t01 the second case clouds.
CLOUDED = 7
#: A training short enough for a case: the samples are cut whole, the fit is brief.
QUICK_TRAIN: tuple[str, ...] = (
    "network.members=1",
    "training.max_epochs=1",
    "trainer.limit_train_batches=0.1",
    "calibration.prior=sample",
    "distillation.enabled=false",
    "trainer.enable_progress_bar=false",
)


def _cloud(path: Path, where: tuple[np.ndarray, np.ndarray] | None = None) -> None:
    """Set the cloud bit on a date file's QA band, everywhere or at (rows, cols)."""
    with rasterio.open(path, "r+") as ds:
        qa = ds.read(TOY_QA_BAND)
        if where is None:
            qa[:] = 1
        else:
            qa[where] = 1
        ds.write(qa, TOY_QA_BAND)


def _year_without_view(ws: Workspace, scratch: Path) -> Outcome:
    """Every 2016 date cloudy over both tiles: the survey finishes, warns in one line naming 2016 and records it."""
    region = ws.copy_tiles(scratch)
    for tile in ("t01", "t02"):
        for f in _dates(scratch / "tiles", tile):
            if f.name.startswith(f"{YEAR}-"):
                _cloud(f)
    out = scratch / "survey"
    ran = ws.cli("survey", f"region={region}", f"out_dir={out}")
    detail: dict = {"returncode": ran.returncode, "seconds": round(ran.seconds, 1)}
    if ran.returncode != 0:
        return Outcome(False, ran.last_line or f"exit {ran.returncode}", traceback=ran.traceback, detail=detail)
    warned = [ln for ln in (ran.stderr + ran.stdout).splitlines() if "no clear view anywhere" in ln]
    cover = json.loads((out / "survey.json").read_text()).get("coverage", {})
    detail.update(warning_lines=len(warned), coverage=cover)
    want_tiles = {"t01": [int(YEAR)], "t02": [int(YEAR)]}
    held = len(warned) == 1 and YEAR in warned[0] and cover.get("years_without_clear_view_anywhere") == [int(YEAR)] and cover.get("years_without_clear_view") == want_tiles
    msg = warned[0].strip() if warned else "no warning of the year without a clear view"
    return Outcome(bool(held), msg, detail=detail)


def _label_pixels(labels: pd.DataFrame, path: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(inside, rows, cols) of the labels (longitude, latitude) on the grid of date file ``path``, by pyproj and the file's transform."""
    from pyproj import Transformer

    with rasterio.open(path) as src:
        to = Transformer.from_crs("EPSG:4326", src.crs, always_xy=True)
        x, y = to.transform(labels["x"].to_numpy(), labels["y"].to_numpy())
        c, r = ~src.transform * (np.asarray(x), np.asarray(y))
        r, c = np.floor(r).astype(np.int64), np.floor(c).astype(np.int64)
        inside = (r >= 0) & (r < src.height) & (c >= 0) & (c < src.width)
    return inside, r, c


def _labels_never_clear(ws: Workspace, scratch: Path) -> Outcome:
    """Cloud on every date over a few labelled pixels: training drops exactly the points never seen clear, with one warning."""
    region = ws.copy_tiles(scratch)
    tiles = scratch / "tiles"
    labels = pd.read_csv(tiles / "labels.csv")
    labels["line"] = np.arange(len(labels)) + 2  # the header is line 1
    files = {t: _dates(tiles, t) for t in ("t01", "t02")}
    inside1, r1, c1 = _label_pixels(labels, files["t01"][0])
    pick = np.flatnonzero(inside1)[:CLOUDED]
    for f in files["t01"]:
        _cloud(f, (r1[pick], c1[pick]))
    # Every point never clear on its own pixel, by the files themselves (the toy region may have some already).
    never = np.zeros(len(labels), bool)
    taken = np.zeros(len(labels), bool)
    for t in ("t01", "t02"):
        inside, r, c = _label_pixels(labels, files[t][0])
        inside &= ~taken  # the reader gives a point to the first tile that holds it
        count = sum(_clear(f).astype(np.int64) for f in files[t])
        never[inside] = count[r[inside], c[inside]] == 0
        taken |= inside
    want = set(labels["line"][never].tolist())
    runs = scratch / "runs"
    ran = ws.cli("train", f"region={region}", f"out_dir={runs}", "run_name=cov", *QUICK_TRAIN, timeout=1800)
    detail: dict = {"returncode": ran.returncode, "seconds": round(ran.seconds, 1), "clouded": len(pick), "never_clear_expected": len(want)}
    if ran.returncode != 0:
        return Outcome(False, ran.last_line or f"exit {ran.returncode}", traceback=ran.traceback, detail=detail)
    warned = [ln for ln in (ran.stderr + ran.stdout).splitlines() if "never seen clear" in ln]
    m = re.search(r"(\d+) labelled point\(s\) dropped", warned[0]) if len(warned) == 1 else None
    points = pd.read_csv(runs / "cov" / "points.csv")
    points["line"] = np.arange(len(points)) + 2
    kept = set(points["line"][points["split"] != "dropped"].tolist())
    recorded = json.loads((runs / "cov" / "labels.json").read_text()).get("split", {}).get("dropped_never_clear")
    detail.update(warning_lines=len(warned), warned_count=int(m.group(1)) if m else None, never_clear_kept=len(want & kept), labels_json_dropped_never_clear=recorded)
    held = m is not None and int(m.group(1)) == len(want) and not (want & kept) and len(pick) == CLOUDED
    msg = warned[0].strip() if warned else "no warning of labels never seen clear"
    return Outcome(bool(held), msg, detail=detail)


def _cube_corrupt_mid_run(ws: Workspace, scratch: Path) -> Outcome:
    """Tile t01 as a compressed NetCDF cube, its data chunks garbage behind an intact header: mapping refuses it in one line naming the cube and a date."""
    import rioxarray  # noqa: F401  (adds .rio)
    import xarray as xr

    files = _dates(ws.tiles, "t01")
    with rasterio.open(files[0]) as src:
        crs, transform, h, w = src.crs, src.transform, src.height, src.width
    stacked = []
    for f in files:
        with rasterio.open(f) as src:
            stacked.append(src.read())
    data = np.stack(stacked)  # (time, band + QA, y, x) int16, 12 MB for the demo tile
    ys = transform.f + transform.e * (np.arange(h) + 0.5)
    xs = transform.c + transform.a * (np.arange(w) + 0.5)
    bands = ["blue", "green", "red", "nir", "swir1", "swir2"]
    times = np.array([f.stem for f in files], dtype="datetime64[ns]")
    refl = xr.DataArray(data[:, : TOY_QA_BAND - 1], dims=("time", "band", "y", "x"), coords={"time": times, "band": bands, "y": ys, "x": xs})
    qa = xr.DataArray(data[:, TOY_QA_BAND - 1], dims=("time", "y", "x"), coords={"time": times, "y": ys, "x": xs})
    ds = xr.Dataset({"reflectance": refl, "qa": qa}).rio.write_crs(crs)
    for v in ("reflectance", "qa"):  # compressed: damaged bytes fail to decompress instead of reading as numbers
        ds[v].encoding.update(zlib=True, chunksizes=(1, 6, 64, 64) if v == "reflectance" else (1, 64, 64))
    cube = scratch / "t01.nc"
    ds.to_netcdf(cube)
    size = cube.stat().st_size
    # 40% to 70% of the file: data chunks only. The header at the start and the metadata netCDF writes at the end stay
    # readable, so the cube opens and the damage is met while reading, as a file damaged mid-run would be.
    with open(cube, "r+b") as f:
        f.seek(size * 2 // 5)
        f.write(np.random.default_rng(16).bytes(size * 7 // 10 - size * 2 // 5))
    region = scratch / "region.yaml"
    text = ws.region.read_text().replace("format: geotiff_folder", "format: cube").replace("  band: 7\n", "  band: null\n  variable: qa\n")
    lines = [ln for ln in text.splitlines() if not ln.strip().startswith("- {name: t0")]
    region.write_text("\n".join(ln if ln.strip() != "tiles:" else f"tiles:\n  - {{name: t01, path: {cube}}}" for ln in lines) + "\n")
    out = scratch / "map"
    ran = ws.cli("map", f"region={region}", f"model={ws.model}", f"out_dir={out}", *ws.map_keys)
    return _refusal(ran, out, ["t01.nc", "cannot read rows", "corrupt"])


CASES: list[Case] = [
    Case(
        "coverage_year_without_clear_view", "bad_input", "every 2016 date cloudy over both tiles: the survey warns in one line naming 2016 and records it per tile and region-wide", _year_without_view
    ),
    Case(
        "coverage_labels_never_clear",
        "bad_input",
        "cloud on every date over 7 labelled pixels: training drops exactly the points never seen clear, with one warning naming how many",
        _labels_never_clear,
    ),
    Case(
        "coverage_cube_corrupt_mid_run",
        "bad_input",
        "a NetCDF cube garbage behind an intact header: mapping refuses it in one line naming the cube, date and window, no tile left",
        _cube_corrupt_mid_run,
    ),
]
