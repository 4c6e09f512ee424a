"""Training killed and resumed, checkpoints that cannot be trusted, and training's memory and threads.

A killed ``plantation train`` rerun with the same run name continues: the
members already trained are loaded, the interrupted one goes on from its last
epoch (:func:`plantation.model.training.fit`). The kill case compares the
resumed run's test metrics and weights with an uninterrupted run's of the same
seed (``resume_metric_delta``: the largest absolute difference of a test
metric). Training is deterministic (``deterministic=True``, the random
generators' states kept in every checkpoint), so the difference expected is 0.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from plantation.benchmarks.faults import Case, Outcome, Ran, Workspace
from plantation.benchmarks.faults.models import MARKER, pickle_payload, refusal
from plantation.model import artefact

#: A small training that still has what a resume must get right: two members (one finished, one interrupted), several epochs each.
QUICK: tuple[str, ...] = (
    "network.members=2",
    "training.max_epochs=3",
    "trainer.limit_train_batches=0.25",
    "calibration.prior=sample",
    "distillation.enabled=false",
    "trainer.enable_progress_bar=false",
)
#: Seconds any one training of a case may take.
TIMEOUT = 1800


@dataclass
class Measured:
    """A command run to its end while its process tree's memory was sampled."""

    ran: Ran
    #: Largest sum of the resident set sizes of the process and its descendants seen, MB.
    peak_rss_mb: float
    #: Largest resident set size of any one process of the tree seen, MB.
    peak_process_rss_mb: float = 0.0


def tree_rss_mb(proc: Any) -> tuple[float, float]:
    """Resident memory of a process and all its descendants, and of the largest one, MB (0 once it is gone)."""
    import psutil

    try:
        procs = [proc, *proc.children(recursive=True)]
    except psutil.Error:
        return 0.0, 0.0
    sizes = []
    for p in procs:
        try:
            sizes.append(p.memory_info().rss)
        except psutil.Error:
            continue
    return sum(sizes) / 2**20, max(sizes, default=0) / 2**20


def run_measured(ws: Workspace, verb: str, *keys: str, log: Path, every: float = 0.1, timeout: float = TIMEOUT) -> Measured:
    """Run a verb to its end, sampling its process tree's resident memory every ``every`` seconds (psutil)."""
    import psutil

    began = time.perf_counter()
    proc = ws.start(verb, *keys, log=log)
    ps = psutil.Process(proc.pid)
    peak = one = 0.0
    while proc.poll() is None:
        total, largest = tree_rss_mb(ps)
        peak, one = max(peak, total), max(one, largest)
        if time.perf_counter() - began > timeout:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
            break
        time.sleep(every)
    text = log.read_text() if log.is_file() else ""
    return Measured(Ran(proc.returncode, "", text, time.perf_counter() - began), round(peak, 1), round(one, 1))


def kill_when(proc: subprocess.Popen, ready: Callable[[], bool], timeout: float = TIMEOUT) -> bool:
    """SIGKILL ``proc``'s process group as soon as ``ready()``; False when the process ended (or timed out) first."""
    began = time.perf_counter()
    while proc.poll() is None:
        if ready():
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
            return True
        if time.perf_counter() - began > timeout:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
            return False
        time.sleep(0.1)
    return False


def _metrics(run: Path) -> dict[str, Any]:
    return json.loads((run / "metrics.json").read_text())


def metric_delta(a: dict[str, Any], b: dict[str, Any]) -> float:
    """Largest absolute difference between two runs' test metrics, validation NLL and temperature (inf where a key is missing from one)."""
    keys = [("test", k) for k in a.get("test", {})] + [("val_nll",), ("temperature",)]
    worst = 0.0
    for key in keys:
        va: Any = a
        vb: Any = b
        for part in key:
            va = va.get(part) if isinstance(va, dict) else None
            vb = vb.get(part) if isinstance(vb, dict) else None
        if not isinstance(va, (int, float)) or not isinstance(vb, (int, float)):
            return float("inf")
        worst = max(worst, abs(float(va) - float(vb)))
    return worst


