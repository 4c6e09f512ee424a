"""Training: loss weights, config checks, and whole runs of `plantation train` on the toy region."""

from __future__ import annotations

import json
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import torch

from plantation.errors import ConfigError
from plantation.imagery.region import open_region
from plantation.model import artefact
from plantation.model.config import TrainingConfig
from plantation.model.inference import predict_tile
from plantation.model.training import ConversionTask, TrainConfig, check_config, outcome_weights

ROOT = Path(__file__).resolve().parents[1]
QUICK = ["network.members=1", "training.max_epochs=2", "trainer.enable_progress_bar=false"]


def train(tmp_path: Path, *overrides: str, name: str = "run") -> subprocess.CompletedProcess:
    return subprocess.run([str(Path(sys.executable).parent / "plantation"), "train", f"out_dir={tmp_path}", f"run_name={name}", *overrides], cwd=ROOT, capture_output=True, text=True, timeout=900)


def test_outcome_weights_inverse_sqrt():
    y = np.array([0] * 16 + [1] * 4 + [3])
    w = outcome_weights(y, 5, "inverse_sqrt")
    raw = np.array([1 / 4, 1 / 2, 1.0, 1.0, 1.0])  # n = 16, 4, 0 (→ 1), 1, 0 (→ 1)
    np.testing.assert_allclose(w, raw / raw[y].mean())
    assert w[y].mean() == pytest.approx(1.0)
    assert (outcome_weights(y, 5, "none") == 1).all()


def test_generalised_cross_entropy_value():
    spec = {"n_channels": 2, "date_year": [0, 1], "day_of_year": [0.2, 0.2], "neighbourhood": 1, "conv_width": 2, "hidden": 4}
    task = ConversionTask(spec, loss_weights=[1.0] * 5, loss="gce", gce_q=0.5)
    logits = torch.log(torch.tensor([[0.64, 0.09, 0.09, 0.09, 0.09]]))
    # (1 - p^q) / q with p = 0.64, q = 0.5: (1 - 0.8) / 0.5 = 0.4 (Zhang & Sabuncu 2018, eq. 6)
    assert task._loss(logits, torch.tensor([0])).item() == pytest.approx(0.4, rel=1e-5)
    task_ce = ConversionTask(spec, loss_weights=[1.0] * 5, loss="ce")
    assert task_ce._loss(logits, torch.tensor([0])).item() == pytest.approx(-np.log(0.64), rel=1e-5)


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"loss": "focal"}, "training.loss: 'focal'"),
        ({"date_dropout": 1.0}, "training.date_dropout"),
        ({"max_epochs": 0}, "training.max_epochs: 0 must be at least 1"),
        ({"class_weighting": "balanced"}, "training.class_weighting"),
        ({"inference_batch": 0}, "training.inference_batch: 0 must be at least 1"),
    ],
)
def test_bad_training_values_are_refused(change, message):
    with pytest.raises(ConfigError, match=message):
        check_config(TrainConfig(training=TrainingConfig(**change)))


def test_a_memory_budget_below_one_mb_is_refused():
    with pytest.raises(ConfigError, match=r"^memory_budget_mb: 0 must be at least 1, or null for no budget$"):
        check_config(TrainConfig(memory_budget_mb=0))


