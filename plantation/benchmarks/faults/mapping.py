"""Faults of the mapping job: kills mid-tile and mid-region (both engines), a dask worker killed, two runs on one folder, a read-only or full disk, memory and threads.

Every case runs ``plantation map`` in fresh processes on the workspace's
region and model with the workspace's map keys, so a finished map compares
with the clean map array by array. Kills take the whole process group
(the command, its dask nannies and workers). A small disk is a tmpfs mounted
in a private mount namespace (``unshare --mount --map-root-user``), so
nothing is mounted on the machine itself; where namespaces are not allowed
the full disk is simulated by a write that raises ``ENOSPC`` and the case's
detail says so.
"""

from __future__ import annotations

import json
import os
import shlex
import shutil
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from plantation.benchmarks.faults import Case, Outcome, Ran, Workspace
from plantation.mapping.folder import file_digest, read_manifest
from plantation.mapping.guard import LOCK_NAME, partial_files
from plantation.model.card import resolve_model

#: The tight case's budget as a share of the same run's peak without a budget: below what the run takes, so the budget must bind.
TIGHT_SHARE = 0.85
#: GDAL's block cache in the budget cases, MB: counted in full by the budget in every process, so a small one leaves the windows room
#: (the demo's tiles are small; a cache of 256 MB in each of three processes would be most of a 2 GB budget).
SMALL_GDAL_CACHE_MB = 32
#: Seconds a case waits for a run to reach the point where it is killed.
REACH_TIMEOUT = 600


# --------------------------------------------------------------------------- helpers


def _keys(ws: Workspace, out: Path, *extra: str) -> list[str]:
    return [f"region={ws.region}", f"model={ws.model}", f"out_dir={out}", *ws.map_keys, *extra]


def _keys_but_out(ws: Workspace) -> list[str]:
    return [f"region={ws.region}", f"model={ws.model}", *ws.map_keys]


def _model_digest(ws: Workspace) -> str:
    folder = resolve_model(str(ws.model))
    return file_digest([folder / "model.json", folder / "model.safetensors"])


def clean_map(ws: Workspace, scratch: Path) -> Path:
    """The workspace's clean map when the model that made it is the workspace's model now; else a clean map made in ``scratch``."""
    m = read_manifest(ws.clean_map / "manifest.json") if (ws.clean_map / "manifest.json").is_file() else None
    digest = _model_digest(ws)
    if m and m["tiles"] and all(t.get("model_sha256") == digest for t in m["tiles"].values()):
        return ws.clean_map
    out = scratch / "clean"
    r = ws.cli("map", *_keys(ws, out))
    if r.returncode:
        raise RuntimeError(f"the clean map failed: {r.last_line}")
    return out


def _arrays(path: Path) -> np.ndarray:
    import rasterio

    with rasterio.open(path) as src:
        return src.read()


def compare(out: Path, clean: Path) -> tuple[int, list[str]]:
    """(tiles unreadable or different from the clean map's, notes): every tile of the clean map opened with rasterio and its arrays compared."""
    tiles = sorted(read_manifest(clean / "manifest.json")["tiles"])
    bad, notes = 0, []
    m = read_manifest(out / "manifest.json") if (out / "manifest.json").is_file() else None
    for t in tiles:
        f = out / f"{t}.tif"
        try:
            a = _arrays(f)
        except Exception as exc:  # an unreadable output is what this counts
            bad += 1
            notes.append(f"{t}: unreadable ({type(exc).__name__})")
            continue
        if not np.array_equal(a, _arrays(clean / f"{t}.tif")):
            bad += 1
            notes.append(f"{t}: arrays differ from the clean map's")
        elif m is None or t not in m["tiles"] or m["tiles"][t]["sha256"] != file_digest([f]):
            bad += 1
            notes.append(f"{t}: not recorded in manifest.json with its bytes' digest")
    return bad, notes


def _converted_total(folder: Path) -> float:
    s = json.loads((folder / "summary.json").read_text())
    return float(sum(s["converted_ha"].values()))


