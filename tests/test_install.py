"""The package as a user installs it: a wheel built with `python -m build`, in a fresh venv, run from another folder.

Common practice (Python packaging): an editable install reads files beside the package and hides a
wheel that forgets them; only the built wheel shows whether the configs travel with the code.
"""

from __future__ import annotations

import subprocess
import sys
import sysconfig
from pathlib import Path

import pytest

from tests.conftest import ROOT
from tests.test_cli import write_user_region


@pytest.mark.slow
def test_built_wheel_runs_help_and_survey_from_another_folder(tmp_path, tiny_values):
    dist = tmp_path / "dist"
    # sdist first, then the wheel from it (the default of `python -m build`): both must carry configs/.
    res = subprocess.run([sys.executable, "-m", "build", "--outdir", str(dist), str(ROOT)], capture_output=True, text=True, timeout=900)
    assert res.returncode == 0, res.stderr[-3000:]
    wheel = next(dist.glob("plantation-*.whl"))
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=300)
    py = venv / "bin" / "python"
    res = subprocess.run([sys.executable, "-m", "pip", "--python", str(py), "install", "--quiet", "--no-deps", str(wheel)], capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr
    # The dependencies come from this environment's site-packages, so the test needs no download;
    # the package itself only from the wheel (a path added by .pth does not run that folder's .pth files,
    # so this environment's editable install stays out).
    site = Path(subprocess.run([str(py), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"], capture_output=True, text=True, check=True).stdout.strip())
    (site / "borrowed_dependencies.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    elsewhere = tmp_path / "work"
    elsewhere.mkdir()
    where = subprocess.run([str(py), "-c", "import plantation; print(plantation.__file__)"], cwd=elsewhere, capture_output=True, text=True, check=True).stdout.strip()
    assert Path(where).is_relative_to(venv), where
    assert (Path(where).parent / "configs" / "train.yaml").is_file()
    command = str(venv / "bin" / "plantation")
    res = subprocess.run([command, "--help"], cwd=elsewhere, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0 and "survey" in res.stdout and "new-region" in res.stdout, res.stderr
    res = subprocess.run([command, "map", "--help"], cwd=elsewhere, capture_output=True, text=True, timeout=120)
    assert res.returncode == 0 and "min_clear = 4" in res.stdout, res.stderr
    region = write_user_region(tmp_path / "my_region", tiny_values)
    res = subprocess.run([command, "survey", f"region={region}", "out_dir=survey"], cwd=elsewhere, capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr
    assert (elsewhere / "survey" / "survey.json").is_file() and (elsewhere / "survey" / "clear_count_t1.tif").is_file()
