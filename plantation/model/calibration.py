"""Calibration and uncertainty arithmetic on arrays of logits or probabilities.

* Temperature scaling (Guo et al. 2017, *On calibration of modern neural
  networks*, ICML): one scalar T divides the logits, fitted by minimising
  the negative log-likelihood on validation data.
* Expected calibration error with equal-width bins (Naeini et al. 2015;
  the form used by Guo et al. 2017).
* Prior shift: the reference sample is stratified (conversions are
  over-represented), the map is not. The EM procedure of Saerens, Latinne &
  Decaestecker (2002), *Adjusting the outputs of a classifier to new a
  priori probabilities*, Neural Computation 14: 21–41, estimates the map's
  outcome frequencies from unlabelled pixels and re-weights the posteriors.
* Split-conformal prediction sets (Vovk et al. 2005; the "least ambiguous"
  score of Sadinle, Lei & Wasserman 2019, JASA 114: 223–234): with a
  calibration set exchangeable with the test data and not used to fit the
  model, the set holds the true outcome with probability at least 1 − α.
  Training reuses its validation split (also used for early stopping and the
  temperature), so the guarantee there is approximate, and it holds for
  pixels drawn like the reference sample, not for a map's every pixel.
* Epistemic uncertainty of an ensemble: the mutual information between the
  outcome and the member (the "BALD" score, Houlsby et al. 2011).
* Population priors from a probability sample: outcome shares weighted by
  1/π, the inverse inclusion probability (Hájek ratio estimator; Särndal,
  Swensson & Wretman 1992, *Model Assisted Survey Sampling*, §5.7), or
  given by the user per label group.
* Black-box shift estimation (BBSE; Lipton, Wang & Smola 2018, *Detecting
  and correcting for label shift with black box predictors*, ICML): the
  target prior q solves C q = μ, with C the confusion matrix of the
  classifier's predictions given the true outcome on labelled held-out data
  and μ the mean prediction on the unlabelled map; "soft" uses
  probabilities instead of argmax predictions. Solved with non-negative least
  squares, optionally on the four label groups (see :func:`bbse_prior`).
* Design-weighted logistic recalibration of a binary probability (the
  "logistic calibration" of Cox 1958, *Two further applications of a model
  for binary regression*, Biometrika 45: 562–565) fitted on a probability
  sample with weights 1/π, so the fit holds for the region's pixels rather
  than for the sample's class mix.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
from scipy.optimize import minimize, minimize_scalar, nnls
from scipy.special import expit, log_softmax, logit

from plantation.errors import ConfigError

#: Label groups in label-code order (code = index + 1), as in
#: :func:`plantation.model.outcomes.group_probabilities`.
GROUP_NAMES: tuple[str, ...] = ("stable_forest", "conversion", "old_plantation", "other")
# Group of outcomes 0, 1, 2 (stable forest, old plantation, other; see
# plantation.model.outcomes.STATIC_OUTCOMES); every later outcome is a
# conversion year. Spelled out here so this module stays numpy/scipy only
# (outcomes.py pulls in the imagery readers); a test checks they agree.
_STATIC_GROUPS = (0, 2, 3)
_CONVERSION_GROUP = 1


def nll(logits: np.ndarray, targets: np.ndarray, temperature: float = 1.0) -> float:
    """Mean negative log-likelihood (nats) of integer targets under softmax(logits / T)."""
    lp = log_softmax(np.asarray(logits, dtype=np.float64) / temperature, axis=-1)
    return float(-lp[np.arange(len(lp)), np.asarray(targets)].mean())


def fit_temperature(logits: np.ndarray, targets: np.ndarray, bounds: tuple[float, float] = (0.05, 20.0)) -> float:
    """The temperature T > 0 minimising :func:`nll` on (logits, targets).

    Searched on log T (the NLL is smooth and unimodal in it for practical
    data); returns a float inside ``bounds``.
    """
    z = np.asarray(logits, dtype=np.float64)
    t = np.asarray(targets)
    if len(z) == 0:
        raise ValueError("temperature scaling needs at least one validation sample")
    res = minimize_scalar(lambda lt: nll(z, t, float(np.exp(lt))), bounds=(np.log(bounds[0]), np.log(bounds[1])), method="bounded", options={"xatol": 1e-4})
    return float(np.exp(res.x))


def expected_calibration_error(prob: np.ndarray, outcome: np.ndarray, n_bins: int = 10, weight: np.ndarray | None = None) -> float:
    """ECE of a binary probability: Σ_b |Σ_{i∈b} wᵢ (yᵢ − pᵢ)| / Σ wᵢ over equal-width bins of [0, 1].

    With equal weights (the default) this is Σ_b (n_b / n) · |mean(outcome) −
    mean(prob)|; with weights 1/π from a probability sample it estimates the
    ECE over the population the sample was drawn from. A probability of
    exactly 1 falls in the last bin.
    """
    p = np.asarray(prob, dtype=np.float64).ravel()
    y = np.asarray(outcome, dtype=np.float64).ravel()
    if len(p) == 0:
        raise ValueError("ECE of an empty sample")
    w = np.ones_like(p) if weight is None else np.asarray(weight, dtype=np.float64).ravel()
    b = np.minimum((p * n_bins).astype(np.int64), n_bins - 1)
    diff = np.bincount(b, weights=w * (y - p), minlength=n_bins)
    return float(np.abs(diff).sum() / w.sum())


def reweight(probs: np.ndarray, old_prior: np.ndarray, new_prior: np.ndarray) -> np.ndarray:
    """Posteriors under new class priors: p'(c|x) ∝ p(c|x) · new(c) / old(c) (Bayes' rule)."""
    w = np.asarray(new_prior, dtype=np.float64) / np.asarray(old_prior, dtype=np.float64)
    q = np.asarray(probs, dtype=np.float64) * w
    return q / q.sum(-1, keepdims=True)


def adjust_priors(probs: np.ndarray, train_prior: np.ndarray, *, iterations: int = 100, tol: float = 1e-6, floor: float = 1e-6) -> tuple[np.ndarray, np.ndarray]:
    """EM estimate of the outcome frequencies of unlabelled data (Saerens et al. 2002).

    Args:
        probs: (n, k) posteriors of a classifier trained under ``train_prior``.
        train_prior: (k,) outcome frequencies the classifier's posteriors reflect.
        floor: smallest prior kept for an outcome (avoids a zero that can
            never recover).

    Returns:
        (adjusted posteriors (n, k), estimated prior (k,)).
    """
    p = np.asarray(probs, dtype=np.float64).reshape(-1, np.shape(probs)[-1])
    old = np.asarray(train_prior, dtype=np.float64)
    prior = old.copy()
    for _ in range(iterations):
        q = reweight(p, old, prior)
        new = np.maximum(q.mean(0), floor)
        new /= new.sum()
        done = np.abs(new - prior).max() < tol
        prior = new
        if done:
            break
    return reweight(p, old, prior).reshape(np.shape(probs)), prior


def conformal_threshold(probs: np.ndarray, targets: np.ndarray, alpha: float) -> float:
    """Split-conformal threshold q̂ on the score 1 − p(true outcome).

    q̂ is the ⌈(n + 1)(1 − α)⌉-th smallest calibration score; the set
    ``{k : 1 − p_k ≤ q̂}`` then covers the truth with probability ≥ 1 − α.
    Returns 1.0 (every outcome) when the calibration set is too small.
    """
    p = np.asarray(probs, dtype=np.float64)
    scores = np.sort(1.0 - p[np.arange(len(p)), np.asarray(targets)])
    n = len(scores)
    rank = int(np.ceil((n + 1) * (1 - alpha)))
    if rank > n:
        return 1.0
    return float(scores[rank - 1])


def conformal_sets(probs: np.ndarray, qhat: float) -> np.ndarray:
    """Boolean (..., k) membership of each outcome in the conformal set."""
    return (1.0 - np.asarray(probs)) <= qhat + 1e-12


def mutual_information(member_probs: np.ndarray) -> np.ndarray:
    """Epistemic uncertainty (nats) of an ensemble: H(mean p) − mean H(p).

    Args:
        member_probs: (m, ..., k) probabilities of m members.
    """
    p = np.clip(np.asarray(member_probs, dtype=np.float64), 1e-12, 1.0)
    mean = p.mean(0)
    h_mean = -(mean * np.log(mean)).sum(-1)
    mean_h = -(p * np.log(p)).sum(-1).mean(0)
    return np.maximum(h_mean - mean_h, 0.0)


def outcome_groups(n_outcomes: int) -> np.ndarray:
    """Label group (index into :data:`GROUP_NAMES`) of each of ``n_outcomes`` outcomes, as an (n_outcomes,) int64 array."""
    if n_outcomes < len(_STATIC_GROUPS) + 1:
        raise ConfigError(f"The 'n_outcomes' parameter of outcome_groups must be at least {len(_STATIC_GROUPS) + 1} (3 static outcomes and one year). Got {n_outcomes!r} instead.")
    return np.array(list(_STATIC_GROUPS) + [_CONVERSION_GROUP] * (n_outcomes - len(_STATIC_GROUPS)), dtype=np.int64)


def _targets(targets: np.ndarray, n_outcomes: int, func: str) -> np.ndarray:
    """Integer outcome indices in [0, n_outcomes), or a ConfigError naming ``func``."""
    t = np.asarray(targets)
    if t.ndim != 1 or len(t) == 0:
        raise ConfigError(f"The 'targets' parameter of {func} must be a non-empty 1-D array of outcome indices. Got shape {t.shape!r} instead.")
    if not np.issubdtype(t.dtype, np.integer) or t.min() < 0 or t.max() >= n_outcomes:
        raise ConfigError(f"The 'targets' parameter of {func} must hold integer outcome indices in [0, {n_outcomes}). Got values {t.min()!r}..{t.max()!r} of dtype {t.dtype} instead.")
    return t.astype(np.int64)


def _positive_weights(weight: np.ndarray, n: int, name: str, func: str, *, upper: float | None = None) -> np.ndarray:
    """(n,) float64 weights, all finite and > 0 (and ≤ ``upper`` if given), or a ConfigError naming ``func``."""
    w = np.asarray(weight, dtype=np.float64).ravel()
    if len(w) != n:
        raise ConfigError(f"The '{name}' parameter of {func} must have one value per sample point ({n}). Got {len(w)} instead.")
    # A zero or negative weight is a design error (a point with inclusion
    # probability 0 cannot have been drawn), not something to clip silently.
    bad = ~np.isfinite(w) | (w <= 0) | ((w > upper) if upper is not None else False)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        bound = f"in (0, {upper}]" if upper is not None else "finite and > 0"
        raise ConfigError(f"The '{name}' parameter of {func} must be {bound} for every point. Got {w[i]!r} at point {i} ({int(bad.sum())} bad) instead; check the sample design.")
    return w


def _normalised(prior: np.ndarray, floor: float) -> np.ndarray:
    """A prior (shares, or weights proportional to them) floored at the share ``floor`` and summing to one (a zero share could never be recovered by :func:`reweight`)."""
    p = np.asarray(prior, dtype=np.float64)
    total = p.sum()
    # Shares first: the floor is a share, not a count of weighted points.
    p = np.maximum(p / total if total > 0 else p, floor)
    return p / p.sum()


def _spread(group_prior: np.ndarray, within: np.ndarray, groups: np.ndarray) -> np.ndarray:
    """Outcome prior (k,) from group shares (g,): each group's share split over its outcomes in proportion to ``within`` (k,).

    A group whose outcomes all have zero ``within`` mass is split evenly.
    """
    within = np.asarray(within, dtype=np.float64)
    mass = np.bincount(groups, weights=within, minlength=len(group_prior))
    size = np.bincount(groups, minlength=len(group_prior))
    share = np.where(mass[groups] > 0, within / np.where(mass[groups] > 0, mass[groups], 1.0), 1.0 / np.maximum(size[groups], 1))
    return np.asarray(group_prior, dtype=np.float64)[groups] * share


def population_prior(targets: np.ndarray, inclusion_probability: np.ndarray, n_outcomes: int, *, floor: float = 1e-6) -> np.ndarray:
    """Outcome shares of the population a probability sample was drawn from.

    Each point counts with weight 1/π (its inverse inclusion probability), and
    the weighted counts are divided by the sum of weights (the Hájek ratio
    estimator: it needs π only up to a constant factor and gives shares that
    sum to one). A stratified sample that over-samples conversion thus
    yields the region's shares, not the sample's.

    Args:
        targets: (n,) outcome index of each sample point.
        inclusion_probability: (n,) probability in (0, 1] that the design
            drew each point.
        n_outcomes: number of outcomes k.
        floor: smallest share kept (an outcome absent from the sample gets
            this, so :func:`reweight` can still divide by it).

    Returns:
        (k,) shares summing to one.
    """
    t = _targets(targets, n_outcomes, "population_prior")
    pi = _positive_weights(inclusion_probability, len(t), "inclusion_probability", "population_prior", upper=1.0)
    return _normalised(np.bincount(t, weights=1.0 / pi, minlength=n_outcomes), floor)


def prior_from_shares(shares: Mapping[str, float], within_prior: np.ndarray, *, floor: float = 1e-6) -> np.ndarray:
    """Outcome prior from population shares of the four label groups, known from elsewhere (a published statistic, an earlier assessment).

    Shares of the single-outcome groups are used as they are; the conversion
    share is spread over the conversion years in proportion to
    ``within_prior`` (e.g. the training prior), since a user rarely knows the
    yearly split but the sample's year mix is a fair guess of its shape.

    Args:
        shares: a share for each of :data:`GROUP_NAMES`, summing to one.
        within_prior: (k,) outcome frequencies (e.g. the training prior);
            only their proportions within each group matter.
        floor: smallest outcome share kept.

    Returns:
        (k,) outcome prior summing to one.
    """
    unknown = sorted(set(shares) - set(GROUP_NAMES))
    missing = [g for g in GROUP_NAMES if g not in shares]
    if unknown or missing:
        raise ConfigError(f"The 'shares' parameter of prior_from_shares must give exactly the groups {', '.join(GROUP_NAMES)}. Got unknown {unknown!r}, missing {missing!r} instead.")
    g = np.array([float(shares[n]) for n in GROUP_NAMES])
    if not np.all(np.isfinite(g)) or (g < 0).any() or abs(g.sum() - 1.0) > 1e-6:
        raise ConfigError(f"The 'shares' parameter of prior_from_shares must be non-negative and sum to 1. Got {dict(zip(GROUP_NAMES, g.tolist(), strict=True))!r} (sum {g.sum():.6g}) instead.")
    within = np.asarray(within_prior, dtype=np.float64)
    return _normalised(_spread(g, within, outcome_groups(len(within))), floor)


def bbse_prior(
    val_probs: np.ndarray,
    val_targets: np.ndarray,
    target_probs: np.ndarray,
    source_prior: np.ndarray,
    *,
    groups: np.ndarray | None = None,
    soft: bool = False,
    floor: float = 1e-6,
) -> np.ndarray:
    """Outcome prior of unlabelled data by black-box shift estimation (Lipton et al. 2018).

    Under label shift (p(x | y) the same in the sample and the map, only the
    outcome frequencies differ), the classifier's mean prediction on the map
    is μ = C q, where C[i, j] = P(predicted i | true j) is measured on
    labelled held-out data and q is the map's prior. q is found by
    non-negative least squares (scipy.optimize.nnls) and normalised. This
    is BBSE with the conditional confusion matrix, so q = w · p_source with
    w the importance weights of the paper; it does not need the classifier
    to be calibrated, only C to be invertible.

    With ``soft=True`` the predictions are the probabilities themselves
    (C[i, j] = E[p_i(x) | y = j], μ = mean p on the map) rather than one-hot
    argmax: less variance from the arbitrary argmax boundary, and still exact
    under label shift.

    Many conversion years with few held-out points each make C nearly
    singular (a year's column estimated from a handful of points), and the
    solution then swings wildly. Passing ``groups`` (e.g.
    ``outcome_groups(k)``) estimates on label groups instead: probabilities
    are summed per group, C is the (g, g) group confusion, and each group's
    estimated share is spread over its outcomes in proportion to
    ``source_prior``. This assumes the mix *within* a group (the split of
    conversions over years) is the same in the sample and the map; only the
    group shares are corrected.

    Args:
        val_probs: (n, k) probabilities on labelled held-out points, drawn
            like the data the classifier was calibrated on.
        val_targets: (n,) their true outcome indices.
        target_probs: (m, k) probabilities on unlabelled map pixels.
        source_prior: (k,) outcome frequencies the probabilities reflect
            (used to spread group shares; see above).
        groups: optional (k,) group index of each outcome.
        soft: use probabilities instead of argmax predictions.
        floor: smallest outcome share kept.

    Returns:
        (k,) estimated outcome prior of the map, summing to one; pass it as
        ``new_prior`` to :func:`reweight` with ``old_prior=source_prior``.
    """
    pv = np.asarray(val_probs, dtype=np.float64)
    pt = np.asarray(target_probs, dtype=np.float64).reshape(-1, pv.shape[-1])
    k = pv.shape[-1]
    t = _targets(val_targets, k, "bbse_prior")
    if len(pv) != len(t):
        raise ConfigError(f"The 'val_targets' parameter of bbse_prior must have one target per row of val_probs ({len(pv)}). Got {len(t)} instead.")
    if len(pt) == 0:
        raise ConfigError("The 'target_probs' parameter of bbse_prior must hold at least one pixel. Got none instead.")
    src = np.asarray(source_prior, dtype=np.float64)
    if src.shape != (k,):
        raise ConfigError(f"The 'source_prior' parameter of bbse_prior must have {k} values. Got shape {src.shape!r} instead.")
    if groups is None:
        grp = np.arange(k)
    else:
        grp = np.asarray(groups, dtype=np.int64)
        if grp.shape != (k,) or grp.min() < 0:
            raise ConfigError(f"The 'groups' parameter of bbse_prior must give a group index >= 0 for each of the {k} outcomes. Got {grp.tolist()!r} instead.")
    g = int(grp.max()) + 1
    # Sum probabilities within groups: (n, g) and (m, g).
    agg = np.zeros((k, g))
    agg[np.arange(k), grp] = 1.0
    qv, qt, tv = pv @ agg, pt @ agg, grp[t]
    counts = np.bincount(tv, minlength=g)
    if (counts == 0).any():
        absent = np.flatnonzero(counts == 0).tolist()
        hint = "" if groups is not None else "; pass groups=outcome_groups(k) to estimate on label groups"
        raise ConfigError(f"The 'val_targets' parameter of bbse_prior must hold every {'group' if groups is not None else 'outcome'} at least once. Got none of {absent!r} instead{hint}.")
    if soft:
        pred_v, pred_t = qv, qt
    else:
        pred_v, pred_t = np.eye(g)[qv.argmax(-1)], np.eye(g)[qt.argmax(-1)]
    # C[i, j] = mean prediction i among held-out points of true group j.
    conf = pred_v.T @ np.eye(g)[tv] / counts
    mu = pred_t.mean(0)
    q, _ = nnls(conf, mu)
    if q.sum() <= 0:
        raise ConfigError("bbse_prior found no non-negative prior explaining the map's predictions; check that val_probs and target_probs come from the same classifier.")
    q = q / q.sum()
    return _normalised(_spread(q, src, grp) if groups is not None else q, floor)


def vanished_groups(prior: np.ndarray, targets: np.ndarray, *, floor: float = 1e-6) -> list[str]:
    """Label groups a region prior (k,) leaves at the floor although labelled points of the same region (``targets``, outcome indices) hold them.

    Points labelled in a region prove each of their groups covers some of it,
    so a prior with none of one is a contradiction, not a finding. Black-box
    shift estimation reaches it when its assumptions fail: wrong labels among
    the validation points (the confusion matrix is then measured against
    them, Lipton et al. 2018 assume it is not), or a sample whose p(x | label)
    is not the region's. A group counts as vanished when its share is at most
    ``floor`` per outcome (the least :func:`bbse_prior` keeps).

    Returns:
        The names (:data:`GROUP_NAMES`) of the vanished groups, in that order.
    """
    q = np.asarray(prior, dtype=np.float64)
    k = len(q)
    grp = outcome_groups(k)
    share = np.bincount(grp, weights=q, minlength=len(GROUP_NAMES))
    size = np.bincount(grp, minlength=len(GROUP_NAMES))
    held = np.bincount(grp[_targets(targets, k, "vanished_groups")], minlength=len(GROUP_NAMES))
    # 1.5 × the floor per outcome: the floor, renormalised, can sit a hair above it.
    return [GROUP_NAMES[g] for g in range(len(GROUP_NAMES)) if held[g] > 0 and share[g] <= 1.5 * floor * size[g]]


_RECAL_EPS = 1e-6


def _recal_inputs(p: np.ndarray, eps: float) -> np.ndarray:
    """logit of a probability clipped to [eps, 1 − eps] (a 0 or 1 would have an infinite logit)."""
    q = np.asarray(p, dtype=np.float64)
    if not np.all(np.isfinite(q)) or (q < 0).any() or (q > 1).any():
        raise ConfigError("The 'p' parameter of fit_recalibration/apply_recalibration must hold probabilities in [0, 1]. Got values outside it (or NaN) instead.")
    return logit(np.clip(q, eps, 1.0 - eps))


def fit_recalibration(p: np.ndarray, y: np.ndarray, weight: np.ndarray, *, eps: float = _RECAL_EPS) -> tuple[float, float]:
    """Design-weighted logistic recalibration of a binary probability.

    Fits P(y = 1) = sigmoid(a + b · logit p) by maximising the weighted
    log-likelihood Σ wᵢ log P(yᵢ | pᵢ) (no penalty), with wᵢ = 1/πᵢ from the
    sample design. The weighted likelihood is the Horvitz–Thompson estimate
    of the whole region's log-likelihood, so (a, b) recalibrate the map's
    pixels, not the sample's class mix: a prior leak shows up as a ≠ 0,
    over- or under-confidence as b ≠ 1.

    Args:
        p: (n,) reported probabilities of the sample points (e.g. p_conversion).
        y: (n,) reference outcome, 0/1 (or bool).
        weight: (n,) design weights 1/π, finite and > 0 (only their ratios matter).
        eps: p is clipped to [eps, 1 − eps] before the logit.

    Returns:
        (intercept a, slope b); apply with :func:`apply_recalibration`.
    """
    x = _recal_inputs(p, eps).ravel()
    yy = np.asarray(y, dtype=np.float64).ravel()
    if len(yy) != len(x) or len(x) == 0:
        raise ConfigError(f"The 'y' parameter of fit_recalibration must have one outcome per probability ({len(x)}). Got {len(yy)} instead.")
    if not np.isin(yy, (0.0, 1.0)).all():
        raise ConfigError("The 'y' parameter of fit_recalibration must be 0/1. Got other values instead.")
    if yy.min() == yy.max():
        # Without both outcomes the likelihood has no maximum (a → ±∞).
        raise ConfigError(f"The 'y' parameter of fit_recalibration must hold both outcomes. Got only {int(yy[0])} in all {len(yy)} points instead; a one-class sample cannot be recalibrated.")
    w = _positive_weights(weight, len(x), "weight", "fit_recalibration")
    w = w / w.mean()  # the same optimum; keeps the objective O(1) for the optimizer's tolerances
    design = np.stack([np.ones_like(x), x], 1)

    def objective(beta: np.ndarray) -> tuple[float, np.ndarray]:
        eta = design @ beta
        # −log-likelihood: log(1 + e^η) − y·η, summed stably with logaddexp.
        f = float((w * (np.logaddexp(0.0, eta) - yy * eta)).mean())
        grad = design.T @ (w * (expit(eta) - yy)) / len(x)
        return f, grad

    def hessian(beta: np.ndarray) -> np.ndarray:
        s = expit(design @ beta)
        return (design * (w * s * (1 - s))[:, None]).T @ design / len(x)

    # Convex in (a, b); Newton with the exact Hessian converges in a few steps from the identity map.
    res = minimize(objective, np.array([0.0, 1.0]), jac=True, hess=hessian, method="trust-exact", options={"gtol": 1e-10})
    a, b = (float(v) for v in res.x)
    if not (np.isfinite(a) and np.isfinite(b)):
        raise ConfigError("fit_recalibration did not converge (are the outcomes perfectly separated by p?); use a larger sample.")
    return a, b


def apply_recalibration(p: np.ndarray, coef: tuple[float, float], *, eps: float = _RECAL_EPS) -> np.ndarray:
    """sigmoid(a + b · logit p) for ``coef = (a, b)`` from :func:`fit_recalibration`; same shape as ``p``, float64."""
    a, b = coef
    return expit(a + b * _recal_inputs(p, eps))
