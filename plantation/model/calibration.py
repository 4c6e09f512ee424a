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
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import minimize_scalar
from scipy.special import log_softmax


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


def expected_calibration_error(prob: np.ndarray, outcome: np.ndarray, n_bins: int = 10) -> float:
    """ECE of a binary probability: Σ_b (n_b / n) · |mean(outcome) − mean(prob)| over equal-width bins of [0, 1].

    A probability of exactly 1 falls in the last bin.
    """
    p = np.asarray(prob, dtype=np.float64).ravel()
    y = np.asarray(outcome, dtype=np.float64).ravel()
    if len(p) == 0:
        raise ValueError("ECE of an empty sample")
    b = np.minimum((p * n_bins).astype(np.int64), n_bins - 1)
    n = np.bincount(b, minlength=n_bins)
    sp = np.bincount(b, weights=p, minlength=n_bins)
    sy = np.bincount(b, weights=y, minlength=n_bins)
    nz = n > 0
    return float(np.abs(sy[nz] - sp[nz]).sum() / len(p))


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
