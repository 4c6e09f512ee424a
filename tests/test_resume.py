"""A killed training resumes: threads per process, the random states in checkpoints, the resume record, and a SIGKILLed `plantation train` rerun to the metrics of an uninterrupted one."""

from __future__ import annotations

import json
import os
import random
import signal
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch

from plantation.errors import FileFormatError
from plantation.model import training
from plantation.model.training import RandomState, prepare_resume, read_resume, threads_per_process

ROOT = Path(__file__).resolve().parents[1]
#: Two members (one finished when killed, one interrupted), three short epochs each; the sample's prior skips reading the region's pixels.
QUICK = [
    "network.members=2",
    "training.max_epochs=3",
    "trainer.limit_train_batches=0.25",
    "calibration.prior=sample",
    "distillation.enabled=false",
    "trainer.enable_progress_bar=false",
    "training.threads=1",
]


@pytest.mark.parametrize(
    ("threads", "processes", "cores", "expected"),
    [
        (0, 1, 8, 8),  # one process: every core
        (0, 2, 8, 4),  # DDP, two processes: half each
        (0, 3, 8, 2),
        (0, 4, 2, 1),  # more processes than cores: never 0
        (6, 2, 8, 4),  # asked for more than the share: capped
        (3, 2, 8, 3),
        (6, 1, 2, 6),  # one process: as asked
    ],
)
def test_threads_per_process_never_oversubscribe(threads, processes, cores, expected):
    n = threads_per_process(threads, processes, cores)
    assert n == expected
    if processes > 1:
        assert n * processes <= max(cores, processes)


def test_random_state_survives_a_weights_only_checkpoint(tmp_path):
    torch.manual_seed(3)
    np.random.seed(3)
    random.seed(3)
    state = RandomState().state_dict()
    expected = (torch.rand(5), np.random.rand(3), random.random())
    torch.save({"callbacks": {"RandomState": state}}, tmp_path / "c.ckpt")
    torch.manual_seed(99), np.random.seed(99), random.seed(99)
    loaded = torch.load(tmp_path / "c.ckpt", weights_only=True)  # the way a resume loads it: tensors and plain values only
    RandomState().load_state_dict(loaded["callbacks"]["RandomState"])
    torch.testing.assert_close(torch.rand(5), expected[0])
    np.testing.assert_array_equal(np.random.rand(3), expected[1])
    assert random.random() == expected[2]


def test_resume_record_kept_only_for_the_same_key(tmp_path):
    doc = prepare_resume(tmp_path, "k1", resume=True)
    assert doc == {"format": training.RESUME_FORMAT, "key": "k1", "finished": {}}
    doc["finished"]["member0"] = {"epochs": 3, "sha256": "x"}
    training._write_resume(tmp_path, doc)
    (tmp_path / "checkpoints" / "member1-last.ckpt").write_bytes(b"x")
    assert prepare_resume(tmp_path, "k1", resume=True)["finished"] == {"member0": {"epochs": 3, "sha256": "x"}}
    # Other inputs: the checkpoints go, the run starts afresh.
    assert prepare_resume(tmp_path, "k2", resume=True)["finished"] == {}
    assert not (tmp_path / "checkpoints" / "member1-last.ckpt").exists()
    assert read_resume(tmp_path)["key"] == "k2"
    # resume=false: afresh even with the same key.
    training._write_resume(tmp_path, {**doc, "key": "k2"})
    assert prepare_resume(tmp_path, "k2", resume=False)["finished"] == {}


def test_damaged_resume_record_is_refused_in_one_line(tmp_path):
    (tmp_path / "checkpoints").mkdir()
    (tmp_path / "checkpoints" / "resume.json").write_bytes(b"\x80\x04\x95 binary")
    with pytest.raises(FileFormatError, match=r"resume.json: not a resume record .*resume=false") as err:
        prepare_resume(tmp_path, "k", resume=True)
    assert "\n" not in str(err.value)
    (tmp_path / "checkpoints" / "resume.json").write_text(json.dumps({"format": "other"}))
    with pytest.raises(FileFormatError, match="not a resume record of format"):
        prepare_resume(tmp_path, "k", resume=True)


def _train(out: Path, name: str, *keys: str, **kw) -> subprocess.Popen:
    env = dict(os.environ, PYTHONUNBUFFERED="1", OMP_NUM_THREADS="1")
    return subprocess.Popen(
        [sys.executable, "-m", "plantation", "train", f"out_dir={out}", f"run_name={name}", *QUICK, *keys],
        cwd=ROOT,
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
        **kw,
    )


@pytest.mark.slow
def test_killed_training_resumes_to_the_uninterrupted_result(tmp_path):
    """SIGKILL one epoch into the second member, rerun: member 0 is loaded, member 1 continues, and metrics and weights equal a clean run's.

    Tolerance: none. Training is deterministic (Lightning's deterministic=True,
    one thread) and the checkpoint keeps the random generators' states, so the
    resumed run draws the same batches and augmentation as the clean one.
    """
    clean = _train(tmp_path, "clean")
    killed = _train(tmp_path, "killed")
    last = tmp_path / "killed.partial" / "checkpoints" / "member1-last.ckpt"
    import time

    began = time.monotonic()
    while killed.poll() is None and not last.is_file() and time.monotonic() - began < 1200:
        time.sleep(0.1)
    assert killed.poll() is None, "the training ended before it could be killed inside its second member"
    os.killpg(killed.pid, signal.SIGKILL)
    assert killed.wait() == -signal.SIGKILL
    left = json.loads((tmp_path / "killed.partial" / "checkpoints" / "resume.json").read_text())
    assert sorted(left["finished"]) == ["member0"]
    out, err = clean.communicate(timeout=1800)
    assert clean.returncode == 0, err[-3000:]
    again = _train(tmp_path, "killed")
    out, err = again.communicate(timeout=1800)
    assert again.returncode == 0, err[-3000:]
    assert "resuming an interrupted training (finished: member0)" in err
    a, b = (json.loads((tmp_path / n / "metrics.json").read_text()) for n in ("clean", "killed"))
    assert b["resumed"]["member0"] == "finished" and 1 <= b["resumed"]["member1"] < 3
    assert "resumed" not in a
    assert a["test"] == b["test"] and a["epochs"] == b["epochs"] and a["val_nll"] == b["val_nll"] and a["temperature"] == b["temperature"]
    assert (tmp_path / "clean" / "model" / "model.safetensors").read_bytes() == (tmp_path / "killed" / "model" / "model.safetensors").read_bytes()
    assert not (tmp_path / "killed.partial").exists()