@pytest.mark.slow
def test_train_script_writes_a_complete_run(tmp_path):
    res = train(tmp_path, "network.members=2", "training.max_epochs=3", "distillation.pixels=1000", "distillation.max_epochs=8", "trainer.enable_progress_bar=false")
    assert res.returncode == 0, res.stderr[-3000:]
    run = tmp_path / "run"
    assert str(run) in res.stdout
    assert {p.name for p in run.iterdir()} >= {"config.yaml", "labels.json", "metrics.json", "checkpoints", "logs", "model"}
    assert sorted(p.name for p in (run / "checkpoints").iterdir()) == [
        "distilled.ckpt",
        "distilled.safetensors",
        "member0.ckpt",
        "member0.safetensors",
        "member1.ckpt",
        "member1.safetensors",
        "resume.json",
    ]
    labels = json.loads((run / "labels.json").read_text())
    assert len(labels["fingerprint"]) == 64 and labels["counts"]["conversion"] > 500
    assert labels["split"]["train"] > 1500 and labels["split"]["val"] > 150 and labels["split"]["test"] > 150
    m = json.loads((run / "metrics.json").read_text())
    # Temperature scaling never raises the validation NLL it was fitted on.
    assert m["val_nll"] <= m["val_nll_before_temperature"] + 1e-6
    # Three epochs already separate the classes far beyond the majority share (0.35).
    assert m["test"]["label_accuracy"] > 0.7
    assert m["test"]["year_exact"] > 0.4
    art = artefact.load(run / "model")
    assert art.card.members == 2 and art.card.years == list(range(2013, 2025))
    assert art.card.calibration.conformal_qhat is not None and len(art.card.calibration.train_prior) == 15
    # The exported model maps a corner of a toy tile: one distribution per pixel.
    from omegaconf import OmegaConf

    from plantation.config import to_object
    from plantation.imagery.config import RegionConfig

    cfg = OmegaConf.load(run / "config.yaml")
    region = to_object(cfg.region, RegionConfig)
    stack = open_region(region)[0]
    corner = type(stack)(stack.name, stack.reflectance.isel(y=slice(0, 20), x=slice(0, 24)), stack.valid.isel(y=slice(0, 20), x=slice(0, 24)), replace(stack.grid, height=20, width=24))
    tp = predict_tile(art, corner, window=16)
    assert tp.probs.shape == (20, 24, 15)
    np.testing.assert_allclose(tp.probs.sum(-1), 1.0, atol=1e-5)
    assert (tp.epistemic >= 0).all() and tp.epistemic.max() > 0
    # The distilled network maps by default; it stays within its stated
    # tolerance of the ensemble it replaces, on validation and on the map.
    dist = m["distillation"]
    assert dist["within_tolerance"] and art.distilled is not None and art.card.distilled == dist
    tol = dist["tolerance"]["mean_tv_distance"]
    assert dist["validation"]["mean_tv_distance"] <= tol and dist["validation"]["n"] == labels["split"]["val"]
    every = predict_tile(art, corner, window=16, distilled=False)
    assert 0.5 * np.abs(tp.probs - every.probs).sum(-1).mean() <= tol
    assert not np.allclose(tp.probs, every.probs)
    assert np.abs(tp.epistemic - every.epistemic).mean() < max(0.05, 0.5 * every.epistemic.mean())


@pytest.mark.slow
def test_same_config_and_seed_reproduce_the_metrics(tmp_path):
    a = train(tmp_path, *QUICK, name="a")
    b = train(tmp_path, *QUICK, name="b")
    assert a.returncode == 0 and b.returncode == 0, a.stderr[-2000:] + b.stderr[-2000:]
    ma, mb = (json.loads((tmp_path / n / "metrics.json").read_text()) for n in ("a", "b"))
    ma.pop("train_seconds"), mb.pop("train_seconds")
    assert ma == mb
    c = train(tmp_path, *QUICK, "training.seed=1", name="c")
    assert c.returncode == 0, c.stderr[-2000:]
    mc = json.loads((tmp_path / "c" / "metrics.json").read_text())
    assert mc["test"] != ma["test"]


@pytest.mark.slow
def test_ddp_on_two_cpu_processes_trains_and_exports(tmp_path):
    res = train(tmp_path, "trainer=ddp_cpu", "network.members=1", "training.max_epochs=1", "trainer.enable_progress_bar=false")
    assert res.returncode == 0, res.stderr[-3000:]
    # Two processes share each epoch: about 2,050 training samples in batches
    # of 64 make about 32 steps on one process and 15 or 16 per process under
    # DDP (the logged step index is one less); one process alone would log ~31.
    import pandas as pd

    log = pd.read_csv(tmp_path / "run" / "logs" / "member0" / "metrics.csv")
    assert 14 <= int(log["step"].max()) <= 16
    art = artefact.load(tmp_path / "run" / "model")
    assert art.card.members == 1
    assert not list(tmp_path.glob("*.partial"))


@pytest.mark.slow
@pytest.mark.parametrize(
    ("overrides", "message"),
    [
        (["region.labels.path=null"], "labels.path is not set"),
        (["region.tiles.1.path=no/such/folder"], "no/such/folder: tile 't02' folder does not exist"),
        (["training.loss=focal"], "training.loss: 'focal' is not one of"),
        (["+network.width=3"], "width"),
        # The budget is checked once the samples are cut, before the run folder is made.
        (["memory_budget_mb=600"], "memory_budget_mb: 600 MB is less than this training needs with an inference batch of 64"),
    ],
)
def test_train_bad_input_one_line_error_nothing_written(tmp_path, overrides, message):
    res = train(tmp_path, *QUICK, *overrides)
    assert res.returncode == 1
    lines = res.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and message in lines[0], res.stderr[-2000:]
    assert not list(tmp_path.iterdir())
