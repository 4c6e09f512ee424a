"""Faults, bad data, broken and untrusted files tried as a long shared run meets them (``plantation benchmark-faults``).

Each :class:`Case` sets up one fault in a scratch copy of a small workspace
(the demo region copied, a quickly trained model, a clean map of it), runs the
tool the way a user would (the ``plantation`` command in a fresh process,
killed or fed the bad file) and says what happened in an :class:`Outcome`:
whether the run held (a killed run resumed to outputs equal to a clean run's;
a bad input refused with one line naming the culprit and nothing
half-written), the message given, outputs found corrupt, whether a traceback
reached the user, whether a planted pickle ran.

Cases live in the modules of this package by the part of the tool they try
(:mod:`.mapping`, :mod:`.inputs`, :mod:`.models`, :mod:`.training`); each
module exposes ``CASES``. :func:`run` builds the workspace once, runs every
case (or those named, whose rows then replace theirs in the earlier result)
and writes ``bench/results/faults.json``.
"""

from __future__ import annotations

import importlib
import json
import os
import shutil
import subprocess
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from plantation.errors import ConfigError
from plantation.records import write_object

#: Kinds of case, as the result counts them.
KINDS: tuple[str, ...] = ("kill", "bad_input", "model_file", "resource")
#: Modules of this package holding cases, in the order they run.
CASE_MODULES: tuple[str, ...] = ("mapping", "inputs", "coverage", "models", "training")
#: Where the demo region lives, relative to the project root.
TOY = "toy_tiles"


@dataclass
class Outcome:
    """What one case found."""

    #: The fault was survived (outputs equal a clean run's) or the bad input refused cleanly.
    held: bool
    #: The one-line message the tool gave (a refusal), or what happened in a few words.
    message: str
    #: Output files found unreadable, half-written or different from a clean run's where they must be equal.
    corrupt_outputs: int = 0
    #: A traceback reached the user for a user error.
    traceback: bool = False
    #: A pickle payload planted where a model or checkpoint is expected was executed.
    pickle_executed: bool = False
    #: Anything else worth keeping (numbers measured, exit codes).
    detail: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Case:
    """One fault or bad input, tried in a scratch folder of its own."""

    name: str
    kind: str
    #: One line: the fault tried and what must happen.
    what: str
    #: Runs the case: (workspace, empty scratch folder) -> outcome.
    run: Callable[[Workspace, Path], Outcome]


@dataclass
class Ran:
    """A finished command: exit status and what it printed."""

    returncode: int
    stdout: str
    stderr: str
    seconds: float

    @property
    def last_line(self) -> str:
        """The last non-empty line of stderr (where a refusal is printed)."""
        lines = [ln for ln in self.stderr.splitlines() if ln.strip()]
        return lines[-1] if lines else ""

    @property
    def traceback(self) -> bool:
        return "Traceback (most recent call last)" in self.stderr

    def refused_in_one_line(self) -> bool:
        """Non-zero exit, one ``error:`` line, no traceback."""
        return self.returncode != 0 and self.last_line.startswith("error:") and not self.traceback


