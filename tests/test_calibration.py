"""Calibration arithmetic on small arrays with known answers."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.special import expit, logit, softmax

from plantation.errors import ConfigError
from plantation.model.calibration import (
    GROUP_NAMES,
    adjust_priors,
    apply_recalibration,
    bbse_prior,
    conformal_sets,
    conformal_threshold,
    expected_calibration_error,
    fit_recalibration,
    fit_temperature,
    mutual_information,
    nll,
    outcome_groups,
    population_prior,
    prior_from_shares,
    reweight,
    vanished_groups,
)
from plantation.model.outcomes import STATIC_OUTCOMES, group_probabilities
from plantation.reference.labels import LABEL_NAMES


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


# --- Prior shift: the reference sample's class mix is not the region's -------------------------

# Four classes, unit-variance Gaussians at the corners of a 2.5-wide square (neighbours overlap ~10 %).
_MEANS = np.array([[0.0, 0.0], [2.5, 0.0], [0.0, 2.5], [2.5, 2.5]])
# Source (reference sample, change over-sampled) and target (region) priors.
_PS = np.array([0.3, 0.4, 0.15, 0.15])
_PT = np.array([0.7, 0.1, 0.15, 0.05])


def _shifted(rng: np.random.Generator, n: int, prior: np.ndarray, means: np.ndarray, source: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Outcomes drawn with ``prior`` and logits of the Bayes posterior under ``source``, doubled (over-confident, as a network is)."""
    y = rng.choice(len(prior), n, p=prior)
    x = means[y] + rng.normal(0.0, 1.0, (n, means.shape[1]))
    z = -((x[:, None, :] - means) ** 2).sum(-1) / 2 + np.log(source)
    return 2.0 * z, y


def _classifier_and_target(seed: int, means: np.ndarray, source: np.ndarray, target: np.ndarray, n_val: int = 16000, n_target: int = 20000):
    """Temperature fitted on 2000 source points, then (held-out probs, targets) from the source and (probs, targets) from the target."""
    rng = np.random.default_rng(seed)
    z, y = _shifted(rng, 2000 + n_val, source, means, source)
    t = fit_temperature(z[:2000], y[:2000])
    zt, yt = _shifted(rng, n_target, target, means, source)
    return softmax(z[2000:] / t, 1), y[2000:], softmax(zt / t, 1), yt


def _classwise_ece(p: np.ndarray, y: np.ndarray) -> float:
    return float(np.mean([expected_calibration_error(p[:, c], y == c) for c in range(p.shape[1])]))


# Tolerance of BBSE on 16 000 held-out and 20 000 target points: over 100 seeds the estimate's sd
# per class was <= 0.0065 (set by the held-out points: C's column for a class of 2 400 points is
# known to about sqrt(0.2 / 2400) ~ 0.009, amplified by C^-1), so 0.025 is ~4 sd; the uncorrected
# mean probability is off by 0.14 on class 0, so a no-op fails by a wide margin.
_BBSE_TOL = 0.025


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("soft", [False, True])
def test_bbse_recovers_a_known_shift_and_reweighting_calibrates_the_target(seed, soft):
    pv, yv, pt, yt = _classifier_and_target(seed, _MEANS, _PS, _PT)
    shares = np.bincount(yt, minlength=4) / len(yt)  # the realised target prior (within ~0.003 of _PT)
    assert np.abs(pt.mean(0) - shares).max() > 4 * _BBSE_TOL  # the leak this corrects
    est = bbse_prior(pv, yv, pt, _PS, soft=soft)
    assert est.sum() == pytest.approx(1.0)
    np.testing.assert_allclose(est, shares, atol=_BBSE_TOL)
    fixed = reweight(pt, _PS, est)
    np.testing.assert_allclose(fixed.mean(0), shares, atol=_BBSE_TOL)
    # Class-wise ECE (mean over classes of the one-vs-rest ECE): 0.068-0.075 before, at most 0.007 after over 30 seeds.
    before, after = _classwise_ece(pt, yt), _classwise_ece(fixed, yt)
    assert before > 0.05
    assert after < 0.02