def _names(paths: list[Path], root: Path) -> list[str]:
    return [str(p.relative_to(root)) for p in paths]


def _finished(out: Path) -> dict[str, dict[str, Any]]:
    p = out / "manifest.json"
    if not p.is_file():
        return {}
    try:
        return json.loads(p.read_text())["tiles"]
    except (OSError, ValueError, KeyError):
        return {}


def _raw(out: Path) -> list[str]:
    return sorted(p.name[1 : -len(".raw.tif")].rsplit(".", 1)[0] for p in out.glob(".*.raw.tif")) if out.is_dir() else []


def _descendants(pid: int) -> list[Any]:
    import psutil

    try:
        return psutil.Process(pid).children(recursive=True)
    except psutil.NoSuchProcess:
        return []


def wait_for(proc: subprocess.Popen, cond: Callable[[], bool], timeout: float = REACH_TIMEOUT, every: float = 0.02) -> bool:
    """Poll ``cond`` until it holds (True) or the process ends or the time runs out (False)."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if cond():
            return True
        if proc.poll() is not None:
            return cond()
        time.sleep(every)
    return False


def kill_group(proc: subprocess.Popen) -> list[int]:
    """SIGKILL the process's whole group (it was started in its own session); returns the pids of descendants still alive a moment later."""
    import psutil

    kids = _descendants(proc.pid)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    time.sleep(0.5)
    alive = []
    for k in kids:
        try:
            if k.is_running() and k.status() != psutil.STATUS_ZOMBIE:
                alive.append(k.pid)
        except psutil.Error:
            pass
    return alive


# --------------------------------------------------------------------------- kills


def _kill_and_resume(ws: Workspace, scratch: Path, *, engine: tuple[str, ...], mid: str) -> Outcome:
    """Kill a map run mid-tile (nothing finished, a tile's partial file on disk) or mid-region (a tile finished, another's partial on disk), then rerun."""
    clean = clean_map(ws, scratch)
    out = scratch / "map"
    keys = _keys(ws, out, *engine)
    proc = ws.start("map", *keys, log=scratch / "killed.log")
    began = time.monotonic()

    def reached() -> bool:
        done, raw = _finished(out), _raw(out)
        if mid == "tile":
            return not done and bool(raw)
        return bool(done) and any(t not in done for t in raw)

    if not wait_for(proc, reached):
        if proc.poll() is None:
            kill_group(proc)
        return Outcome(False, f"the run never reached mid-{mid} (exit {proc.returncode}); nothing was killed", detail={"engine": list(engine)})
    at = round(time.monotonic() - began, 2)
    survivors = kill_group(proc)
    before = {t: ((out / e["file"]).stat().st_mtime_ns, e["sha256"]) for t, e in _finished(out).items()}
    left = _names(partial_files(out), out)
    lock_left = (out / LOCK_NAME).exists()
    ran = ws.cli("map", *keys)
    problems: list[str] = []
    if ran.returncode:
        problems.append(f"the rerun failed: {ran.last_line}")
        return Outcome(False, "; ".join(problems), traceback=ran.traceback, detail={"killed_after_s": at, "partials_at_kill": left})
    summary = json.loads((out / "summary.json").read_text())
    after = {t: ((out / e["file"]).stat().st_mtime_ns, e["sha256"]) for t, e in _finished(out).items() if t in before}
    if after != before:
        problems.append(f"finished tiles were rewritten: {sorted(t for t in before if after.get(t) != before[t])}")
    if sorted(summary["tiles_skipped"]) != sorted(before):
        problems.append(f"the rerun skipped {summary['tiles_skipped']}, the finished tiles were {sorted(before)}")
    corrupt, notes = compare(out, clean)
    problems += notes
    stray = _names(partial_files(out), out) + ([LOCK_NAME] if (out / LOCK_NAME).exists() else [])
    if stray:
        problems.append(f"stray temporary files after the rerun: {stray}")
    if survivors:
        problems.append(f"processes of the killed run survived the group kill: {survivors}")
    detail = {
        "engine": list(engine) or ["in-process"],
        "killed_after_s": at,
        "finished_at_kill": sorted(before),
        "partials_at_kill": left,
        "lock_left_by_kill": lock_left,
        "redone": summary["tiles_mapped"],
        "rerun_s": round(ran.seconds, 1),
        "resume_metric_delta": _converted_total(out) - _converted_total(clean),
    }
    if not problems:
        return Outcome(True, f"killed mid-{mid} after {at} s; the rerun kept {sorted(before) or 'no tile'}, redid {summary['tiles_mapped']}; every tile equals the clean map's", detail=detail)
    return Outcome(False, "; ".join(problems), corrupt_outputs=corrupt, detail=detail)


