"""Faults of the mapping job: the folder lock, room and writability checks, temporary files, a full disk, the memory budget, threads.

End to end (slow): the faults benchmark's mapping cases on the demo region (kills, a dask worker killed, two runs, small disks).
"""

from __future__ import annotations

import errno
import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
import torch

from plantation.benchmarks.faults import Workspace
from plantation.benchmarks.faults import mapping as cases
from plantation.errors import ConfigError, PlantationError
from plantation.mapping import guard
from plantation.mapping.folder import MAP_LAYERS
from plantation.mapping.guard import LOCK_NAME, FolderBusyError, FolderLock, OutputFolderError, OutputSpaceError
from plantation.mapping.job import RUN_OVERHEAD_MB, EngineConfig, MapConfig, check_config, fit_budget, run, window_bytes
from plantation.model import artefact
from plantation.model.card import Calibration, ModelCard
from plantation.model.network import ConvRecurrentNet
from tests.test_mapping import _cfg, model_dir, region  # noqa: F401 - fixtures

PROJECT = Path(__file__).resolve().parents[1]
CORES = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


# --------------------------------------------------------------------------- the lock


def test_a_second_lock_on_a_folder_is_refused_naming_it_and_released_with_the_file(tmp_path):
    first = FolderLock(tmp_path).acquire()
    with pytest.raises(FolderBusyError, match=rf"^out_dir: {tmp_path} is in use: another run \(plantation map, pid {os.getpid()} on .*\) holds it; wait"):
        FolderLock(tmp_path).acquire()
    first.release()
    assert not (tmp_path / LOCK_NAME).exists()
    with FolderLock(tmp_path):
        assert (tmp_path / LOCK_NAME).exists()
    assert list(tmp_path.iterdir()) == []


def test_the_lock_of_a_killed_process_does_not_block(tmp_path):
    code = f"import time\nfrom pathlib import Path\nfrom plantation.mapping.guard import FolderLock\nFolderLock(Path({str(tmp_path)!r})).acquire()\nprint('held', flush=True)\ntime.sleep(600)"
    proc = subprocess.Popen([sys.executable, "-c", code], stdout=subprocess.PIPE, text=True, cwd=PROJECT)
    try:
        assert proc.stdout.readline().strip() == "held"
        with pytest.raises(FolderBusyError):
            FolderLock(tmp_path).acquire()
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    assert (tmp_path / LOCK_NAME).exists()  # the killed run could not remove its file...
    with FolderLock(tmp_path):  # ...and it does not block
        pass


def test_a_lock_taken_on_a_file_its_holder_just_removed_is_taken_again_on_the_new_file(tmp_path, monkeypatch):
    holder = FolderLock(tmp_path).acquire()
    real_open = os.open
    calls = {"n": 0}

    def open_then_holder_releases(path, *a, **k):
        fd = real_open(path, *a, **k)
        calls["n"] += 1
        if calls["n"] == 1 and Path(path) == tmp_path / LOCK_NAME:
            holder.release()  # between our open and our flock: the file we opened is gone
        return fd

    monkeypatch.setattr(os, "open", open_then_holder_releases)
    lock = FolderLock(tmp_path).acquire()
    monkeypatch.setattr(os, "open", real_open)
    assert calls["n"] == 2  # it opened the path a second time
    assert os.stat(lock.path).st_ino == os.fstat(lock._fd).st_ino
    with pytest.raises(FolderBusyError):
        FolderLock(tmp_path).acquire()
    lock.release()


# --------------------------------------------------------------------------- room, writability, temporary files


def test_partials_are_the_jobs_temporary_files_only(tmp_path):
    ours = [".t01.raw.tif", ".t01.4242.raw.tif", ".t.with.dots.17.raw.tif", ".t01.tif.partial", "t01.qml.partial", "manifest.json.partial", "t01.png.partial", "stac/.t01.json.partial"]
    theirs = ["t01.tif", "notes.partial.txt", "raw.tif", ".hidden.tif", "stac/t01.json", "manifest.json"]
    (tmp_path / "stac").mkdir()
    for n in ours + theirs:
        (tmp_path / n).write_text("x")
    assert sorted(str(p.relative_to(tmp_path)) for p in guard.remove_partials(tmp_path)) == sorted(ours)
    assert sorted(str(p.relative_to(tmp_path)) for p in tmp_path.rglob("*") if p.is_file()) == sorted(theirs)