@pytest.mark.parametrize("seed", range(4))
def test_population_prior_from_a_stratified_sample_recovers_the_region_shares(seed):
    _, _, pt, yt = _classifier_and_target(seed, _MEANS, _PS, _PT, n_val=0)
    rng = np.random.default_rng(100 + seed)
    # Stratified by map class, 150 points per stratum: the rare classes are over-sampled.
    strata = pt.argmax(1)
    big_n = np.bincount(strata, minlength=4)
    n_h = 150
    idx = np.concatenate([rng.choice(np.flatnonzero(strata == h), n_h, replace=False) for h in range(4)])
    pi = (n_h / big_n)[strata[idx]]
    est = population_prior(yt[idx], pi, 4)
    shares = np.bincount(yt, minlength=4) / len(yt)
    # The sample's own mix is far off; the weighted one within 4 standard errors of the stratified
    # estimator, computed from the population: se_c^2 = sum_h W_h^2 p_hc (1 - p_hc) / n_h (1 - n_h / N_h).
    assert np.abs(np.bincount(yt[idx], minlength=4) / len(idx) - shares).max() > 0.2
    w_h = big_n / big_n.sum()
    p_hc = np.stack([np.bincount(yt[strata == h], minlength=4) / big_n[h] for h in range(4)])
    se = np.sqrt((w_h[:, None] ** 2 * p_hc * (1 - p_hc) / n_h * (1 - n_h / big_n[:, None])).sum(0))
    assert np.all(np.abs(est - shares) <= 4 * se)
    assert se.max() < 0.02  # so the check above is informative
    # Equal inclusion probabilities give the sample's frequencies (floor aside).
    np.testing.assert_allclose(population_prior(np.array([0, 0, 1, 3]), np.full(4, 0.1), 4), [0.5, 0.25, 0, 0.25], atol=1e-5)


def test_outcome_groups_agree_with_the_outcome_layout():
    assert GROUP_NAMES == LABEL_NAMES
    k = 3 + 5
    g = outcome_groups(k)
    for name, i in STATIC_OUTCOMES.items():
        assert GROUP_NAMES[g[i]] == name
    p = np.random.default_rng(0).dirichlet(np.ones(k), 7)
    agg = np.zeros((k, 4))
    agg[np.arange(k), g] = 1
    np.testing.assert_allclose(p @ agg, group_probabilities(p))


def test_prior_from_shares_spreads_conversion_over_years_like_the_training_prior():
    train = np.array([0.3, 0.1, 0.2, 0.1, 0.2, 0.1])  # stable, old, other, three years (1:2:1)
    prior = prior_from_shares({"stable_forest": 0.8, "conversion": 0.04, "old_plantation": 0.06, "other": 0.1}, train)
    np.testing.assert_allclose(prior, [0.8, 0.06, 0.1, 0.01, 0.02, 0.01], atol=1e-5)
    with pytest.raises(ConfigError, match="missing \\['other'\\]"):
        prior_from_shares({"stable_forest": 0.8, "conversion": 0.2, "old_plantation": 0.0}, train)
    with pytest.raises(ConfigError, match="sum to 1"):
        prior_from_shares({"stable_forest": 0.8, "conversion": 0.2, "old_plantation": 0.1, "other": 0.1}, train)


# Eight conversion years told apart by a third feature spaced 0.5 sd: adjacent years overlap heavily
# and each year's column of C rests on a few hundred points; the four groups are as separable as the
# classes above. Grouped estimates: group shares within 0.014 of the truth over 30 seeds.
_YEARS = 8
_MEANS_Y = np.array([[*_MEANS[0], 0.0], [*_MEANS[2], 0.0], [*_MEANS[3], 0.0]] + [[*_MEANS[1], 0.5 * i] for i in range(_YEARS)])
_YEAR_MIX = np.array([1, 2, 3, 4, 4, 3, 2, 1]) / 20


def _outcome_prior(stable: float, conversion: float, old: float, other: float) -> np.ndarray:
    return np.r_[stable, old, other, conversion * _YEAR_MIX]


@pytest.mark.parametrize("seed", range(3))
@pytest.mark.parametrize("soft", [False, True])
def test_bbse_on_groups_recovers_group_shares_and_keeps_the_year_mix(seed, soft):
    ps, pt_prior = _outcome_prior(0.3, 0.4, 0.15, 0.15), _outcome_prior(0.7, 0.1, 0.15, 0.05)
    pv, yv, pt, yt = _classifier_and_target(seed, _MEANS_Y, ps, pt_prior)
    groups = outcome_groups(3 + _YEARS)
    est = bbse_prior(pv, yv, pt, ps, groups=groups, soft=soft)
    shares = np.bincount(groups[yt], minlength=4) / len(yt)
    np.testing.assert_allclose(np.bincount(groups, weights=est, minlength=4), shares, atol=_BBSE_TOL)
    # Within the conversion group the estimate keeps the source's year mix exactly.
    np.testing.assert_allclose(est[3:] / est[3:].sum(), _YEAR_MIX, rtol=1e-9)