def kill_mid_tile(ws: Workspace, scratch: Path) -> Outcome:
    return _kill_and_resume(ws, scratch, engine=(), mid="tile")


def kill_mid_region(ws: Workspace, scratch: Path) -> Outcome:
    return _kill_and_resume(ws, scratch, engine=(), mid="region")


def kill_mid_tile_dask(ws: Workspace, scratch: Path) -> Outcome:
    return _kill_and_resume(ws, scratch, engine=("engine.workers=2", "engine.threads=1"), mid="tile")


def kill_mid_region_dask(ws: Workspace, scratch: Path) -> Outcome:
    return _kill_and_resume(ws, scratch, engine=("engine.workers=1",), mid="region")


def worker_killed(ws: Workspace, scratch: Path) -> Outcome:
    """SIGKILL the dask worker process writing a tile; the run must finish anyway and equal the clean map."""
    clean = clean_map(ws, scratch)
    out = scratch / "map"
    proc = ws.start("map", *_keys(ws, out, "engine.workers=2", "engine.threads=1"), log=scratch / "run.log")
    victim: dict[str, Any] = {}

    def writer_found() -> bool:
        for p in _descendants(proc.pid):
            try:
                raw = [f.path for f in p.open_files() if f.path.endswith(".raw.tif")]
            except Exception:  # a process that ended meanwhile
                continue
            if raw:
                victim.update(pid=p.pid, tile=Path(raw[0]).name[1 : -len(".raw.tif")].rsplit(".", 1)[0])
                return True
        return False

    if not wait_for(proc, writer_found, every=0.01):
        if proc.poll() is None:
            kill_group(proc)
        return Outcome(False, f"no worker was seen writing a tile (exit {proc.returncode}); nothing was killed")
    os.kill(victim["pid"], signal.SIGKILL)
    try:
        rc = proc.wait(timeout=REACH_TIMEOUT)
    except subprocess.TimeoutExpired:
        kill_group(proc)
        return Outcome(False, f"the run did not end within {REACH_TIMEOUT} s after its worker was killed", detail=victim)
    log_text = (scratch / "run.log").read_text(errors="replace")
    if rc:
        return Outcome(False, f"the run failed after its worker was killed (exit {rc}): {log_text.strip().splitlines()[-1:]}", traceback="Traceback" in log_text, detail=victim)
    summary = json.loads((out / "summary.json").read_text())
    corrupt, notes = compare(out, clean)
    stray = _names(partial_files(out), out)
    detail = victim | {"mapped": summary["tiles_mapped"], "torch_threads": summary.get("torch_threads"), "resume_metric_delta": _converted_total(out) - _converted_total(clean)}
    if corrupt or stray or sorted(summary["tiles_mapped"]) != sorted(read_manifest(clean / "manifest.json")["tiles"]):
        return Outcome(False, "; ".join([*notes, *(f"stray {s}" for s in stray)]) or f"mapped {summary['tiles_mapped']}", corrupt_outputs=corrupt, detail=detail)
    return Outcome(True, f"worker {victim['pid']} killed while writing tile {victim['tile']}; its tile ran again on a worker, the map equals the clean map", detail=detail)


# --------------------------------------------------------------------------- two runs on one folder