def test_output_estimate_bounds_the_tiles_files():
    # Two 100 x 100 tiles and one of 50 x 50, two mapped at once, no quicklook: COGs uncompressed (2 B per layer) with a third more for
    # overviews, the two largest tiles' raw GeoTIFFs at once, 64 kB per tile and for the folder.
    px = [10_000, 2_500, 10_000]
    per_px = 2 * 11  # 11 int16 layers: class ... clear_dates, fire, fire_year, dnbr (plantation.mapping.folder's band table)
    assert len(MAP_LAYERS) == 11
    want = 22_500 * per_px * 4 / 3 + 20_000 * per_px + 64 * 1024 * 4
    assert guard.output_bytes(px, 2, quicklook=False) == int(want)
    assert guard.output_bytes(px, 2, quicklook=True) == int(want + 22_500 * 4)
    assert guard.output_bytes([], 2, quicklook=True) == 0


def test_room_and_writability_are_refused_in_one_line_naming_the_folder(tmp_path):
    guard.check_room(tmp_path, 1)
    with pytest.raises(OutputSpaceError, match=rf"^out_dir: {tmp_path} has [\d,.]+ MB free, the outputs need up to [\d,.]+ MB; free space"):
        guard.check_room(tmp_path, 2**62)
    f = tmp_path / "afile"
    f.write_text("x")
    with pytest.raises(OutputFolderError, match="exists and is not a folder"):
        guard.ensure_writable(f)
    guard.ensure_writable(tmp_path / "new" / "folder")
    assert (tmp_path / "new" / "folder").is_dir() and list((tmp_path / "new" / "folder").iterdir()) == []


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes through permissions; the slow test uses a read-only mount")
def test_a_folder_without_write_permission_is_refused(tmp_path):
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o555)
    try:
        with pytest.raises(OutputFolderError, match="no permission to write there"):
            guard.ensure_writable(ro)
    finally:
        ro.chmod(0o755)


def test_a_full_disk_is_recognised_through_chained_errors_and_gdals_words():
    import rasterio.errors

    assert guard.is_disk_full(OSError(errno.ENOSPC, "No space left on device"))
    try:
        try:
            raise OSError(errno.EDQUOT, "Disk quota exceeded")
        except OSError as inner:
            raise RuntimeError("write failed") from inner
    except RuntimeError as outer:
        assert guard.is_disk_full(outer)
    assert guard.is_disk_full(rasterio.errors.RasterioIOError("_tiffWriteProc: No space left on device"))
    assert not guard.is_disk_full(ValueError("bad value"))
    assert not guard.is_disk_full(OSError(errno.EIO, "I/O error"), Path("."))  # a disk with room: not a full disk


# --------------------------------------------------------------------------- the job: failure cleans up, a busy folder, a full disk


def test_a_full_disk_while_writing_ends_in_one_line_keeping_finished_tiles_and_no_partial(region, model_dir, tmp_path, monkeypatch):  # noqa: F811
    import plantation.mapping.tiles as tiles

    real = tiles.write_cog
    seen = []

    def full_on_second(src, dest):
        seen.append(dest.name)
        if len(seen) == 1:
            return real(src, dest)
        dest.with_name(f".{dest.name}.partial").write_bytes(b"half a COG")
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(tiles, "write_cog", full_on_second)
    out = tmp_path / "out"
    with pytest.raises(OutputSpaceError, match=rf"^out_dir: {out}: the disk filled up while writing \(OSError: .*No space left on device\); free space there and run again") as exc:
        run(_cfg(region, model_dir, out))
    assert "\n" not in str(exc.value)
    names = sorted(p.name for p in out.rglob("*") if p.is_file())
    assert [n for n in names if n.endswith((".partial", ".raw.tif")) or n == LOCK_NAME] == []
    assert json.loads((out / "manifest.json").read_text())["tiles"].keys() == {"t0"}
    monkeypatch.setattr(tiles, "write_cog", real)
    again = run(_cfg(region, model_dir, out))
    assert again.tiles_skipped == ["t0"] and again.tiles_mapped == ["t1"]


