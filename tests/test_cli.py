"""The `plantation` command as a user meets it: help, typos, region files kept anywhere, user config folders."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from plantation.cli import main
from plantation.cli.compose import CONFIG_DIR_ENV, compose_job
from plantation.cli.verbs import VERBS
from plantation.errors import ConfigError, InputNotFoundError
from tests.conftest import CRS, DATES, ROOT, pixel_centre, write_stack

COMMAND = str(Path(sys.executable).parent / "plantation")


def plantation(*args: str, cwd: Path = ROOT, env: dict[str, str] | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([COMMAND, *args], cwd=cwd, capture_output=True, text=True, timeout=300, env={**os.environ, **(env or {})})


def one_error_line(res: subprocess.CompletedProcess) -> str:
    assert res.returncode == 1, (res.stdout, res.stderr)
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), res.stderr
    return lines[0]


def write_user_region(folder: Path, tiny: np.ndarray, name: str = "mine") -> Path:
    """A one-tile region kept outside the checkout, its paths relative to the region file."""
    write_stack(folder / "imagery" / "t1", DATES, tiny, np.zeros((5, 8, 8), np.int16))
    rows = ["x,y,label,onset_year"] + [f"{x},{y},stable_forest," for x, y in (pixel_centre(2, 2), pixel_centre(5, 5))]
    (folder / "points.csv").write_text("\n".join(rows) + "\n")
    path = folder / f"{name}.yaml"
    path.write_text(
        f"""name: {name}
tiles:
  - {{name: t1, path: imagery/t1}}
nodata: -9999
mask: {{band: 7, invalid_bits: [0, 1, 2]}}
scaling:
  - {{start: null, scale: 0.0001, offset: 0.0}}