def two_runs_one_folder(ws: Workspace, scratch: Path) -> Outcome:
    """A second run on a folder a run is mapping into is refused in one line naming the folder; the first run's map is unharmed."""
    clean = clean_map(ws, scratch)
    out = scratch / "map"
    keys = _keys(ws, out)
    first = ws.start("map", *keys, log=scratch / "first.log")
    if not wait_for(first, lambda: (out / LOCK_NAME).exists() and bool(_raw(out))):
        return Outcome(False, f"the first run never started a tile (exit {first.returncode})")
    second = ws.cli("map", *keys)
    rc = first.wait(timeout=REACH_TIMEOUT)
    corrupt, notes = compare(out, clean) if rc == 0 else (0, [f"the first run failed (exit {rc})"])
    names_folder = str(out) in second.last_line and "another run (plantation map, pid" in second.last_line
    held = second.refused_in_one_line() and names_folder and rc == 0 and not corrupt and not notes
    detail = {"second_exit": second.returncode, "second_seconds": round(second.seconds, 1), "first_exit": rc}
    msg = second.last_line if held else "; ".join([f"second run: exit {second.returncode}, {second.last_line!r}", *notes])
    return Outcome(held, msg, corrupt_outputs=corrupt, traceback=second.traceback, detail=detail)


# --------------------------------------------------------------------------- disks


def namespaces_work() -> bool:
    """Whether this machine lets a process mount a tmpfs in a mount namespace of its own."""
    if not shutil.which("unshare"):
        return False
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        r = subprocess.run(["unshare", "--mount", "--map-root-user", "mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", d], capture_output=True, timeout=30)
    return r.returncode == 0


def on_small_disk(ws: Workspace, scratch: Path, *, size_kb: int, keys: list[str], read_only: bool = False, fill_after_first_tile: bool = False) -> tuple[Ran, list[str]]:
    """Run ``plantation map`` with out_dir on a tmpfs of ``size_kb`` (read-only, or filled once the first tile is finished); returns the run and the files the disk held after it."""
    disk = scratch / "disk"
    disk.mkdir()
    out = disk / "out"
    cmd = " ".join(shlex.quote(c) for c in ws.command("map", *keys, f"out_dir={out}"))
    steps = [f"mount -t tmpfs -o size={size_kb}k tmpfs {shlex.quote(str(disk))} || exit 97"]
    if read_only:
        steps += [f"mkdir {shlex.quote(str(out))}", f"mount -o remount,ro {shlex.quote(str(disk))}"]
    if fill_after_first_tile:
        # The run passes its check of room first; the disk fills once a tile is finished (manifest.json written), while the next is written.
        filler = shlex.quote(str(disk / "filler"))
        steps += [
            f"{cmd} >{shlex.quote(str(scratch / 'stdout'))} 2>{shlex.quote(str(scratch / 'stderr'))} & pid=$!",
            f"while kill -0 $pid 2>/dev/null && [ ! -f {shlex.quote(str(out / 'manifest.json'))} ]; do sleep 0.02; done",
            f"head -c {size_kb * 1024} /dev/zero > {filler} 2>/dev/null",
            "wait $pid; rc=$?",
        ]
    else:
        steps += [f"{cmd} >{shlex.quote(str(scratch / 'stdout'))} 2>{shlex.quote(str(scratch / 'stderr'))}; rc=$?"]
    steps += [f"find {shlex.quote(str(disk))} -mindepth 1 -printf '%P\\n' > {shlex.quote(str(scratch / 'files'))}", "exit $rc"]
    began = time.perf_counter()
    r = subprocess.run(["unshare", "--mount", "--map-root-user", "sh", "-c", "\n".join(steps)], env=ws.env(), cwd=ws.root, timeout=REACH_TIMEOUT)
    if r.returncode == 97:
        raise RuntimeError(f"no tmpfs of {size_kb} kB could be mounted at {disk}")
    ran = Ran(r.returncode, (scratch / "stdout").read_text(), (scratch / "stderr").read_text(), time.perf_counter() - began)
    files = (scratch / "files").read_text().split()
    return ran, sorted(files)