def test_a_run_on_a_locked_folder_is_refused_before_writing_and_a_killed_runs_partials_are_cleared(region, model_dir, tmp_path):  # noqa: F811
    out = tmp_path / "out"
    out.mkdir()
    (out / ".t0.raw.tif").write_bytes(b"left by a killed run")
    (out / "manifest.json.partial").write_text("{")
    with FolderLock(out), pytest.raises(FolderBusyError, match=str(out)):
        run(_cfg(region, model_dir, out))
    assert sorted(p.name for p in out.iterdir()) == [".t0.raw.tif", "manifest.json.partial"]  # untouched while another run holds it
    s = run(_cfg(region, model_dir, out))
    assert s.tiles_mapped == ["t0", "t1"]
    assert sorted(p.name for p in out.iterdir() if p.name.startswith(".") or p.name.endswith(".partial")) == []


# --------------------------------------------------------------------------- memory budget and threads

NET = {"date_width": 16, "conv_width": 32, "hidden": 64}
SHAPE = {"halo": 2, "dates": 48, "channels": 10, "years": 12, "network": NET}


def test_window_bytes_grow_with_the_window_dates_and_batch():
    base = window_bytes(64, 1024, **SHAPE)
    assert window_bytes(128, 1024, **SHAPE) > 3 * base  # about the square of window + 2·halo
    assert window_bytes(64, 1024, **(SHAPE | {"dates": 96})) > 1.5 * base
    assert window_bytes(64, 4096, **SHAPE) - base == 3072 * 12 * 12 * 64 * 4


def test_a_budget_picks_the_largest_window_and_batch_that_fit_and_refuses_one_too_small():
    cfg = MapConfig(window=128, pixel_batch=1024, memory_budget_mb=10_000, engine=EngineConfig(gdal_cache_mb=100))
    b = fit_budget(cfg, process_mb=400, **SHAPE, networks=1)
    assert (b.window, b.pixel_batch) == (128, 1024)  # room enough: the configured values
    for budget in (830, 730, 690):
        cfg.memory_budget_mb = budget
        b = fit_budget(cfg, process_mb=400, **SHAPE, networks=1)
        room = (budget - 400 - 100 - RUN_OVERHEAD_MB) * 2**20
        assert window_bytes(b.window, b.pixel_batch, **SHAPE) <= room
        assert b.window == 128 or window_bytes(b.window + 16, 256, **SHAPE) > room  # the next window up would not fit
        assert b.window % 16 == 0 and b.pixel_batch <= 1024
    cfg.memory_budget_mb = 630
    with pytest.raises(
        ConfigError,
        match=r"^memory_budget_mb: 630 MB leaves 630 MB, less than a mapping process needs with a 16-px window \(6\d\d MB: 400 MB the process itself, 100 MB GDAL's cache, 128 MB mapping's own\)",
    ):
        fit_budget(cfg, process_mb=400, **SHAPE, networks=1)
    # With workers the budget is shared: this process, then each worker and its nanny.
    cfg = MapConfig(window=128, memory_budget_mb=2000, engine=EngineConfig(workers=2, gdal_cache_mb=100))
    b = fit_budget(cfg, process_mb=400, **SHAPE, networks=1)
    assert b.share_mb == 800 and window_bytes(b.window, b.pixel_batch, **SHAPE) <= (800 - 400 - 100 - 100 - RUN_OVERHEAD_MB) * 2**20


def test_a_budget_lowers_the_window_of_a_run_and_is_recorded(region, model_dir, tmp_path):  # noqa: F811
    import psutil

    # Room for windows of about 40 MB: less than a 128-px window of this network needs (about 75 MB by the rule).
    budget = int(psutil.Process().memory_info().rss / 2**20 + 256 + RUN_OVERHEAD_MB + 40)
    s = run(_cfg(region, model_dir, tmp_path / "out", window=128, pixel_batch=4096, memory_budget_mb=budget))
    assert 16 <= s.window < 128
    assert json.loads((tmp_path / "out" / "summary.json").read_text())["window"] == s.window