def _flip_groups(y: np.ndarray, share: float, groups: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """``share`` of the outcomes moved to a random outcome of another label group (as an interpreter's wrong label)."""
    out = y.copy()
    for i in np.flatnonzero(rng.random(len(y)) < share):
        other = rng.choice([g for g in range(4) if g != groups[y[i]]])
        out[i] = rng.choice(np.flatnonzero(groups == other))
    return out


@pytest.mark.parametrize("seed", range(3))
def test_wrong_validation_labels_make_bbse_lose_conversion_and_a_vanished_group_is_flagged(seed):
    # BBSE measures the confusion matrix against the validation labels and assumes they are right
    # (Lipton et al. 2018). Sample mix like the semi-real labels (36 % conversion), region 10 %.
    ps, pt_prior = _outcome_prior(0.43, 0.36, 0.09, 0.12), _outcome_prior(0.7, 0.1, 0.1, 0.1)
    pv, yv, pt, _ = _classifier_and_target(seed, _MEANS_Y, ps, pt_prior)
    groups = outcome_groups(3 + _YEARS)
    rng = np.random.default_rng(seed)
    conversion = {}
    for share in (0.0, 0.1, 0.3):
        y = _flip_groups(yv, share, groups, rng)
        est = bbse_prior(pv, y, pt, ps, groups=groups)
        conversion[share] = np.bincount(groups, weights=est, minlength=4)[1]
        assert vanished_groups(est, y) == ([] if share < 0.3 else ["conversion"])
    # Clean labels recover the share; 10 % wrong ones already lose a third of it (0.055-0.058 over
    # these seeds); at 30 % it is gone although every fourth validation label says conversion.
    assert conversion[0.0] == pytest.approx(0.1, abs=0.01)
    assert conversion[0.1] < 0.07
    assert conversion[0.3] < 1e-4


def test_vanished_groups_needs_labels_of_the_group_and_a_share_at_the_floor():
    k = 3 + 2  # stable, old, other, two conversion years
    floor = 1e-6
    q = np.array([0.6, 0.2, 0.2 - 2 * floor, floor, floor])
    assert vanished_groups(q, np.array([0, 3, 4])) == ["conversion"]
    # No label of the group: the region may well have none.
    assert vanished_groups(q, np.array([0, 1, 2])) == []
    # A small share is a finding, not a contradiction.
    q_small = np.array([0.6, 0.2, 0.199, 0.0005, 0.0005])
    assert vanished_groups(q_small, np.array([0, 3, 4])) == []
    assert len(q) == k


# --- Recalibration from a probability sample --------------------------------------------------


def _leaky_map(seed: int, n: int = 50_000):
    """True conversion probability of each pixel, its 0/1 outcome, and a reported probability with the odds ×5 (a sample's 5× over-representation leaking in)."""
    rng = np.random.default_rng(seed)
    true_p = expit(rng.normal(-3.0, 1.5, n))
    y = rng.random(n) < true_p
    return rng, y, expit(logit(true_p) + np.log(5.0))


@pytest.mark.parametrize("seed", range(5))
def test_recalibration_from_a_sample_stratified_by_reported_probability_fixes_held_out_pixels(seed):
    rng, y, rep = _leaky_map(seed)
    strata = np.searchsorted([0.1, 0.3, 0.6], rep)
    big_n = np.bincount(strata, minlength=4)
    n_h = 500  # 2000 points of 50 000; the top stratum (~5 700 pixels) is sampled at ~9 %, the others at ~3 %
    idx = np.concatenate([rng.choice(np.flatnonzero(strata == h), n_h, replace=False) for h in range(4)])
    pi = (n_h / big_n)[strata[idx]]
    coef = fit_recalibration(rep[idx], y[idx], 1.0 / pi)
    held = np.setdiff1d(np.arange(len(y)), idx)
    # ~0.17 before; after: median 0.006, 99th percentile 0.016 over 100 seeds (the rest is the
    # sampling error of (a, b) from 2000 points plus the ECE's own noise on 48 000 pixels, ~0.003).
    assert expected_calibration_error(rep[held], y[held]) > 0.05
    assert expected_calibration_error(apply_recalibration(rep[held], coef), y[held]) < 0.02
    # The leak is an intercept of -log 5 with slope 1.
    assert coef[0] == pytest.approx(-np.log(5.0), abs=0.4)
    assert coef[1] == pytest.approx(1.0, abs=0.3)


@pytest.mark.parametrize("seed", range(5))
def test_recalibration_needs_the_weights_when_the_sample_is_stratified_by_the_reference_outcome(seed):
    # Interpreters' samples over-sample conversion: 1000 conversions and 1000 others, whatever
    # their share. Unweighted, the fit learns the sample's 50 % mix; weighted by 1/pi, the region's.
    rng, y, rep = _leaky_map(seed)
    idx = np.concatenate([rng.choice(np.flatnonzero(y == v), 1000, replace=False) for v in (True, False)])
    pi = np.where(y[idx], 1000 / y.sum(), 1000 / (~y).sum())
    # Judged on every pixel: the pixels left out of this sample are depleted of conversions (a fifth
    # of them were drawn), so they are not a fair held-out set. Weighted: median 0.004, at most 0.012 over 60 seeds.
    weighted = apply_recalibration(rep, fit_recalibration(rep[idx], y[idx], 1.0 / pi))
    unweighted = apply_recalibration(rep, fit_recalibration(rep[idx], y[idx], np.ones(len(idx))))
    assert expected_calibration_error(weighted, y) < 0.02
    assert expected_calibration_error(unweighted, y) > 0.05  # ~0.28: it learnt the sample's 50 % mix


def test_apply_recalibration_identity_and_clipping():
    p = np.array([0.0, 0.2, 0.5, 1.0])
    out = apply_recalibration(p, (0.0, 1.0))
    np.testing.assert_allclose(out[1:3], p[1:3])
    assert 0 < out[0] < 1e-5 and 1 - 1e-5 < out[3] < 1  # clipped, not 0/1 (logit would be infinite)
    # sigmoid(a + b logit p): at logit p = 0 only a acts, at logit p = 1 both.
    np.testing.assert_allclose(apply_recalibration(np.array([0.5, expit(1.0)]), (0.5, 2.0)), expit([0.5, 2.5]))


# --- Refusals --------------------------------------------------------------------------------------


@pytest.mark.parametrize("bad", [0.0, -1.0, np.nan, np.inf])
def test_non_positive_weights_are_refused_in_one_line(bad):
    p, y = np.array([0.1, 0.4, 0.7, 0.9]), np.array([0, 0, 1, 1])
    w = np.array([1.0, bad, 2.0, 1.0])
    with pytest.raises(ConfigError, match="'weight' parameter of fit_recalibration must be finite and > 0") as err:
        fit_recalibration(p, y, w)
    assert "\n" not in str(err.value) and isinstance(err.value, ValueError)
    with pytest.raises(ConfigError, match="'inclusion_probability' parameter of population_prior must be in \\(0, 1.0\\]") as err:
        population_prior(y, np.array([0.5, bad, 0.5, 0.5]), 2)
    assert "\n" not in str(err.value)
    with pytest.raises(ConfigError, match="inclusion_probability"):
        population_prior(y, np.array([0.5, 1.5, 0.5, 0.5]), 2)  # a probability above 1 is a design error too


@pytest.mark.parametrize("value", [0, 1])
def test_one_class_sample_is_refused(value):
    with pytest.raises(ConfigError, match=f"must hold both outcomes. Got only {value} in all 3 points") as err:
        fit_recalibration(np.array([0.1, 0.5, 0.9]), np.full(3, value), np.ones(3))
    assert "\n" not in str(err.value)


def test_bbse_refuses_outcomes_missing_from_the_held_out_data_and_points_to_groups():
    p = np.full((4, 5), 0.2)
    with pytest.raises(ConfigError, match="Got none of \\[3, 4\\] instead; pass groups=outcome_groups"):
        bbse_prior(p, np.array([0, 1, 2, 0]), p, np.full(5, 0.2))
    # On groups it works: every group is present.
    est = bbse_prior(p, np.array([0, 1, 2, 3]), p, np.full(5, 0.2), groups=outcome_groups(5))
    assert est.sum() == pytest.approx(1.0)