def killed_mid_member(ws: Workspace, scratch: Path) -> Outcome:
    """Train cleanly; train again and SIGKILL it one epoch into its second member; rerun; compare."""
    runs = scratch / "runs"
    keys = [f"region={ws.region}", f"out_dir={runs}", *QUICK]
    clean = run_measured(ws, "train", *keys, "run_name=clean", log=scratch / "clean.log")
    if clean.ran.returncode:
        return Outcome(False, f"the uninterrupted training failed: {clean.ran.last_line}")
    ckpts = runs / "killed.partial" / "checkpoints"
    proc = ws.start("train", *keys, "run_name=killed", log=scratch / "killed.log")
    if not kill_when(proc, lambda: (ckpts / "member1-last.ckpt").is_file()):
        return Outcome(False, "the training ended before it could be killed inside its second member", detail={"returncode": proc.returncode})
    left = json.loads((ckpts / "resume.json").read_text())
    again = run_measured(ws, "train", *keys, "run_name=killed", log=scratch / "resumed.log")
    if again.ran.returncode:
        return Outcome(False, f"the resumed training failed: {again.ran.last_line}", traceback=again.ran.traceback, detail={"finished_when_killed": sorted(left["finished"])})
    a, b = _metrics(runs / "clean"), _metrics(runs / "killed")
    delta = metric_delta(a, b)
    same_weights = (runs / "clean" / "model" / "model.safetensors").read_bytes() == (runs / "killed" / "model" / "model.safetensors").read_bytes()
    corrupt = 0
    try:
        artefact.load(runs / "killed" / "model")
    except Exception:  # any failure to load is a corrupt output
        corrupt = 1
    resumed = b.get("resumed", {})
    took_up = resumed.get("member0") == "finished" and isinstance(resumed.get("member1"), int)
    held = took_up and delta == 0 and a["epochs"] == b["epochs"] and same_weights and not corrupt and not (runs / "killed.partial").exists()
    return Outcome(
        held=held,
        message=f"resumed ({resumed}); test metrics differ by at most {delta}, weights {'identical' if same_weights else 'different'}",
        corrupt_outputs=corrupt,
        detail={
            "resume_metric_delta": delta,
            "weights_identical": same_weights,
            "finished_when_killed": sorted(left["finished"]),
            "resumed": resumed,
            "epochs": {"clean": a["epochs"], "resumed": b["epochs"]},
            "peak_rss_mb": max(clean.peak_rss_mb, again.peak_rss_mb),
            "seconds": {"clean": round(clean.ran.seconds, 1), "resumed": round(again.ran.seconds, 1)},
        },
    )


def checkpoint_pickle(ws: Workspace, scratch: Path) -> Outcome:
    """Kill a training after its first epoch, plant a pickle as the checkpoint the rerun resumes from: refused in one line, never run."""
    runs = scratch / "runs"
    keys = [f"region={ws.region}", f"out_dir={runs}", "run_name=r", *QUICK]
    last = runs / "r.partial" / "checkpoints" / "member0-last.ckpt"
    proc = ws.start("train", *keys, log=scratch / "killed.log")
    if not kill_when(proc, last.is_file):
        return Outcome(False, "the training ended before its first checkpoint could be replaced", detail={"returncode": proc.returncode})
    last.write_bytes(pickle_payload(scratch / MARKER))
    r = ws.cli("train", *keys, timeout=TIMEOUT)
    out = refusal(r, scratch, names="member0-last.ckpt")
    if (runs / "r").exists():
        out.held, out.corrupt_outputs = False, out.corrupt_outputs + 1
    return out


def resume_record_damaged(ws: Workspace, scratch: Path) -> Outcome:
    """Kill a training after its first epoch and put binary bytes in its resume record: the rerun refuses in one line naming it."""
    runs = scratch / "runs"
    keys = [f"region={ws.region}", f"out_dir={runs}", "run_name=r", *QUICK]
    ckpts = runs / "r.partial" / "checkpoints"
    proc = ws.start("train", *keys, log=scratch / "killed.log")
    if not kill_when(proc, (ckpts / "member0-last.ckpt").is_file):
        return Outcome(False, "the training ended before it could be killed", detail={"returncode": proc.returncode})
    (ckpts / "resume.json").write_bytes(pickle_payload(scratch / MARKER))
    r = ws.cli("train", *keys, timeout=TIMEOUT)
    return refusal(r, scratch, names="resume.json")


def ddp_threads_and_memory(ws: Workspace, scratch: Path) -> Outcome:
    """Two DDP processes on this machine: each gets cores ÷ processes torch threads, and each stays within the memory budget.

    Each DDP process is a whole replica (its own samples, network and
    optimiser), as it is on separate machines, the case DDP is there for; so
    the budget applies per process, and the tree's total (the processes
    summed, which one machine must hold when it runs them all) is reported
    beside it as ``tree_rss_mb``, not as ``peak_rss_mb``.
    """
    budget = ws.memory_budget_mb
    runs = scratch / "runs"
    keys = [f"region={ws.region}", f"out_dir={runs}", "run_name=ddp", "trainer=ddp_cpu", "network.members=1", "training.max_epochs=1", *QUICK[2:]]
    m = run_measured(ws, "train", *keys, log=scratch / "ddp.log")
    sizes = {"process_rss_mb": m.peak_process_rss_mb, "tree_rss_mb": m.peak_rss_mb, "memory_budget_mb": budget}
    if m.ran.returncode:
        return Outcome(False, f"DDP training failed: {m.ran.last_line}", traceback=m.ran.traceback, detail=sizes)
    t = _metrics(runs / "ddp")["threads"]
    fits = t["torch_per_process"] * t["processes_per_machine"] <= t["usable_cores"] or t["torch_per_process"] == 1
    held = fits and m.peak_process_rss_mb <= budget
    return Outcome(
        held=held,
        message=(
            f"{t['processes_per_machine']} processes x {t['torch_per_process']} torch threads on {t['usable_cores']} cores; "
            f"largest process {m.peak_process_rss_mb} MB (budget {budget} MB), the two together {m.peak_rss_mb} MB"
        ),
        detail={**sizes, **t, "seconds": round(m.ran.seconds, 1)},
    )