def test_threads_beyond_the_cores_are_refused_and_the_default_divides_them():
    with pytest.raises(ConfigError, match=rf"engine.workers={CORES + 1} × engine.threads=1: {CORES + 1} torch threads on {CORES} cores would fight"):
        check_config(MapConfig(engine=EngineConfig(workers=CORES + 1)))
    with pytest.raises(ConfigError, match=rf"^engine.threads={CORES + 1}: {CORES + 1} torch threads on {CORES} cores"):
        check_config(MapConfig(engine=EngineConfig(threads=CORES + 1)))
    check_config(MapConfig(engine=EngineConfig(workers=CORES)))
    check_config(MapConfig(engine=EngineConfig(workers=CORES + 1, scheduler="tcp://elsewhere:8786")))  # its workers' cores are not ours


def test_the_in_process_run_records_its_torch_threads(region, model_dir, tmp_path):  # noqa: F811
    s = run(_cfg(region, model_dir, tmp_path / "out"))
    assert s.torch_threads == {"here": torch.get_num_threads()} and s.torch_threads["here"] <= CORES


# --------------------------------------------------------------------------- end to end: the benchmark's cases on the demo region


@pytest.fixture(scope="module")
def toy_ws(tmp_path_factory) -> Workspace:
    """The demo region with an untrained network of the default size (mapping costs what a trained one costs) and its clean map."""
    root = tmp_path_factory.mktemp("faults_map")
    tiles = PROJECT / "toy_tiles"
    region_file = root / "region.yaml"
    region_file.write_text((PROJECT / "configs" / "region" / "toy.yaml").read_text().replace("../../toy_tiles", str(tiles)))
    dates = sorted(p.stem for p in (tiles / "t01" / "imagery").glob("*.tif"))
    years = sorted({int(d[:4]) for d in dates})
    doy = [(time.strptime(d, "%Y-%m-%d").tm_yday - 0.5) / 365 for d in dates]
    spec = {"n_channels": 10, "date_year": [int(d[:4]) - years[0] for d in dates], "day_of_year": doy, "neighbourhood": 5, "dropout": 0.0}
    torch.manual_seed(0)
    net = ConvRecurrentNet(**spec).eval()
    n_out = 3 + len(years)
    card = ModelCard(
        bands=["blue", "green", "red", "nir", "swir1", "swir2"],
        indices=["NDVI", "EVI", "NBR", "NDMI"],
        scaling=[{"start": None, "scale": 1e-4, "offset": 0.0}, {"start": "2021-01-01", "scale": 1e-4, "offset": -0.1}],
        dates=dates,
        years=years,
        network=spec,
        members=1,
        calibration=Calibration(temperature=1.0, loss_weights=[1.0] * n_out, train_prior=[1.0 / n_out] * n_out),
        cutoff_year=2020,
        interval_level=0.8,
        region="selvara_toy",
        labels_fingerprint="untrained",
        package_version="0",
    )
    model = artefact.save(root / "model", card, [net])
    ws = Workspace(root=root, region=region_file, tiles=tiles, model=model, clean_map=root / "clean_map", map_keys=("window=64", "quicklook=false", "progress=false"))
    r = ws.cli("map", f"region={region_file}", f"model={model}", f"out_dir={ws.clean_map}", *ws.map_keys)
    assert r.returncode == 0, r.stderr
    return ws


def _case(ws: Workspace, tmp_path: Path, name: str):
    case = next(c for c in cases.CASES if c.name == name)
    out = case.run(ws, tmp_path)
    assert out.corrupt_outputs == 0 and not out.traceback, out
    assert out.held, out
    return out


@pytest.mark.slow
def test_killed_mid_tile_in_process_resumes_to_the_clean_map(toy_ws, tmp_path):
    out = _case(toy_ws, tmp_path, "map_kill_mid_tile")
    assert out.detail["finished_at_kill"] == [] and out.detail["partials_at_kill"] and out.detail["lock_left_by_kill"]
    assert out.detail["redone"] == ["t01", "t02"] and out.detail["resume_metric_delta"] == 0.0


