"""Per-sample losses against hand-computed values and the papers' own identities.

Sources (the equations are the check values):

* GCE: Zhang & Sabuncu 2018, NeurIPS, "Generalized cross entropy loss for
  training deep neural networks with noisy labels", Eq. 6: L_q = (1 − p_y^q) / q;
  the limit q → 0 is CE and q = 1 is MAE up to a factor (their Eq. 6 remark).
* SCE: Wang et al. 2019, ICCV, "Symmetric cross entropy for robust learning
  with noisy labels", Eq. 6: α·CE + β·RCE, with log 0 := A = −4 (Section 3.3),
  so RCE = −A (1 − p_y).
* Forward correction: Patrini et al. 2017, CVPR, "Making deep neural networks
  robust to label noise: a loss correction approach", Section 3.1:
  −log (softmax(h) @ T)_y, T[i, j] = P(noisy = j | true = i).
* Transition from trusted labels: Hendrycks et al. 2018, NeurIPS, "Using
  trusted data to train deep networks on labels corrupted by severe noise"
  (gold loss correction), count-based with additive smoothing.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import torch

from plantation.errors import ConfigError
from plantation.model import losses

# softmax([0, ln 3]) = [1/4, 3/4]; softmax([0, 0, ln 2]) = [1/4, 1/4, 1/2].
LOGITS2 = torch.tensor([[0.0, math.log(3.0)], [0.0, math.log(3.0)]], dtype=torch.float64)
Y2 = torch.tensor([0, 1])
LOGITS3 = torch.tensor([[0.0, 0.0, math.log(2.0)]] * 3, dtype=torch.float64)
Y3 = torch.tensor([0, 1, 2])


def _random(seed: int, n: int = 64, k: int = 7) -> tuple[torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    return torch.randn(n, k, generator=g, dtype=torch.float64) * 3, torch.randint(0, k, (n,), generator=g)


def test_cross_entropy_hand_values():
    np.testing.assert_allclose(losses.cross_entropy(LOGITS2, Y2), [math.log(4), math.log(4 / 3)], rtol=1e-12)
    np.testing.assert_allclose(losses.cross_entropy(LOGITS3, Y3), [math.log(4), math.log(4), math.log(2)], rtol=1e-12)


def test_gce_hand_values():
    # Zhang & Sabuncu Eq. 6 with q = 1/2: p = 1/4 → (1 − 1/2) / (1/2) = 1; p = 3/4 → 2 − √3.
    np.testing.assert_allclose(losses.generalised_cross_entropy(LOGITS2, Y2, 0.5), [1.0, 2 - math.sqrt(3)], rtol=1e-12)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_gce_tends_to_ce_as_q_goes_to_zero(seed):
    # Zhang & Sabuncu: lim_{q→0} (1 − p^q)/q = −log p (L'Hôpital); the error is about q (log p)² / 2.
    logits, y = _random(seed)
    ce = losses.cross_entropy(logits, y)
    gce = losses.generalised_cross_entropy(logits, y, 1e-4)
    np.testing.assert_allclose(gce, ce, rtol=2e-3)
    assert not torch.allclose(losses.generalised_cross_entropy(logits, y, 0.7), ce, rtol=1e-2)


@pytest.mark.parametrize("seed", [0, 1])
def test_gce_with_q_one_is_mae_up_to_a_factor(seed):
    # Zhang & Sabuncu: q = 1 gives 1 − p_y; MAE Σ_k |e_y,k − p_k| = 2 (1 − p_y).
    logits, y = _random(seed)
    p = torch.softmax(logits, -1)
    mae = (torch.nn.functional.one_hot(y, p.shape[1]) - p).abs().sum(1)
    gce = losses.generalised_cross_entropy(logits, y, 1.0)
    np.testing.assert_allclose(gce, 1 - p.gather(1, y[:, None]).squeeze(1), rtol=1e-12)
    np.testing.assert_allclose(2 * gce, mae, rtol=1e-12)


def test_gce_is_the_formula_training_always_used():
    # plantation.model.training.ConversionTask._loss, before the losses moved here.
    logits, y = _random(3)
    q = 0.7
    py = torch.softmax(logits, -1).gather(1, y[:, None]).squeeze(1).clamp_min(1e-7)
    torch.testing.assert_close(losses.generalised_cross_entropy(logits, y, q), (1 - py**q) / q, rtol=0, atol=0)
    # The floor: p_y = e^{-200} counts as 1e-7.
    extreme = torch.tensor([[200.0, 0.0]], dtype=torch.float64)
    np.testing.assert_allclose(losses.generalised_cross_entropy(extreme, torch.tensor([1]), q), [(1 - 1e-7**q) / q], rtol=1e-12)


def test_rce_hand_values():
    # Wang et al. §3.3, A = −4: RCE = 4 (1 − p_y); p_y = 1/4 → 3, 3/4 → 1.
    np.testing.assert_allclose(losses.reverse_cross_entropy(LOGITS2, Y2), [3.0, 1.0], rtol=1e-12)
    np.testing.assert_allclose(losses.reverse_cross_entropy(LOGITS3, Y3), [3.0, 3.0, 2.0], rtol=1e-12)
    # Another floor, as implementations that clip the one-hot label at 1e-4 have it.
    np.testing.assert_allclose(losses.reverse_cross_entropy(LOGITS2, Y2, log_floor=math.log(1e-4)), [-math.log(1e-4) * 0.75, -math.log(1e-4) * 0.25], rtol=1e-12)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_rce_is_minus_a_times_one_minus_p_true(seed):
    # Wang et al. Eq. 5 with log 0 := A: −Σ_k p_k log q_k written out with the one-hot q.
    logits, y = _random(seed)
    p = torch.softmax(logits, -1)
    a = -4.0
    log_q = torch.where(torch.nn.functional.one_hot(y, p.shape[1]).bool(), 0.0, a)
    direct = -(p * log_q).sum(1)
    np.testing.assert_allclose(losses.reverse_cross_entropy(logits, y), direct, rtol=1e-10)
    np.testing.assert_allclose(losses.reverse_cross_entropy(logits, y), -a * (1 - p.gather(1, y[:, None]).squeeze(1)), rtol=1e-10)


def test_sce_hand_values_and_beta_zero_is_alpha_ce():
    # Wang et al. Eq. 6, α = 0.1, β = 1 (their CIFAR-10 setting): 0.1 ln 4 + 3, 0.1 ln(4/3) + 1.
    np.testing.assert_allclose(losses.symmetric_cross_entropy(LOGITS2, Y2, 0.1, 1.0), [0.1 * math.log(4) + 3, 0.1 * math.log(4 / 3) + 1], rtol=1e-12)
    logits, y = _random(4)
    np.testing.assert_allclose(losses.symmetric_cross_entropy(logits, y, 2.5, 0.0), 2.5 * losses.cross_entropy(logits, y), rtol=1e-12)
    np.testing.assert_allclose(losses.symmetric_cross_entropy(logits, y, 0.0, 1.0), losses.reverse_cross_entropy(logits, y), rtol=1e-12)


def test_forward_correction_hand_value():
    # Patrini et al. §3.1: p = [1/4, 3/4], T = [[.8, .2], [.4, .6]] → p @ T = [1/2, 1/2]; −log 1/2 for both labels.
    t = torch.tensor([[0.8, 0.2], [0.4, 0.6]], dtype=torch.float64)
    np.testing.assert_allclose(losses.forward_corrected_cross_entropy(LOGITS2, Y2, t), [math.log(2), math.log(2)], rtol=1e-12)
    # Against the product written out, on random logits and a random row-stochastic T.
    logits, y = _random(5, k=4)
    t = torch.distributions.Dirichlet(torch.ones(4, 4, dtype=torch.float64)).sample()
    direct = -torch.log((torch.softmax(logits, -1) @ t).gather(1, y[:, None]).squeeze(1))
    np.testing.assert_allclose(losses.forward_corrected_cross_entropy(logits, y, t), direct, rtol=1e-10)


@pytest.mark.parametrize("seed", [0, 1])
def test_forward_correction_with_identity_is_ce(seed):
    logits, y = _random(seed)
    eye = np.eye(logits.shape[1])  # numpy accepted too
    np.testing.assert_allclose(losses.forward_corrected_cross_entropy(logits, y, eye), losses.cross_entropy(logits, y), rtol=1e-12)
    # Exactly, even where p_y underflows.
    extreme = torch.tensor([[500.0, -500.0, 0.0]], dtype=torch.float64)
    np.testing.assert_allclose(losses.forward_corrected_cross_entropy(extreme, torch.tensor([1]), np.eye(3)), [1000.0], rtol=1e-12)


def test_forward_correction_rejects_a_bad_transition():
    logits, y = _random(0, k=3)
    with pytest.raises(ConfigError, match="rows must sum to 1"):
        losses.forward_corrected_cross_entropy(logits, y, torch.full((3, 3), 0.5))
    with pytest.raises(ConfigError, match="shape"):
        losses.forward_corrected_cross_entropy(logits, y, torch.eye(4))
    with pytest.raises(ConfigError, match="all zero"):
        losses.forward_corrected_cross_entropy(logits, y, torch.tensor([[1.0, 0, 0], [1.0, 0, 0], [0, 0, 1.0]]))


def test_estimate_transition_recovers_constructed_rows():
    # True class 0: 8 kept, 2 labelled 1; class 1: 5 kept, 5 labelled 2; class 2: no trusted sample.
    true = [0] * 10 + [1] * 10
    noisy = [0] * 8 + [1] * 2 + [1] * 5 + [2] * 5
    t = losses.estimate_transition(true, noisy, 3, smoothing=0.0)
    np.testing.assert_allclose(t, [[0.8, 0.2, 0.0], [0.0, 0.5, 0.5], [0.0, 0.0, 1.0]], rtol=0, atol=1e-15)
    # Additive smoothing s = 1: (C + 1) / (n + K); the empty class keeps the identity row.
    t1 = losses.estimate_transition(np.array(true), np.array(noisy), 3, smoothing=1.0)
    np.testing.assert_allclose(t1, [[9 / 13, 3 / 13, 1 / 13], [1 / 13, 6 / 13, 6 / 13], [0.0, 0.0, 1.0]], rtol=1e-12)
    np.testing.assert_allclose(t1.sum(1), 1.0, rtol=1e-12)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_estimate_transition_converges_to_the_corrupting_matrix(seed):
    # Hendrycks et al.: with enough trusted samples the estimate approaches the true T.
    rng = np.random.default_rng(seed)
    k = 4
    truth = rng.dirichlet(np.ones(k) * 0.5, size=k) * 0.5 + np.eye(k) * 0.5
    true = rng.integers(0, k, 40_000)
    noisy = np.minimum((rng.random(true.size)[:, None] > np.cumsum(truth[true], axis=1)).sum(1), k - 1)  # a draw from row true
    t = losses.estimate_transition(true, noisy, k, smoothing=1.0)
    np.testing.assert_allclose(t, truth, atol=0.02)
    # And the corrected loss with it is usable at once.
    assert torch.isfinite(losses.forward_corrected_cross_entropy(torch.zeros(3, k), torch.tensor([0, 1, 3]), t)).all()


def test_estimate_transition_rejects_bad_input():
    with pytest.raises(ConfigError, match="outside"):
        losses.estimate_transition([0, 3], [0, 1], 3)
    with pytest.raises(ConfigError, match="noisy"):
        losses.estimate_transition([0, 1], [0], 3)
    with pytest.raises(ConfigError, match="smoothing"):
        losses.estimate_transition([0], [0], 3, smoothing=-1)


@pytest.mark.parametrize("name", losses.LOSSES)
def test_gradients_are_finite_for_extreme_logits(name):
    logits = torch.tensor([[1e4, -1e4, 0.0], [-1e4, 1e4, 0.0], [0.0, 0.0, 0.0]], requires_grad=True)
    y = torch.tensor([1, 1, 2])
    t = losses.estimate_transition([0, 1, 2, 1], [0, 1, 2, 2], 3, smoothing=0.5)
    loss = losses.per_sample_loss(name, logits, y, gce_q=0.7, sce_alpha=0.1, sce_beta=1.0, transition=t)
    assert loss.shape == (3,)
    assert torch.isfinite(loss).all()
    loss.sum().backward()
    assert logits.grad is not None and torch.isfinite(logits.grad).all()


def test_dispatcher_routes_each_name():
    logits, y = _random(6, k=3)
    t = np.array([[0.9, 0.05, 0.05], [0.1, 0.8, 0.1], [0.0, 0.2, 0.8]])
    kw = {"gce_q": 0.3, "sce_alpha": 0.5, "sce_beta": 2.0, "transition": t}
    torch.testing.assert_close(losses.per_sample_loss("ce", logits, y, **kw), losses.cross_entropy(logits, y))
    torch.testing.assert_close(losses.per_sample_loss("gce", logits, y, **kw), losses.generalised_cross_entropy(logits, y, 0.3))
    torch.testing.assert_close(losses.per_sample_loss("sce", logits, y, **kw), losses.symmetric_cross_entropy(logits, y, 0.5, 2.0))
    torch.testing.assert_close(losses.per_sample_loss("forward", logits, y, **kw), losses.forward_corrected_cross_entropy(logits, y, t))


def test_dispatcher_rejects_unknown_names_and_bad_settings():
    logits, y = _random(0, k=3)
    kw = {"gce_q": 0.7, "sce_alpha": 0.1, "sce_beta": 1.0}
    with pytest.raises(ConfigError, match=r"training\.loss: 'mae' is not one of \['ce', 'gce', 'sce', 'forward'\]"):
        losses.per_sample_loss("mae", logits, y, **kw)
    with pytest.raises(ConfigError, match="transition"):
        losses.per_sample_loss("forward", logits, y, **kw)
    with pytest.raises(ConfigError, match="training.gce_q"):
        losses.per_sample_loss("gce", logits, y, **{**kw, "gce_q": 0.0})
    with pytest.raises(ConfigError, match="training.sce_alpha"):
        losses.per_sample_loss("sce", logits, y, **{**kw, "sce_alpha": -1.0})
