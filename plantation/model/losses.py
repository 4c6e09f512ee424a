"""Per-sample classification losses, plain cross-entropy and noise-robust ones.

Every loss takes logits (n, K) and integer targets (n,) and returns one value
per sample (n,), with no reduction: the caller weights and averages them.

* ``ce``: cross-entropy, −log p_y.
* ``gce``: generalised cross-entropy, (1 − p_y^q) / q (Zhang & Sabuncu 2018,
  NeurIPS, "Generalized cross entropy loss for training deep neural networks
  with noisy labels", Eq. 6). q → 0 gives cross-entropy, q = 1 gives 1 − p_y,
  which is the mean absolute error (MAE = 2 − 2 p_y) up to a factor 2.
* ``sce``: symmetric cross-entropy, α·CE + β·RCE (Wang et al. 2019, ICCV,
  "Symmetric cross entropy for robust learning with noisy labels", Eq. 6).
  The reverse cross-entropy RCE = −Σ_k p_k log q_k swaps prediction p and the
  one-hot label q; log 0 is replaced by a constant A (the paper's A = −4,
  Section 3.3), so RCE = −A (1 − p_y). Many public implementations instead
  clip the one-hot label at 1e-4, i.e. A = ln 1e-4 ≈ −9.21: pass
  ``log_floor`` to match them.
* ``forward``: forward loss correction (Patrini et al. 2017, CVPR, "Making
  deep neural networks robust to label noise: a loss correction approach",
  Section 3.1): cross-entropy of the noisy label under softmax(logits) @ T,
  with T[i, j] = P(noisy = j | true = i). :func:`estimate_transition`
  estimates T from a small trusted set whose true and noisy labels are both
  known (Hendrycks et al. 2018, NeurIPS, "Using trusted data to train deep
  networks on labels corrupted by severe noise", the gold loss correction,
  here its count-based form).

Pure torch functions (numpy only for the transition's counting); the choice
by name (:func:`per_sample_loss`) is what training calls.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch
from torch import nn

from plantation.errors import ConfigError

#: Names accepted by :func:`per_sample_loss` (``training.loss``).
LOSSES: tuple[str, ...] = ("ce", "gce", "sce", "forward")

#: Floor of p_y in the generalised cross-entropy, as training always had it.
GCE_FLOOR = 1e-7


def cross_entropy(logits: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """−log softmax(logits)_y, (n,)."""
    return nn.functional.cross_entropy(logits, y, reduction="none")


def _p_true(logits: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """softmax(logits)_y, (n,)."""
    return torch.softmax(logits, -1).gather(1, y[:, None]).squeeze(1)


def generalised_cross_entropy(logits: torch.Tensor, y: torch.Tensor, q: float) -> torch.Tensor:
    """(1 − p_y^q) / q with p_y floored at 1e-7 (Zhang & Sabuncu 2018, Eq. 6), (n,).

    The loss is bounded by 1/q, and its gradient is the cross-entropy's
    weighted by p_y^q, so a mislabelled sample the network contradicts (small
    p_y) pulls less than under cross-entropy. The floor is what training
    always used; it stops the gradient of a sample with p_y below 1e-7.
    """
    py = _p_true(logits, y).clamp_min(GCE_FLOOR)
    return (1 - py**q) / q


def reverse_cross_entropy(logits: torch.Tensor, y: torch.Tensor, log_floor: float = -4.0) -> torch.Tensor:
    """−Σ_k p_k log q_k with q the one-hot label and log 0 := A = ``log_floor``: −A (1 − p_y), (n,).

    Wang et al. (2019), Section 3.3. Computed as −A · Σ_{k≠y} p_k, which is
    1 − p_y without the cancellation of 1 − p_y when p_y is near 1.
    """
    p = torch.softmax(logits, -1)
    others = p.masked_fill(nn.functional.one_hot(y, p.shape[1]).bool(), 0.0).sum(1)
    return -log_floor * others


def symmetric_cross_entropy(logits: torch.Tensor, y: torch.Tensor, alpha: float, beta: float, log_floor: float = -4.0) -> torch.Tensor:
    """α·CE + β·RCE (Wang et al. 2019, Eq. 6), (n,).

    The paper's settings were α = 0.1, β = 1 on CIFAR-10 and α = 6, β = 0.1
    on CIFAR-100; α drives fitting, β robustness.
    """
    return alpha * cross_entropy(logits, y) + beta * reverse_cross_entropy(logits, y, log_floor)


def _transition(transition: torch.Tensor | np.ndarray, k: int, like: torch.Tensor) -> torch.Tensor:
    """The transition as a tensor like ``like``, checked: (K, K), entries in [0, 1], rows summing to 1, no zero column."""
    t = torch.as_tensor(transition, dtype=like.dtype, device=like.device)
    if t.shape != (k, k):
        raise ConfigError(f"noise transition: shape {tuple(t.shape)} does not match the {k} outputs; expected ({k}, {k})")
    if not bool(torch.isfinite(t).all()) or bool((t < 0).any()) or bool((t > 1).any()):
        raise ConfigError("noise transition: entries must be probabilities in [0, 1]")
    rows = t.sum(1)
    if not torch.allclose(rows, torch.ones_like(rows), atol=1e-4):
        raise ConfigError(f"noise transition: rows must sum to 1 (T[i, j] = P(noisy = j | true = i)); row sums run from {float(rows.min()):.4g} to {float(rows.max()):.4g}")
    if bool((t.sum(0) == 0).any()):
        # A noisy label no true class can produce would have an infinite loss.
        raise ConfigError(f"noise transition: column(s) {torch.nonzero(t.sum(0) == 0).flatten().tolist()} are all zero; estimate it with smoothing > 0")
    return t


def forward_corrected_cross_entropy(logits: torch.Tensor, y: torch.Tensor, transition: torch.Tensor | np.ndarray) -> torch.Tensor:
    """−log (softmax(logits) @ T)_y, the forward correction (Patrini et al. 2017, Section 3.1), (n,).

    Args:
        logits: (n, K) the network's logits for the true (clean) label.
        y: (n,) the observed, possibly noisy labels.
        transition: (K, K) T[i, j] = P(noisy = j | true = i), rows summing
            to 1 (see :func:`estimate_transition`). Not trained.

    Computed in log space, log Σ_i p_i T[i, y] = logsumexp_i(log p_i + log T[i, y]),
    so the identity T gives cross-entropy exactly, even for extreme logits.

    Raises:
        ConfigError: T has the wrong shape, is not row-stochastic, or has a
            column of zeros.
    """
    t = _transition(transition, logits.shape[1], logits)
    log_t = torch.log(t[:, y].T)  # (n, K): log T[i, y_n]; log 0 = −inf drops that term
    return -torch.logsumexp(torch.log_softmax(logits, -1) + log_t, dim=1)


def estimate_transition(true: Any, noisy: Any, n_classes: int, smoothing: float = 1.0) -> np.ndarray:
    """T[i, j] = P(noisy = j | true = i) from a trusted set where both labels are known.

    The count-based form of the gold loss correction (Hendrycks et al. 2018):
    T[i, j] = (C[i, j] + s) / (Σ_j C[i, j] + K s), with C[i, j] the number of
    trusted samples of true class i given noisy label j and s the additive
    (Laplace) smoothing. A class with no trusted sample gets the identity
    row (no evidence of noise), whatever the smoothing.

    Args:
        true: (m,) integer true labels in [0, K).
        noisy: (m,) integer noisy labels of the same samples.
        n_classes: K.
        smoothing: s ≥ 0 pseudo-counts added to every cell of a row with data.

    Returns:
        float64 (K, K), rows summing to 1.

    Raises:
        ConfigError: the inputs differ in length, a label is outside [0, K),
            or the smoothing is negative.
    """
    t = np.asarray(true).astype(np.int64).ravel()
    z = np.asarray(noisy).astype(np.int64).ravel()
    if t.shape != z.shape:
        raise ConfigError(f"trusted labels: {t.size} true labels but {z.size} noisy ones; give both for every trusted sample")
    if n_classes < 1:
        raise ConfigError(f"trusted labels: n_classes {n_classes!r} must be at least 1")
    if t.size and (min(t.min(), z.min()) < 0 or max(t.max(), z.max()) >= n_classes):
        raise ConfigError(f"trusted labels: labels run from {min(t.min(), z.min())} to {max(t.max(), z.max())}, outside [0, {n_classes})")
    if not smoothing >= 0:
        raise ConfigError(f"trusted labels: smoothing {smoothing!r} must be at least 0")
    counts = np.zeros((n_classes, n_classes), np.float64)
    np.add.at(counts, (t, z), 1.0)
    n = counts.sum(1)
    out = np.eye(n_classes)
    seen = n > 0
    out[seen] = (counts[seen] + smoothing) / (n[seen, None] + n_classes * smoothing)
    return out


def per_sample_loss(
    name: str,
    logits: torch.Tensor,
    y: torch.Tensor,
    *,
    gce_q: float,
    sce_alpha: float,
    sce_beta: float,
    transition: torch.Tensor | np.ndarray | None = None,
) -> torch.Tensor:
    """The loss ``name`` (one of :data:`LOSSES`) of each sample, (n,).

    Raises:
        ConfigError: the name is unknown, a parameter is out of range, or
            ``forward`` has no transition.
    """
    if name == "ce":
        return cross_entropy(logits, y)
    if name == "gce":
        if not 0 < gce_q <= 1:
            raise ConfigError(f"training.gce_q: {gce_q!r} must be in (0, 1]")
        return generalised_cross_entropy(logits, y, gce_q)
    if name == "sce":
        if not (sce_alpha >= 0 and sce_beta >= 0 and sce_alpha + sce_beta > 0):
            raise ConfigError(f"training.sce_alpha, training.sce_beta: ({sce_alpha!r}, {sce_beta!r}) must be at least 0 and not both 0")
        return symmetric_cross_entropy(logits, y, sce_alpha, sce_beta)
    if name == "forward":
        if transition is None:
            raise ConfigError("training.loss: 'forward' needs a noise transition matrix (estimate it from trusted labels with estimate_transition)")
        return forward_corrected_cross_entropy(logits, y, transition)
    raise ConfigError(f"training.loss: {name!r} is not one of {list(LOSSES)}")