@pytest.mark.slow
def test_killed_mid_region_on_dask_keeps_the_finished_tile_and_redoes_the_other(toy_ws, tmp_path):
    out = _case(toy_ws, tmp_path, "map_kill_mid_region_dask")
    assert out.detail["finished_at_kill"] == ["t01"] and out.detail["redone"] == ["t02"]
    # The raw file carries the id of the worker process that wrote it.
    assert len(out.detail["partials_at_kill"]) == 1 and re.fullmatch(r"\.t02\.\d+\.raw\.tif", out.detail["partials_at_kill"][0]), out.detail


@pytest.mark.slow
def test_killed_mid_tile_on_dask_leaves_no_process_and_resumes(toy_ws, tmp_path):
    out = _case(toy_ws, tmp_path, "map_kill_mid_tile_dask")
    assert out.detail["finished_at_kill"] == [] and out.detail["redone"] == ["t01", "t02"]


@pytest.mark.slow
def test_a_killed_dask_worker_is_survived(toy_ws, tmp_path):
    out = _case(toy_ws, tmp_path, "map_worker_killed")
    assert out.detail["tile"] in ("t01", "t02") and out.detail["mapped"] == ["t01", "t02"]
    assert len(out.detail["torch_threads"]) == 2 and sum(out.detail["torch_threads"].values()) <= CORES


@pytest.mark.slow
def test_a_second_run_on_a_busy_folder_is_refused(toy_ws, tmp_path):
    _case(toy_ws, tmp_path, "map_two_runs_one_folder")


@pytest.mark.slow
@pytest.mark.parametrize("name", ["map_read_only_out_dir", "map_disk_too_small", "map_disk_fills_while_writing"])
def test_read_only_and_full_disks(toy_ws, tmp_path, name):
    out = _case(toy_ws, tmp_path, name)
    if name == "map_disk_fills_while_writing":
        assert out.detail["tiles_left"] == ["out/t01.tif"] and out.detail["stray"] == []


@pytest.mark.slow
def test_a_tight_budget_holds_the_runs_peak_memory(toy_ws, tmp_path):
    out = _case(toy_ws, tmp_path, "map_memory_budget")
    assert out.detail["budget_mb"] < out.detail["peak_rss_without_budget_mb"]
    assert out.detail["peak_rss_mb"] <= out.detail["budget_mb"] and out.detail["window"] < 64


@pytest.mark.slow
def test_dask_workers_torch_threads_stay_within_the_cores(toy_ws, tmp_path):
    out = _case(toy_ws, tmp_path, "map_threads_within_cores")
    assert sum(out.detail["torch_threads"].values()) <= CORES


def test_cases_are_named_once_with_known_kinds():
    names = [c.name for c in cases.CASES]
    assert len(names) == len(set(names)) >= 8
    assert {c.kind for c in cases.CASES} <= {"kill", "bad_input", "model_file", "resource"}
    assert np.all([n.startswith("map_") for n in names])
    assert issubclass(OutputSpaceError, PlantationError) and issubclass(FolderBusyError, OSError)


def test_threads_by_host_divide_each_machines_cores_among_its_dask_threads():
    from plantation.mapping.workers import threads_by_host

    workers = {
        "tcp://a:1": {"host": "a", "nthreads": 1},
        "tcp://a:2": {"host": "a", "nthreads": 2},
        "tcp://b:1": {"host": "b", "nthreads": 1},
        "tcp://c:1": {"host": "c", "nthreads": 8},
    }
    cores = {"tcp://a:1": 12, "tcp://a:2": 12, "tcp://b:1": 16, "tcp://c:1": 4}
    assert threads_by_host(workers, cores) == {"a": 4, "b": 16, "c": 1}


@pytest.mark.slow
def test_a_running_schedulers_workers_get_their_machines_cores_divided(region, model_dir, tmp_path, monkeypatch):  # noqa: F811
    from distributed import LocalCluster

    monkeypatch.delenv("OMP_NUM_THREADS", raising=False)  # torch's own default would then be every core in every worker
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None) as cluster:
        s = run(_cfg(region, model_dir, tmp_path / "out", engine=EngineConfig(scheduler=cluster.scheduler_address)))
    assert sorted(s.torch_threads.values()) == [max(1, CORES // 2)] * 2
    assert s.tiles_mapped == ["t0", "t1"]