@dataclass
class Workspace:
    """The shared starting point of every case (read it, copy what you change; never write into it).

    ``region`` is a region file over ``tiles`` (a copy of the demo region),
    ``model`` a quickly trained run folder (its artefact in ``model/``), ``clean_map`` the map of the
    region with that model, made without any fault.
    """

    root: Path
    region: Path
    tiles: Path
    model: Path
    clean_map: Path
    #: Keys every map command of the cases passes (window, engine), so runs compare with ``clean_map``.
    map_keys: tuple[str, ...] = ()
    threads: int = 1
    #: Peak-memory budget the resource cases give and judge against, MB (the benchmark's ``memory_budget_mb``).
    memory_budget_mb: int = 2048

    def env(self) -> dict[str, str]:
        env = dict(os.environ)
        env.setdefault("OMP_NUM_THREADS", str(self.threads))
        env["PYTHONUNBUFFERED"] = "1"
        return env

    def command(self, verb: str, *keys: str) -> list[str]:
        """The ``plantation`` command line of a verb."""
        return [sys.executable, "-m", "plantation", verb, *keys]

    def cli(self, verb: str, *keys: str, timeout: float = 900, cwd: Path | None = None) -> Ran:
        """Run a verb to its end in a fresh process."""
        began = time.perf_counter()
        res = subprocess.run(self.command(verb, *keys), capture_output=True, text=True, timeout=timeout, env=self.env(), cwd=cwd or self.root)
        return Ran(res.returncode, res.stdout, res.stderr, time.perf_counter() - began)

    def start(self, verb: str, *keys: str, cwd: Path | None = None, log: Path | None = None) -> subprocess.Popen:
        """Start a verb in a fresh process (its own process group, so a kill takes its children too)."""
        out = open(log, "w") if log else subprocess.DEVNULL  # noqa: SIM115 - handed to the child
        return subprocess.Popen(self.command(verb, *keys), stdout=out, stderr=subprocess.STDOUT, env=self.env(), cwd=cwd or self.root, start_new_session=True)

    def copy_tiles(self, dest: Path) -> Path:
        """A copy of the region's tiles and a region file over it, for cases that damage imagery or labels."""
        shutil.copytree(self.tiles, dest / "tiles")
        region = dest / "region.yaml"
        region.write_text(self.region.read_text().replace(str(self.tiles), str(dest / "tiles")))
        return region


@dataclass
class FaultsConfig:
    """Schema of ``configs/benchmark_faults.yaml``."""

    #: Where the workspace is built and each case's scratch folder made (rebuilt when absent).
    work_dir: str = "bench/cache/faults"
    #: Cases to run by name (empty: all).
    cases: list[str] = field(default_factory=list)
    #: Training keys of the workspace's quick model.
    train_keys: list[str] = field(default_factory=lambda: ["network.members=1", "training.max_epochs=2", "distillation.enabled=false", "trainer.enable_progress_bar=false"])
    #: Map keys every mapping case uses (small windows make a tile take long enough to be killed inside).
    map_keys: list[str] = field(default_factory=lambda: ["window=64", "quicklook=false", "progress=false"])
    #: Peak-memory budget of mapping and training, MB (checked by the resource cases).
    memory_budget_mb: int = 2048
    #: Where the JSON result goes.
    result: str = "bench/results/faults.json"


def all_cases() -> list[Case]:
    """Every case of every module, in order; names are unique."""
    cases: list[Case] = []
    for mod in CASE_MODULES:
        try:
            m = importlib.import_module(f"{__name__}.{mod}")
        except ModuleNotFoundError as exc:
            if exc.name != f"{__name__}.{mod}":
                raise
            continue
        cases.extend(m.CASES)
    names = [c.name for c in cases]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise RuntimeError(f"fault cases named twice: {dup}")
    bad = sorted({c.kind for c in cases} - set(KINDS))
    if bad:
        raise RuntimeError(f"fault cases of unknown kind: {bad}")
    return cases


def select(cases: Sequence[Case], names: Sequence[str]) -> list[Case]:
    """The cases named (all when none), refusing unknown names."""
    if not names:
        return list(cases)
    known = {c.name: c for c in cases}
    unknown = [n for n in names if n not in known]
    if unknown:
        raise ConfigError(f"cases: {unknown} are not fault cases; known: {sorted(known)}")
    return [known[n] for n in names]


def build_workspace(cfg: FaultsConfig, project: Path) -> Workspace:
    """Copy the demo region, train the quick model and map it cleanly (each step kept when already done)."""
    root = Path(cfg.work_dir).resolve() / "workspace"
    root.mkdir(parents=True, exist_ok=True)
    tiles = root / "tiles"
    if not tiles.is_dir():
        shutil.copytree(project / TOY, tiles)
    region = root / "region.yaml"
    src = (project / "configs" / "region" / "toy.yaml").read_text()
    region.write_text(src.replace("../../toy_tiles", str(tiles)))
    ws = Workspace(root=root, region=region, tiles=tiles, model=root / "runs" / "quick", clean_map=root / "clean_map", map_keys=tuple(cfg.map_keys), memory_budget_mb=cfg.memory_budget_mb)
    if not (ws.model / "model" / "model.json").is_file():
        r = ws.cli("train", f"region={region}", f"out_dir={root / 'runs'}", "run_name=quick", *cfg.train_keys, timeout=3600)
        if r.returncode:
            raise RuntimeError(f"the workspace's model did not train: {r.last_line}")
    if not (ws.clean_map / "manifest.json").is_file():
        r = ws.cli("map", f"region={region}", f"model={ws.model}", f"out_dir={ws.clean_map}", *cfg.map_keys, timeout=3600)
        if r.returncode:
            raise RuntimeError(f"the workspace's clean map failed: {r.last_line}")
    return ws