#: Keys of the memory cases' training: the full pipeline (distillation, the bbse prior from the region's pixels), few epochs.
MEMORY_RUN: tuple[str, ...] = ("network.members=2", "training.max_epochs=2", "distillation.max_epochs=2", "trainer.enable_progress_bar=false")
#: An inference batch far larger than the default, so that without a budget the run would outgrow it.
LARGE_INFERENCE_BATCH = 4096


def _budget_record(run: Path) -> dict[str, Any]:
    metrics = run / "metrics.json"
    return json.loads(metrics.read_text()).get("memory_budget", {}) if metrics.is_file() else {}


def peak_rss(ws: Workspace, scratch: Path) -> Outcome:
    """A quick training with the full pipeline (distillation, the bbse prior from the region's pixels) given the configured budget."""
    budget = ws.memory_budget_mb
    runs = scratch / "runs"
    keys = [f"region={ws.region}", f"out_dir={runs}", "run_name=mem", *MEMORY_RUN, f"memory_budget_mb={budget}"]
    m = run_measured(ws, "train", *keys, log=scratch / "train.log")
    if m.ran.returncode:
        return Outcome(False, f"training failed: {m.ran.last_line}", traceback=m.ran.traceback, detail={"peak_rss_mb": m.peak_rss_mb})
    plan = _budget_record(runs / "mem")
    return Outcome(
        held=m.peak_rss_mb <= budget and bool(plan),
        message=f"peak {m.peak_rss_mb} MB (budget {budget} MB, estimated {plan.get('need_mb')} MB) in {m.ran.seconds:.0f} s; inference batch {plan.get('inference_batch')}",
        detail={"peak_rss_mb": m.peak_rss_mb, "memory_budget_mb": budget, "seconds": round(m.ran.seconds, 1), "plan": plan},
    )


def large_inference_batch(ws: Workspace, scratch: Path) -> Outcome:
    """Training asked for a large inference batch: without a budget its peak exceeds the configured budget; with it, the batch is lowered and the peak stays within."""
    budget = ws.memory_budget_mb
    runs = scratch / "runs"
    keys = [f"region={ws.region}", f"out_dir={runs}", *MEMORY_RUN, f"training.inference_batch={LARGE_INFERENCE_BATCH}"]
    free = run_measured(ws, "train", *keys, "run_name=unbounded", log=scratch / "unbounded.log")
    if free.ran.returncode:
        return Outcome(False, f"the training without a budget failed: {free.ran.last_line}", traceback=free.ran.traceback)
    bound = run_measured(ws, "train", *keys, "run_name=bounded", f"memory_budget_mb={budget}", log=scratch / "bounded.log")
    if bound.ran.returncode:
        return Outcome(False, f"the training with a budget failed: {bound.ran.last_line}", traceback=bound.ran.traceback, detail={"peak_rss_without_budget_mb": free.peak_rss_mb})
    plan = _budget_record(runs / "bounded")
    lowered = plan.get("inference_batch", LARGE_INFERENCE_BATCH) < LARGE_INFERENCE_BATCH
    return Outcome(
        # The budget must have bound: without it the same run outgrows it.
        held=bound.peak_rss_mb <= budget and lowered and free.peak_rss_mb > budget,
        message=(
            f"inference batch {LARGE_INFERENCE_BATCH} lowered to {plan.get('inference_batch')}: peak {bound.peak_rss_mb:,.0f} MB, budget {budget} MB "
            f"(estimated {plan.get('need_mb')} MB; without the budget: {free.peak_rss_mb:,.0f} MB)"
        ),
        detail={
            "peak_rss_mb": bound.peak_rss_mb,
            "budget_mb": budget,
            "peak_rss_without_budget_mb": free.peak_rss_mb,
            "asked_inference_batch": LARGE_INFERENCE_BATCH,
            "plan": plan,
            "seconds": {"unbounded": round(free.ran.seconds, 1), "bounded": round(bound.ran.seconds, 1)},
        },
    )


CASES: list[Case] = [
    Case(
        "train_killed_mid_member",
        "kill",
        "`plantation train` (2 members) SIGKILLed one epoch into its second member, then rerun: the first member is kept, the second continues, and metrics and weights equal an uninterrupted run's",
        killed_mid_member,
    ),
    Case("train_checkpoint_pickle", "model_file", "a pickle planted as the last checkpoint a killed training resumes from: the rerun refuses it in one line, the pickle never runs", checkpoint_pickle),
    Case("train_resume_record_damaged", "bad_input", "binary bytes in a killed training's resume record: the rerun refuses it in one line naming the file", resume_record_damaged),
    Case("train_ddp_threads", "resource", "DDP training, two processes on one machine: threads x processes within the cores, each process's peak memory within budget", ddp_threads_and_memory),
    Case("train_peak_rss", "resource", "a quick training with distillation and the bbse prior, given the budget: peak resident memory of the process tree within it", peak_rss),
    Case(
        "train_memory_budget",
        "resource",
        f"a quick training asking for an inference batch of {LARGE_INFERENCE_BATCH}, run without and with the budget: with it the batch is lowered and the peak stays within",
        large_inference_batch,
    ),
]
