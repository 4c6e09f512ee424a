"""The `plantation` command, run as a user runs it: outputs, exit codes, one-line errors, nothing written on bad input."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
import rasterio

ROOT = Path(__file__).resolve().parents[1]
#: The console entry point installed beside this interpreter.
COMMAND = str(Path(sys.executable).parent / "plantation")


def run(verb: str, *overrides: str) -> subprocess.CompletedProcess:
    return subprocess.run([COMMAND, verb, *overrides], cwd=ROOT, capture_output=True, text=True, timeout=600)


@pytest.mark.slow
def test_survey_on_the_toy_region(tmp_path):
    out = tmp_path / "survey"
    res = run("survey", f"out_dir={out}")
    assert res.returncode == 0, res.stderr
    assert str(out) in res.stdout
    summary = json.loads((out / "survey.json").read_text())
    assert summary["labels"]["counts"]["conversion"] > 500
    # Wet-season months see fewer clear views than dry-season ones.
    by_month = summary["clear_share_by_month"]
    assert by_month["2"] < 0.4 < by_month["8"]
    with rasterio.open(out / "clear_count_t01.tif") as src:
        assert src.crs.to_epsg() == 32650 and src.nodata == -1
        counts = src.read(1)
    assert 0 < counts.mean() < 48
    for name in ("labels.gpkg", "index_series.png", "clear_views.png"):
        assert (out / name).stat().st_size > 1000
    assert not list(tmp_path.glob("*.partial"))


@pytest.mark.slow
@pytest.mark.parametrize(
    ("overrides", "message"),
    [
        (["region.labels.path=__LABELS__"], "line 3: unknown label 'forest'"),
        (["region.bands=[blue,green,red,nir,swir1]"], "must follow the 5 reflectance bands"),
        (["region.tiles.0.path=no/such/folder"], "no/such/folder: tile 't01' folder does not exist"),
    ],
)
def test_survey_bad_input_one_line_error_nothing_written(tmp_path, overrides, message):
    labels = tmp_path / "bad.csv"
    labels.write_text("x,y,label,onset_year\n117.94,1.55,stable_forest,\n117.95,1.55,forest,\n")
    out = tmp_path / "survey"
    res = run("survey", f"out_dir={out}", *[o.replace("__LABELS__", str(labels)) for o in overrides])
    assert res.returncode == 1
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and message in lines[0], res.stderr
    assert not out.exists() and not list(tmp_path.glob("survey*"))


@pytest.mark.slow
def test_map_script_on_the_toy_region(tmp_path):
    res = run("train", f"out_dir={tmp_path / 'train'}", "run_name=quick", "network.members=1", "training.max_epochs=1", "trainer.enable_progress_bar=false")
    assert res.returncode == 0, res.stderr
    maps = tmp_path / "maps"
    res = run("map", f"model={tmp_path / 'train' / 'quick'}", f"out_dir={maps}", "progress=false", "tiles=[t01]")
    assert res.returncode == 0, res.stderr
    assert "tiles: 1 mapped" in res.stdout and "converted area by onset year (ha)" in res.stdout
    styles = {f"t01.{s}.qml" for s in ("onset_year", "p_after_cutoff", "fire", "dnbr")}
    assert {p.name for p in maps.iterdir()} == {"t01.tif", "t01.qml", *styles, "t01.png", "manifest.json", "summary.json", "collection.json", "stac"}
    with rasterio.open(maps / "t01.tif") as src, rasterio.open(ROOT / "toy_tiles" / "t01" / "truth.tif") as truth:
        assert src.crs == truth.crs and src.transform == truth.transform and src.shape == truth.shape
    res = run("map", f"model={tmp_path / 'train' / 'quick'}", f"out_dir={maps}", "progress=false", "tiles=[t01]")
    assert "tiles: 0 mapped, 1 already finished" in res.stdout
    # The rest of the chain, as the README's main command runs it.
    out = tmp_path / "assess"
    res = run("sample", f"map={maps}", f"out_dir={out}", "fill_from_truth=true")
    assert res.returncode == 0, res.stderr
    assert "forest_buffer" in res.stdout and (out / "samples.gpkg").is_file()
    res = run("assess", f"map={maps}", f"out_dir={out}")
    assert res.returncode == 0, res.stderr
    assert "overall accuracy" in res.stdout and "simulated truth" in res.stdout
    doc = json.loads((out / "assessment.json").read_text())
    assert doc["validation"]["split"] == "test" and doc["provenance"]["model"]["sha256"]
    res = run("recalibrate", f"map={maps}", f"samples={out / 'samples.gpkg'}")
    assert res.returncode == 0, res.stderr
    assert "p_conversion" in res.stdout and "corrected map written in place" in res.stdout
    res = run("farmplots", f"map={maps}", f"out_dir={out}", "progress=false")
    assert res.returncode == 0, res.stderr
    assert "design-weighted logistic recalibration" in res.stdout
    plots = json.loads((out / "plots.json").read_text())
    # Only t01 was mapped: the demo plots over t02 are listed as outside the map, not dropped.
    assert len(plots["plots"]) == 40 and 0 < plots["counts"]["problem"] < 40
    assert {p["problem"] for p in plots["problems"]} == {"outside_map"}
    html = (out / "report.html").read_text()
    assert "report.html" in res.stdout and "Farm plots" in html and "Error matrix" in html


@pytest.mark.slow
def test_map_script_bad_model_is_one_line_and_writes_nothing(tmp_path):
    res = run("map", f"model={tmp_path / 'none'}", f"out_dir={tmp_path / 'maps'}")
    assert res.returncode == 1
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and "none: no model here" in lines[0], res.stderr
    assert not (tmp_path / "maps").exists()


@pytest.mark.slow
@pytest.mark.parametrize(
    ("verb", "overrides", "message"),
    [
        ("sample", ["map=__TMP__/nomap"], "nomap: no mapped region here (no manifest.json)"),
        ("sample", ["target_se=0.7"], "target_se: 0.7 must be in (0, 0.5)"),
        ("assess", ["samples=__TMP__/none.csv"], "none.csv: sample file not found"),
        ("farmplots", ["plots=__TMP__/none.geojson", "map=__TMP__/nomap"], "nomap: no mapped region here"),
    ],
)
def test_assessment_verbs_bad_input_one_line(tmp_path, verb, overrides, message):
    out = tmp_path / "out"
    res = run(verb, f"out_dir={out}", *[o.replace("__TMP__", str(tmp_path)) for o in overrides])
    assert res.returncode == 1, res.stdout
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and message in lines[0], res.stderr
    assert not out.exists()


def test_scripts_are_thin_wrappers_over_the_verbs():
    res = subprocess.run([sys.executable, str(ROOT / "scripts" / "map.py"), "min_clera=3"], cwd=ROOT, capture_output=True, text=True, timeout=120)
    assert res.returncode == 1
    assert res.stderr.strip() == "error: map: unknown key 'min_clera' (did you mean 'min_clear'?); `plantation map --help` lists the keys"