labels: {{path: points.csv, crs: "{CRS}"}}
chunk: 4
"""
    )
    return path


# --------------------------------------------------------------------------- help


def test_help_lists_every_verb_with_one_line(capsys):
    assert main(["--help"]) == 0
    out = capsys.readouterr().out
    for name in [*VERBS, "new-region"]:
        assert any(line.split()[:1] == [name] and len(line.split()) > 2 for line in out.splitlines()), name
    assert main([]) == 2  # no verb: the usage, and a usage status


def test_verb_help_says_what_the_job_does_and_lists_keys_with_comments_and_defaults(capsys):
    assert main(["map", "--help"]) == 0
    out = capsys.readouterr().out
    flat = " ".join(out.split())
    assert out.startswith("plantation map: map every tile of a region")
    assert "min_clear = 4\n" in out and "too little evidence to say anything" in flat
    assert "engine.workers = 0\n" in out and "region.nodata = -9999" in out
    assert "region = toy" in out and "or a path to a region file" in out
    # In our words, not the config library's banner or schema names.
    for word in ("Powered by Hydra", "== Config ==", "_schema", "hydra/", "_self_"):
        assert word not in out


def test_verb_help_follows_a_group_choice(capsys):
    assert main(["train", "trainer=ddp_cpu", "--help"]) == 0
    assert "trainer.devices = 2" in capsys.readouterr().out


# --------------------------------------------------------------------------- typos and wrong values


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (["map", "min_clera=3"], "error: map: unknown key 'min_clera' (did you mean 'min_clear'?); `plantation map --help` lists the keys"),
        (["map", "+min_clera=3"], "error: map: unknown key 'min_clera' (did you mean 'min_clear'?); `plantation map --help` lists the keys"),
        (["survey", "region.nodat=0"], "error: survey: unknown key 'region.nodat' (did you mean 'region.nodata'?)"),
        (["map", "engine.workerz=2"], "error: map: unknown key 'engine.workerz' (did you mean 'engine.workers'?)"),
        (["survey", "region.chunk=big"], "error: survey: region.chunk: Value 'big' of type 'str' could not be converted to Integer"),
        (["map", "region=nowhere"], "error: map: unknown region 'nowhere'; available: toy; put your own files in a folder given with --config-dir or PLANTATION_CONFIG_DIR"),
        (["train", "network=huge"], "error: train: unknown network 'huge'; available: convgru"),
        (["map", "network=convgru"], "error: map: this job has no network to choose"),
        (["mapp"], "error: unknown verb 'mapp' (did you mean 'map'?)"),
    ],
)
def test_typos_get_one_line_naming_the_key_the_job_and_the_closest_valid_one(args, message):
    line = one_error_line(plantation(*args))
    assert line.startswith(message), line
    assert "+" not in line.replace("+min_clera", "")  # never the advice to add a key


def test_unknown_key_inside_a_region_file_names_the_file(tmp_path, tiny_values):
    path = write_user_region(tmp_path, tiny_values)
    path.write_text(path.read_text().replace("nodata:", "nodat:"))
    with pytest.raises(ConfigError, match=rf"{path}: unknown key 'nodat' in a region file \(did you mean 'nodata'\?\)"):
        compose_job("survey", [f"region={path}"], verb="survey")


# --------------------------------------------------------------------------- user files outside the checkout


def test_region_file_anywhere_resolves_its_paths_from_its_own_folder(tmp_path, tiny_values):
    region = write_user_region(tmp_path / "project", tiny_values)
    elsewhere = tmp_path / "somewhere" / "else"
    elsewhere.mkdir(parents=True)
    cfg = compose_job("survey", [f"region={region}"], verb="survey")
    assert cfg.region.tiles[0].path == str((tmp_path / "project" / "imagery" / "t1").resolve())
    assert cfg.region.labels.path == str((tmp_path / "project" / "points.csv").resolve())
    # Run from an unrelated folder with a path relative to it.
    res = plantation("survey", f"region={os.path.relpath(region, elsewhere)}", "out_dir=out", cwd=elsewhere)
    assert res.returncode == 0, res.stderr
    assert (elsewhere / "out" / "survey.json").is_file()


def test_not_found_messages_print_the_absolute_path_tried(tmp_path, tiny_values):
    region = write_user_region(tmp_path / "project", tiny_values)
    region.write_text(region.read_text().replace("imagery/t1", "imagery/t9"))
    line = one_error_line(plantation("survey", f"region={region}", f"out_dir={tmp_path / 'out'}", cwd=tmp_path))
    assert f"{(tmp_path / 'project' / 'imagery' / 't9').resolve()}: tile 't1' folder does not exist" in line
    line = one_error_line(plantation("survey", "region=no_such.yaml", cwd=tmp_path))
    assert f"{tmp_path / 'no_such.yaml'}: region file not found" in line
    assert not (tmp_path / "out").exists()


def test_user_config_folder_from_the_environment_or_the_option(tmp_path, tiny_values):
    folder = tmp_path / "my_configs"
    write_user_region(folder / "region", tiny_values, name="mine")
    cfg = compose_job("survey", ["region=mine"], verb="survey", config_dirs=[folder])
    assert cfg.region.name == "mine" and cfg.region.tiles[0].path == str((folder / "region" / "imagery" / "t1").resolve())
    res = plantation("survey", "region=mine", "out_dir=out", cwd=tmp_path, env={CONFIG_DIR_ENV: str(folder)})
    assert res.returncode == 0, res.stderr
    res = plantation("--config-dir", str(folder), "survey", "region=mine", "--help", cwd=tmp_path)
    assert res.returncode == 0 and "region = mine" in res.stdout and "choose one of: mine, toy" in res.stdout
    with pytest.raises(InputNotFoundError, match="config folder does not exist"):
        compose_job("survey", [], verb="survey", config_dirs=[tmp_path / "none"])


def test_new_region_writes_a_file_the_jobs_accept(tmp_path, tiny_values):
    write_user_region(tmp_path / "delivery", tiny_values)
    out = tmp_path / "regions" / "mine.yaml"
    res = plantation("new-region", "mine", "--imagery", "delivery/imagery", "--labels", "delivery/points.csv", "--out", str(out), cwd=tmp_path)
    assert res.returncode == 0, res.stderr
    assert f"region file written to {out}" in res.stdout
    text = out.read_text()
    assert "bands: [blue, green, red, nir, swir1, swir2]" in text and "band: 7" in text and "../delivery/imagery/t1" in text
    res = plantation("survey", f"region={out}", "out_dir=out", cwd=tmp_path / "regions")
    assert res.returncode == 0, res.stderr
    # A second run does not replace the file unless asked.
    line = one_error_line(plantation("new-region", "mine", "--imagery", "delivery/imagery", "--out", str(out), cwd=tmp_path))
    assert str(out) in line


def test_keys_are_checked_against_the_chosen_region(tmp_path, tiny_values):
    region = write_user_region(tmp_path, tiny_values)
    text = region.read_text().replace("  - {name: t1, path: imagery/t1}", "  - {name: t1, path: imagery/t1}\n  - {name: t2, path: imagery/t1}\n  - {name: t3, path: imagery/t1}")
    region.write_text(text)
    cfg = compose_job("survey", [f"region={region}", "region.tiles.2.name=third"], verb="survey")
    assert [t.name for t in cfg.region.tiles] == ["t1", "t2", "third"]
    with pytest.raises(ConfigError, match=r"survey: 'region.tiles.3.name': region.tiles has 3 items, numbered from 0"):
        compose_job("survey", [f"region={region}", "region.tiles.3.name=x"], verb="survey")


def test_python_dash_m_runs_the_same_command():
    res = subprocess.run([sys.executable, "-m", "plantation", "mapp"], capture_output=True, text=True, timeout=120)
    assert one_error_line(res) == "error: unknown verb 'mapp' (did you mean 'map'?); `plantation --help` lists them"
    res = subprocess.run([sys.executable, "-m", "plantation", "--help"], capture_output=True, text=True, timeout=120)
    assert res.returncode == 0 and "readme-figures" in res.stdout


# --------------------------------------------------------------------------- --debug


def test_debug_prints_the_traceback_of_a_refused_input_above_its_one_line(tmp_path):
    missing = str(tmp_path / "nowhere.yaml")
    plain = plantation("survey", f"region={missing}", env={"PLANTATION_DEBUG": ""})
    assert "nowhere.yaml: region file not found" in one_error_line(plain)
    for res in (plantation("--debug", "survey", f"region={missing}"), plantation("survey", f"region={missing}", env={"PLANTATION_DEBUG": "1"})):
        assert res.returncode == 1, res.stderr
        lines = res.stderr.strip().splitlines()
        assert lines[0] == "Traceback (most recent call last):" and "InputNotFoundError" in res.stderr
        assert lines[-1] == one_error_line(plain)  # the same one line, last
    assert "--debug" in plantation("--help").stdout


def test_debug_off_values_of_the_environment_keep_one_line(tmp_path):
    for value in ("0", "false", "no"):
        one_error_line(plantation("survey", f"region={tmp_path / 'nowhere.yaml'}", env={"PLANTATION_DEBUG": value}))


def test_a_raster_found_unreadable_inside_a_librarys_lazy_read_is_one_line(capsys):
    """Product folders, STAC files and cubes are read lazily by odc-stac or xarray: rasterio's error, raised from GDAL's, becomes one line naming the file."""
    import rasterio.errors

    from plantation.cli.errors import user_errors

    def read():
        try:  # GDAL's own error class is private to rasterio: any exception carries its message the same way
            raise RuntimeError("scene_SR_B4.TIF, band 1: IReadBlock failed at X offset 0, Y offset 4: TIFFReadEncodedStrip() failed.")
        except RuntimeError as gdal:
            raise rasterio.errors.RasterioIOError("Read failed. See previous exception for details.") from gdal

    with pytest.raises(SystemExit) as stop, user_errors(False):
        read()
    assert stop.value.code == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("error: scene_SR_B4.TIF, band 1: IReadBlock failed") and "truncated or corrupt" in err[0]
    with pytest.raises(OSError), user_errors(False):  # any other OSError is not a refused input: it keeps its traceback
        raise PermissionError("not ours")