def _simulated(ws: Workspace, keys: list[str], patch: str) -> Ran:
    """Run the map verb in a fresh process with a write patched to fail (where no small disk can be mounted)."""
    code = f"{patch}\nfrom plantation.cli import main\nmain({['map', *keys]!r})"
    began = time.perf_counter()
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=ws.env(), cwd=ws.root, timeout=REACH_TIMEOUT)
    return Ran(r.returncode, r.stdout, r.stderr, time.perf_counter() - began)


def _ours(files: list[str]) -> list[str]:
    """Files of the run among a disk's files (the filler and the folders aside)."""
    return [f for f in files if f.startswith("out/") and f != "out/stac"]


def read_only_folder(ws: Workspace, scratch: Path) -> Outcome:
    """out_dir on a read-only file system: one line naming the folder before any work."""
    keys = _keys_but_out(ws)
    if namespaces_work():
        ran, files = on_small_disk(ws, scratch, size_kb=8192, keys=keys, read_only=True)
        how = "read-only tmpfs"
    elif os.geteuid() != 0:
        out = scratch / "ro"
        out.mkdir()
        out.chmod(0o555)
        ran = ws.cli("map", *keys, f"out_dir={out}")
        files = [f"out/{p.name}" for p in out.iterdir()]
        out.chmod(0o755)
        how = "folder without write permission"
    else:
        return Outcome(False, "no read-only folder can be made here (root without mount namespaces)")
    held = ran.refused_in_one_line() and "out_dir" in ran.last_line and ("read-only" in ran.last_line or "permission" in ran.last_line) and not _ours(files)
    return Outcome(held, ran.last_line, traceback=ran.traceback, corrupt_outputs=len(_ours(files)), detail={"how": how, "seconds": round(ran.seconds, 1), "files_left": _ours(files)})


def disk_too_small(ws: Workspace, scratch: Path) -> Outcome:
    """A disk too small for the outputs: refused before any tile is mapped, in one line, nothing written."""
    keys = _keys_but_out(ws)
    if namespaces_work():
        ran, files = on_small_disk(ws, scratch, size_kb=512, keys=keys)
        how = "512 kB tmpfs"
    else:
        patch = (
            "import collections\nimport plantation.mapping.guard as g\n"
            "g.shutil = type('S', (), {'disk_usage': staticmethod(lambda p: collections.namedtuple('U', 'total used free')(1, 1, 512 * 1024))})"
        )
        out = scratch / "out"
        ran = _simulated(ws, [*keys, f"out_dir={out}"], patch)
        files = [f"out/{p.name}" for p in out.iterdir()] if out.is_dir() else []
        how = "simulated: free space reported as 512 kB"
    ours = _ours(files)
    held = ran.refused_in_one_line() and "free" in ran.last_line and not ours
    return Outcome(held, ran.last_line, traceback=ran.traceback, corrupt_outputs=len(ours), detail={"how": how, "seconds": round(ran.seconds, 1), "files_left": ours})


def disk_fills_while_writing(ws: Workspace, scratch: Path) -> Outcome:
    """The disk fills after the first tile: one line, the finished tile kept and intact, no temporary file left."""
    keys = _keys_but_out(ws)
    if namespaces_work():
        ran, files = on_small_disk(ws, scratch, size_kb=6144, keys=keys, fill_after_first_tile=True)
        how = "6 MB tmpfs filled once the first tile was finished"
        finished = []  # the disk is gone with its namespace: what it held is in ``files``
    else:
        patch = (
            "import errno, os\nimport plantation.mapping.tiles as t\nn = {'k': 0}\nreal = t.write_cog\n"
            "def full(src, dest):\n    n['k'] += 1\n    if n['k'] < 2:\n        return real(src, dest)\n"
            "    dest.with_name(f'.{dest.name}.partial').write_bytes(b'half')\n    raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))\nt.write_cog = full"
        )
        out = scratch / "out"
        ran = _simulated(ws, [*keys, f"out_dir={out}"], patch)
        files = [f"out/{p.name}" for p in out.iterdir()] if out.is_dir() else []
        finished = sorted(_finished(out))
        how = "simulated: the second tile's COG write raises ENOSPC"
    stray = [f for f in files if f.endswith(".partial") or f.endswith(".raw.tif") or f.endswith(LOCK_NAME)]
    tifs = sorted(f for f in files if f.startswith("out/") and f.endswith(".tif") and not f.split("/")[-1].startswith("."))
    held = ran.refused_in_one_line() and "disk filled up" in ran.last_line and not stray and len(tifs) == 1 and "out/manifest.json" in files
    detail = {"how": how, "tiles_left": tifs, "stray": stray, "exit": ran.returncode}
    if finished:
        detail["finished"] = finished
    return Outcome(held, ran.last_line, traceback=ran.traceback, corrupt_outputs=len(stray), detail=detail)


