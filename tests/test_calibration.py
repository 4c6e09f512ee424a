"""Calibration arithmetic on small arrays with known answers."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import softmax

from plantation.model.calibration import adjust_priors, conformal_sets, conformal_threshold, fit_temperature, mutual_information, nll, reweight


def _overconfident(n: int, k: int, seed: int, scale: float = 4.0) -> tuple[np.ndarray, np.ndarray]:
    """Logits whose softmax at T = 1 is calibrated, multiplied by ``scale`` (over-confident)."""
    rng = np.random.default_rng(seed)
    z = rng.normal(0, 1.5, (n, k))
    y = np.array([rng.choice(k, p=p) for p in softmax(z, axis=1)])
    return z * scale, y


def test_temperature_recovers_the_scale_and_lowers_nll_on_held_out_data():
    z, y = _overconfident(4000, 6, seed=1)
    t = fit_temperature(z[:2000], y[:2000])
    assert t == pytest.approx(4.0, rel=0.15)
    assert nll(z[2000:], y[2000:], t) < nll(z[2000:], y[2000:]) - 0.1


def test_prior_em_recovers_a_known_shift():
    # Two well-separated Gaussian classes; a calibrated posterior under a 50/50
    # prior, applied to data drawn 90/10: EM must find 0.9/0.1.
    rng = np.random.default_rng(2)
    y = (rng.random(20000) < 0.1).astype(int)
    x = rng.normal(np.where(y == 1, 2.0, -2.0), 1.0)
    lik = np.stack([np.exp(-((x + 2) ** 2) / 2), np.exp(-((x - 2) ** 2) / 2)], 1)
    post = lik / lik.sum(1, keepdims=True)  # posterior under a 50/50 prior
    adjusted, prior = adjust_priors(post, np.array([0.5, 0.5]))
    assert prior[1] == pytest.approx(0.1, abs=0.01)
    np.testing.assert_allclose(adjusted, reweight(post, [0.5, 0.5], prior))


def test_conformal_threshold_is_the_finite_sample_quantile():
    # Scores 1 - p_true = 0.1, 0.2, ..., 0.9 (n = 9); alpha = 0.2 → rank ceil(10 * 0.8) = 8 → 0.8.
    p_true = 1 - np.arange(1, 10) / 10
    probs = np.stack([p_true, 1 - p_true], 1)
    assert conformal_threshold(probs, np.zeros(9, int), 0.2) == pytest.approx(0.8)
    # Too few points for the level: every outcome.
    assert conformal_threshold(probs[:3], np.zeros(3, int), 0.1) == 1.0
    sets = conformal_sets(np.array([[0.7, 0.2, 0.1]]), 0.8)
    assert sets.tolist() == [[True, True, False]]


def test_conformal_coverage_holds_on_exchangeable_data():
    z, y = _overconfident(6000, 8, seed=3, scale=1.0)
    p = softmax(z, axis=1)
    q = conformal_threshold(p[:3000], y[:3000], 0.2)
    covered = conformal_sets(p[3000:], q)[np.arange(3000), y[3000:]].mean()
    assert 0.78 <= covered <= 0.83


def test_mutual_information():
    same = np.tile(np.array([[0.2, 0.8]]), (3, 1))[:, None, :]
    assert mutual_information(same)[0] == pytest.approx(0.0, abs=1e-9)
    # Two confident members that disagree: MI = ln 2 (entropy of the mean, members certain).
    split = np.array([[[1.0, 0.0]], [[0.0, 1.0]]])
    assert mutual_information(split)[0] == pytest.approx(np.log(2), abs=1e-6)