def run(cfg: FaultsConfig, project: Path | None = None) -> dict[str, Any]:
    """Run the cases and write the result (see the module docstring for its keys)."""
    project = (project or Path.cwd()).resolve()
    cases = select(all_cases(), cfg.cases)
    ws = build_workspace(cfg, project)
    scratch_root = Path(cfg.work_dir).resolve() / "cases"
    rows: list[dict[str, Any]] = []
    for case in cases:
        scratch = scratch_root / case.name
        shutil.rmtree(scratch, ignore_errors=True)
        scratch.mkdir(parents=True)
        began = time.perf_counter()
        try:
            out = case.run(ws, scratch)
        except Exception as exc:  # a case that crashes is a case that did not hold
            out = Outcome(held=False, message=f"the case itself failed: {type(exc).__name__}: {exc}")
        rows.append({"name": case.name, "kind": case.kind, "what": case.what, **asdict(out), "seconds": round(time.perf_counter() - began, 1)})
        print(f"{'held ' if out.held else 'FAILED'} {case.kind:<10} {case.name}: {out.message}", flush=True)
    if cfg.cases:
        rows = with_earlier_rows(rows, cfg.result, [c.name for c in all_cases()])
    result = relative_paths(summarise(rows, cfg), project)
    write_object(result, cfg.result)
    return result


def with_earlier_rows(rows: list[dict[str, Any]], result: str | Path, order: Sequence[str]) -> list[dict[str, Any]]:
    """``rows`` of the cases just run together with the other cases' rows of an earlier ``result`` (when there is one), in ``order``.

    So a case rerun after a fix updates its row and the counts, and the
    result still covers every case; rows of cases no longer known are dropped.
    """
    path = Path(result)
    earlier = json.loads(path.read_text())["cases"] if path.is_file() else []
    by_name = {r["name"]: r for r in earlier} | {r["name"]: r for r in rows}
    return [by_name[n] for n in order if n in by_name]


def relative_paths(result: dict[str, Any], project: Path) -> dict[str, Any]:
    """``result`` with the project's folder cut from every path in it, so messages name files as they stand in the project."""
    return json.loads(json.dumps(result).replace(json.dumps(str(project) + os.sep)[1:-1], ""))


def summarise(rows: list[dict[str, Any]], cfg: FaultsConfig) -> dict[str, Any]:
    """The result's counts from the case rows."""

    def of(kind: str) -> list[dict[str, Any]]:
        return [r for r in rows if r["kind"] == kind]

    refused = [r for r in rows if r["kind"] in ("bad_input", "model_file")]
    resume = [r["detail"]["resume_metric_delta"] for r in rows if "resume_metric_delta" in r["detail"]]
    rss = [r["detail"]["peak_rss_mb"] for r in rows if "peak_rss_mb" in r["detail"]]
    return {
        "cases_tried": len(rows),
        "cases_held": sum(r["held"] for r in rows),
        "kills_tried": len(of("kill")),
        "kills_survived": sum(r["held"] for r in of("kill")),
        "bad_inputs_tried": len(refused),
        "bad_inputs_refused": sum(r["held"] for r in refused),
        "outputs_corrupt": sum(r["corrupt_outputs"] for r in rows),
        "user_error_tracebacks": sum(r["traceback"] for r in refused),
        "pickles_executed": sum(r["pickle_executed"] for r in rows),
        "resume_metric_delta": max(resume, key=abs) if resume else None,
        "peak_rss_mb": max(rss) if rss else None,
        "memory_budget_mb": cfg.memory_budget_mb,
        "cases": rows,
    }
