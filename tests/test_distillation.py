"""The network distilled from the ensemble: where it starts, what it learns, how it is measured, stored and used for maps."""

from __future__ import annotations

import lightning as L
import numpy as np
import pytest
import torch
from torch.utils.data import DataLoader, TensorDataset

from plantation.errors import PlantationError
from plantation.model import artefact
from plantation.model.artefact import calibrated_log_probs
from plantation.model.calibration import mutual_information
from plantation.model.card import Calibration, ModelCard
from plantation.model.distillation import DistillationTask, agreement, ensemble_targets, start_from
from plantation.model.inference import window_probabilities
from plantation.model.network import ConvRecurrentNet, split_epistemic

T = 8  # two years of four dates
SPEC = {"n_channels": 4, "date_year": [0] * 4 + [1] * 4, "day_of_year": [0.1, 0.3, 0.6, 0.8] * 2, "neighbourhood": 3, "date_width": 6, "conv_width": 6, "hidden": 8, "dropout": 0.0}
CAL = Calibration(temperature=1.3, loss_weights=[1.0, 2.0, 1.0, 0.5, 0.5], train_prior=[0.4, 0.1, 0.2, 0.15, 0.15])


def _members(n: int = 3) -> list[ConvRecurrentNet]:
    out = []
    for i in range(n):
        torch.manual_seed(i)
        out.append(ConvRecurrentNet(**SPEC).eval())
    return out


def _patches(b: int, seed: int = 0, k: int = 3) -> tuple[torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(b, T, 4, k, k, generator=g)
    v = torch.rand(b, T, k, k, generator=g) > 0.2
    return x, v


def test_it_starts_as_the_first_member_with_one_more_output():
    nets = _members()
    student = start_from(nets[0], SPEC).eval()
    x, v = _patches(5)
    with torch.no_grad():
        z, e = split_epistemic(student(x, v), student.n_outcomes)
        torch.testing.assert_close(z, nets[0](x, v))
    assert student.n_outputs == nets[0].n_outcomes + 1
    # softplus of the zero-initialised output: non-negative nats.
    torch.testing.assert_close(e, torch.full((5,), float(np.log(2.0))))


def test_targets_are_the_members_mean_and_their_calibrated_mutual_information():
    nets = _members()
    x, v = _patches(4)
    lp, mi = ensemble_targets(nets, CAL, x, v)
    with torch.no_grad():
        z = torch.stack([m(x, v) for m in nets])
    torch.testing.assert_close(lp.exp(), torch.softmax(z, -1).mean(0))
    each = torch.stack([calibrated_log_probs(zm.unsqueeze(0), CAL) for zm in z]).exp()
    np.testing.assert_allclose(mi.numpy(), mutual_information(each.numpy()), rtol=1e-5, atol=1e-7)


def test_distilling_moves_the_network_towards_the_ensemble():
    # A few epochs on random patches: the distance to the ensemble (which the
    # first member alone does not match) must fall well below where it starts.
    nets = _members()
    x, v = _patches(512, seed=3)
    xv, vv = _patches(128, seed=4)
    L.seed_everything(0, verbose=False)
    task = DistillationTask(nets, CAL, SPEC, lr=1e-2, epistemic_weight=1.0, max_epochs=25, date_dropout=0.0)
    before = agreement(nets, task.net.eval(), CAL, xv, vv)
    task.net.train()
    trainer = L.Trainer(max_epochs=25, logger=False, enable_checkpointing=False, enable_progress_bar=False, enable_model_summary=False)
    trainer.fit(task, DataLoader(TensorDataset(x, v), batch_size=64, shuffle=True))
    after = agreement(nets, task.net.eval(), CAL, xv, vv)
    assert before["mean_tv_distance"] > 0.02
    assert after["mean_tv_distance"] < 0.5 * before["mean_tv_distance"]
    assert after["mean_abs_diff_epistemic"] < 0.5 * before["mean_abs_diff_epistemic"]


def test_agreement_of_the_ensemble_with_itself_is_perfect():
    # One member "distilled" into a copy of itself: no distance, no epistemic term.
    nets = _members(1)
    student = start_from(nets[0], SPEC)
    with torch.no_grad():
        student.static_head[-1].bias[-1] = -30.0  # softplus(−30) ≈ 0 nats
    x, v = _patches(50)
    a = agreement(nets, student.eval(), CAL, x, v)
    assert a["mean_tv_distance"] == pytest.approx(0.0, abs=1e-6)
    assert a["same_most_probable"] == 1.0
    assert a["mean_abs_diff_epistemic"] == pytest.approx(0.0, abs=1e-6)


def _card(distilled: dict) -> ModelCard:
    return ModelCard(
        bands=["red", "nir"],
        indices=["NDVI", "NBR"],
        scaling=[],
        dates=[f"{y}-{m:02d}-01" for y in (2015, 2016) for m in (2, 4, 8, 10)],
        years=[2015, 2016],
        network=SPEC,
        members=3,
        calibration=CAL,
        cutoff_year=2015,
        interval_level=0.8,
        region="tiny",
        labels_fingerprint="x",
        package_version="0",
        distilled=distilled,
    )


def test_maps_use_the_distilled_network_and_the_artefact_keeps_it(tmp_path):
    nets = _members()
    student = start_from(nets[1], SPEC).eval()
    artefact.save(tmp_path / "m", _card({"within_tolerance": True}), nets, student)
    art = artefact.load(tmp_path / "m")
    assert art.distilled is not None
    g = torch.Generator().manual_seed(5)
    x = torch.randn(T, 4, 9, 8, generator=g)
    v = torch.rand(T, 9, 8, generator=g) > 0.3
    probs, epi = window_probabilities(art, x, v, pixel_batch=11)
    with torch.no_grad():
        z, e = split_epistemic(student.forward_window(x, v), student.n_outcomes)
    np.testing.assert_allclose(probs, calibrated_log_probs(z.unsqueeze(0), CAL).exp().numpy(), rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(epi, e.numpy(), rtol=1e-5, atol=1e-6)
    # Asked for the ensemble, every member runs.
    probs_all, epi_all = window_probabilities(art, x, v, pixel_batch=11, distilled=False)
    with torch.no_grad():
        zm = torch.stack([m.forward_window(x, v) for m in nets])
    np.testing.assert_allclose(probs_all, calibrated_log_probs(zm, CAL).exp().numpy(), rtol=1e-5, atol=1e-6)
    assert not np.allclose(probs_all, probs)


def test_a_distilled_network_needs_its_record_and_the_other_way_round(tmp_path):
    nets = _members()
    with pytest.raises(PlantationError, match="go together"):
        artefact.save(tmp_path / "a", _card({}), nets, start_from(nets[0], SPEC))
    with pytest.raises(PlantationError, match="go together"):
        artefact.save(tmp_path / "b", _card({"within_tolerance": True}), nets)