# --------------------------------------------------------------------------- memory and threads


def peak_tree_rss(proc: subprocess.Popen, every: float = 0.05) -> float:
    """Peak resident memory of a process and all its descendants together while it runs, MB (sampled every ``every`` s)."""
    import psutil

    peak = 0
    root = psutil.Process(proc.pid)
    while proc.poll() is None:
        total = 0
        for p in [root, *_descendants(proc.pid)]:
            try:
                total += p.memory_info().rss
            except psutil.Error:
                pass
        peak = max(peak, total)
        time.sleep(every)
    return peak / 2**20


def _budget_case(ws: Workspace, scratch: Path, *, budget: int | None, engine: tuple[str, ...]) -> Outcome:
    """Map with a memory budget and judge the process tree's peak RSS against it.

    ``budget=None``: the tight case. The same run first goes without a
    budget, and the budget is :data:`TIGHT_SHARE` of its peak, so the
    window must shrink whatever the machine's libraries weigh.
    """
    clean = clean_map(ws, scratch)
    out = scratch / "map"
    unbounded = None
    engine = (*engine, f"engine.gdal_cache_mb={SMALL_GDAL_CACHE_MB}")
    if budget is None:
        free = ws.start("map", *_keys(ws, scratch / "unbounded", *engine), log=scratch / "unbounded.log")
        unbounded = round(peak_tree_rss(free), 1)
        if free.returncode:
            return Outcome(False, f"the run without a budget failed (exit {free.returncode})", detail={"peak_rss_mb": unbounded})
        budget = int(unbounded * TIGHT_SHARE)
    proc = ws.start("map", *_keys(ws, out, f"memory_budget_mb={budget}", *engine), log=scratch / "run.log")
    peak = peak_tree_rss(proc)
    if proc.returncode:
        last = (scratch / "run.log").read_text(errors="replace").strip().splitlines()[-1:]
        return Outcome(False, f"the run failed (exit {proc.returncode}): {last}", detail={"peak_rss_mb": round(peak, 1), "budget_mb": budget, "peak_rss_without_budget_mb": unbounded})
    s = json.loads((out / "summary.json").read_text())
    corrupt, notes = compare(out, clean)
    detail = {"peak_rss_mb": round(peak, 1), "budget_mb": budget, "window": s["window"], "pixel_batch": s["pixel_batch"], "engine": list(engine) or ["in-process"], "equal_to_clean": not corrupt}
    held = peak <= budget
    msg = f"peak RSS {peak:,.0f} MB over the process tree, budget {budget} MB; window {s['window']}, pixel_batch {s['pixel_batch']}"
    if unbounded is not None:
        detail["peak_rss_without_budget_mb"] = unbounded
        msg += f" (without the budget: {unbounded:,.0f} MB)"
    if corrupt:
        # A smaller window may change float rounding only; the map is recorded as such, not as a failure of the budget.
        msg += f"; {'; '.join(notes)}"
    return Outcome(held, msg, detail=detail)


def memory_budget(ws: Workspace, scratch: Path) -> Outcome:
    return _budget_case(ws, scratch, budget=None, engine=())


def memory_budget_dask(ws: Workspace, scratch: Path) -> Outcome:
    return _budget_case(ws, scratch, budget=ws.memory_budget_mb, engine=("engine.workers=2",))


