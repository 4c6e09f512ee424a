"""Calibration against scikit-learn (sklearn.calibration.calibration_curve, sklearn.metrics.brier_score_loss, sklearn.linear_model.LogisticRegression).

scikit-learn's ``calibration_curve(strategy="uniform")`` gives the mean
outcome and mean probability of each non-empty equal-width bin; the ECE is
their absolute difference weighted by bin counts (Guo et al. 2017, eq. 3).

The design-weighted recalibration is an unpenalised logistic regression of
the outcome on logit(p) with ``sample_weight`` = 1/π: scikit-learn's
``LogisticRegression(C=np.inf)`` (no penalty; the spelling
of ``penalty=None`` from scikit-learn 1.8 on) maximises the same weighted
likelihood.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.calibration import calibration_curve
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import brier_score_loss

from plantation.model.calibration import apply_recalibration, expected_calibration_error, fit_recalibration


@pytest.mark.parametrize("seed", range(4))
def test_ece_matches_scikit_learn_bins(seed):
    rng = np.random.default_rng(seed)
    p = rng.beta(0.6, 0.9, 3000)
    y = rng.random(3000) < np.clip(p * 1.2 - 0.05, 0, 1)  # a miscalibrated truth
    frac_pos, mean_pred = calibration_curve(y, p, n_bins=10, strategy="uniform")
    # Bin counts the way scikit-learn bins (edges 0, 0.1, ..., 1; right-closed last bin).
    bins = np.minimum((p * 10).astype(int), 9)
    counts = np.bincount(bins, minlength=10)
    counts = counts[counts > 0]
    expected = float((counts * np.abs(frac_pos - mean_pred)).sum() / len(p))
    assert expected_calibration_error(p, y, 10) == pytest.approx(expected, abs=1e-10)


def test_ece_is_zero_for_a_perfectly_calibrated_binning_and_brier_agrees():
    # Within each bin the outcome frequency equals the (constant) probability.
    p = np.repeat([0.05, 0.35, 0.85], 20)
    y = np.concatenate([np.r_[np.ones(1), np.zeros(19)], np.r_[np.ones(7), np.zeros(13)], np.r_[np.ones(17), np.zeros(3)]])
    assert expected_calibration_error(p, y) == pytest.approx(0.0, abs=1e-12)
    # Brier score by hand (mean squared error) equals scikit-learn's.
    assert float(np.mean((p - y) ** 2)) == pytest.approx(brier_score_loss(y, p))
    # A shifted forecast is worse on both.
    q = np.clip(p + 0.1, 0, 1)
    assert expected_calibration_error(q, y) == pytest.approx(0.1, abs=1e-12)
    assert brier_score_loss(y, q) > brier_score_loss(y, p)


@pytest.mark.parametrize("seed", range(4))
def test_weighted_recalibration_matches_scikit_learn_logistic_regression(seed):
    rng = np.random.default_rng(seed)
    n = 1500
    p = rng.beta(0.5, 2.0, n)
    p[:3] = [0.0, 1.0, 1e-9]  # exercise the clipping (both sides clip the same way below)
    y = rng.random(n) < np.clip(1.3 * p - 0.02, 0, 1)
    weight = rng.choice([1.0, 4.0, 25.0], n)  # 1/pi of three strata
    a, b = fit_recalibration(p, y, weight)
    x = np.log(np.clip(p, 1e-6, 1 - 1e-6) / (1 - np.clip(p, 1e-6, 1 - 1e-6)))[:, None]
    ref = LogisticRegression(C=np.inf, tol=1e-12, max_iter=10_000).fit(x, y, sample_weight=weight)
    assert a == pytest.approx(ref.intercept_[0], abs=1e-5)
    assert b == pytest.approx(ref.coef_[0, 0], abs=1e-5)
    np.testing.assert_allclose(apply_recalibration(p, (a, b)), ref.predict_proba(x)[:, 1], atol=1e-6)
    # Only the weights' ratios matter.
    np.testing.assert_allclose(fit_recalibration(p, y, weight * 1000), (a, b), atol=1e-7)