def budget_too_small(ws: Workspace, scratch: Path) -> Outcome:
    """A budget no mapping process fits is refused in one line before any work."""
    out = scratch / "map"
    ran = ws.cli("map", *_keys(ws, out, "memory_budget_mb=64"))
    ours = [p.name for p in out.iterdir()] if out.is_dir() else []
    held = ran.refused_in_one_line() and "memory_budget_mb" in ran.last_line and not any(n.endswith(".tif") for n in ours)
    return Outcome(held, ran.last_line, traceback=ran.traceback, detail={"seconds": round(ran.seconds, 1), "files_left": ours})


def threads_within_cores(ws: Workspace, scratch: Path) -> Outcome:
    """Dask workers × torch threads (read inside each worker after its tiles) never exceed the cores; asking for more is refused in one line."""
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    workers = min(2, cores)
    out = scratch / "map"
    ran = ws.cli("map", *_keys(ws, out, f"engine.workers={workers}"))
    if ran.returncode:
        return Outcome(False, f"the run failed: {ran.last_line}", traceback=ran.traceback)
    threads = json.loads((out / "summary.json").read_text())["torch_threads"]
    used = sum(threads.values())
    over = ws.cli("map", *_keys(ws, scratch / "over", f"engine.workers={workers}", f"engine.threads={cores + 1}"))
    refused = over.refused_in_one_line() and "cores" in over.last_line
    held = len(threads) == workers and used <= cores and refused
    detail = {"cores": cores, "workers": workers, "torch_threads": threads, "oversubscribed_request": over.last_line}
    msg = f"{workers} workers with torch threads {sorted(threads.values())} on {cores} cores; asking for {workers} x {cores + 1}: {over.last_line}"
    return Outcome(held, msg, traceback=over.traceback, detail=detail)


CASES: list[Case] = [
    Case("map_kill_mid_tile", "kill", "SIGKILL the in-process map run inside its first tile, rerun: both tiles redone, equal to the clean map, no temporary file left", kill_mid_tile),
    Case("map_kill_mid_region", "kill", "SIGKILL the in-process map run inside its second tile, rerun: the first kept (not rewritten), the second redone, equal to the clean map", kill_mid_region),
    Case("map_kill_mid_tile_dask", "kill", "SIGKILL the process group of a 2-worker dask map run inside its tiles, rerun: equal to the clean map, no temporary file left", kill_mid_tile_dask),
    Case("map_kill_mid_region_dask", "kill", "SIGKILL the group of a 1-worker dask map run inside its second tile, rerun: the first kept, the second redone, equal to clean", kill_mid_region_dask),
    Case("map_worker_killed", "kill", "SIGKILL the dask worker process writing a tile: its nanny restarts it, the tile runs again, the run ends equal to the clean map", worker_killed),
    Case("map_two_runs_one_folder", "bad_input", "a second map run into a folder being mapped is refused in one line naming the folder; the first run's map is unharmed", two_runs_one_folder),
    Case("map_read_only_out_dir", "bad_input", "out_dir on a read-only file system: refused in one line naming it, before any work, nothing written", read_only_folder),
    Case("map_disk_too_small", "resource", "out_dir on a disk smaller than the outputs' estimate: refused in one line before any tile, nothing written", disk_too_small),
    Case("map_disk_fills_while_writing", "resource", "the disk fills while the second tile is written: one line, the first tile kept, no temporary file left", disk_fills_while_writing),
    Case("map_memory_budget", "resource", f"map in-process with memory_budget_mb at {TIGHT_SHARE:.0%} of the run's peak without one: the window shrinks, peak RSS stays within", memory_budget),
    Case("map_memory_budget_dask", "resource", "map with 2 dask workers and the configured memory_budget_mb: the process tree's peak RSS stays within the budget", memory_budget_dask),
    Case("map_budget_too_small", "bad_input", "memory_budget_mb=64, less than a mapping process: refused in one line before any work", budget_too_small),
    Case("map_threads_within_cores", "resource", "dask workers x torch threads read inside the workers stay within the cores; a request for more is refused in one line", threads_within_cores),
]
