"""The network: shapes, masking, fully convolutional windows, and one distribution per pixel."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from plantation.model.network import ConvRecurrentNet

T = 12  # three years of four dates
DATE_YEAR = [i // 4 for i in range(T)]
DOY = [(i % 4) / 4 + 0.1 for i in range(T)]


def _net(k: int = 3, hidden: int = 16) -> ConvRecurrentNet:
    torch.manual_seed(0)
    return ConvRecurrentNet(5, DATE_YEAR, DOY, neighbourhood=k, conv_width=8, hidden=hidden, dropout=0.0).eval()


def _batch(b: int = 6, k: int = 3, seed: int = 1) -> tuple[torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(b, T, 5, k, k, generator=g)
    v = torch.rand(b, T, k, k, generator=g) > 0.3
    return torch.where(v.unsqueeze(2), x, torch.nan), v


def test_output_is_one_distribution_over_static_outcomes_and_years():
    net = _net()
    x, v = _batch()
    logits = net(x, v)
    assert logits.shape == (6, 3 + 3)
    p = torch.softmax(logits, -1)
    torch.testing.assert_close(p.sum(-1), torch.ones(6))
    assert torch.isfinite(logits).all()


def test_a_masked_date_cannot_change_the_output():
    net = _net()
    x, v = _batch()
    v[:, 5] = False  # date 6 unobserved everywhere
    base = net(x, v)
    x2 = x.clone()
    x2[:, 5] = torch.randn_like(x2[:, 5]) * 100  # whatever was stored there
    torch.testing.assert_close(net(x2, v), base)
    # NaN under a mask is as harmless.
    x2[:, 5] = torch.nan
    torch.testing.assert_close(net(x2, v), base)
    # ...while the same change on an observed date does change it.
    v2 = v.clone()
    v2[:, 5] = True
    assert not torch.allclose(net(x2.nan_to_num(3.0), v2), net(x.nan_to_num(0.0), v2))


def test_a_pixel_never_observed_still_gets_a_distribution():
    net = _net()
    x, v = _batch(b=2)
    v[0] = False
    p = torch.softmax(net(x, v), -1)
    assert torch.isfinite(p).all() and torch.allclose(p.sum(-1), torch.ones(2))


def test_masked_gru_matches_a_step_by_step_reference():
    # The packed fused GRU must equal the obvious loop: update on observed
    # dates, carry the state on unobserved ones, in both directions.
    net = _net(hidden=8)
    g = torch.Generator().manual_seed(4)
    e = torch.randn(5, T, 8, generator=g)
    obs = torch.rand(5, T, generator=g) > 0.5
    obs[0] = False
    obs[1] = True
    fwd, bwd = net.masked_gru(e, obs)
    gru = net.gru
    cells = []
    for sfx in ("", "_reverse"):
        c = nn.GRUCell(8, 8)
        c.load_state_dict({name: getattr(gru, f"{name}_l0{sfx}") for name in ("weight_ih", "weight_hh", "bias_ih", "bias_hh")})
        cells.append(c)
    m = obs.float().unsqueeze(-1)
    with torch.no_grad():
        h = torch.zeros(5, 8)
        ref_f = []
        for i in range(T):
            h = m[:, i] * cells[0](e[:, i], h) + (1 - m[:, i]) * h
            ref_f.append(h)
        h = torch.zeros(5, 8)
        ref_b = [torch.zeros(0)] * T
        for i in reversed(range(T)):
            h = m[:, i] * cells[1](e[:, i], h) + (1 - m[:, i]) * h
            ref_b[i] = h
    torch.testing.assert_close(fwd, torch.stack(ref_f, 1), atol=1e-5, rtol=1e-5)
    torch.testing.assert_close(bwd, torch.stack(ref_b, 1), atol=1e-5, rtol=1e-5)


@pytest.mark.parametrize("k", [1, 3, 5])
def test_window_inference_equals_patch_inference(k):
    net = _net(k=k)
    g = torch.Generator().manual_seed(2)
    h, w = 7, 6
    r = k // 2
    x = torch.randn(T, 5, h + 2 * r, w + 2 * r, generator=g)
    v = torch.rand(T, h + 2 * r, w + 2 * r, generator=g) > 0.3
    x = torch.where(v.unsqueeze(1), x, torch.nan)
    with torch.no_grad():
        full = net.forward_window(x, v)
        patches = torch.stack([x[:, :, i : i + k, j : j + k] for i in range(h) for j in range(w)])
        pv = torch.stack([v[:, i : i + k, j : j + k] for i in range(h) for j in range(w)])
        each = net(patches, pv).reshape(h, w, -1)
    assert full.shape == (h, w, 6)
    torch.testing.assert_close(full, each, atol=1e-5, rtol=1e-5)


def test_bad_construction_is_refused():
    with pytest.raises(ValueError, match="neighbourhood must be odd"):
        ConvRecurrentNet(5, DATE_YEAR, DOY, neighbourhood=4)
    with pytest.raises(ValueError, match="date_year"):
        ConvRecurrentNet(5, [1, 1, 2], [0.1, 0.5, 0.2])
    with pytest.raises(ValueError, match="patches are"):
        _net(k=3)(*_batch(k=5))


def test_normalisation_statistics_are_used():
    net = _net()
    x, v = _batch()
    v[:] = True
    x = x.nan_to_num(0.0)
    shifted = ConvRecurrentNet(5, DATE_YEAR, DOY, neighbourhood=3, conv_width=8, hidden=16, dropout=0.0, mean=np.full(5, 2.0), std=np.full(5, 3.0)).eval()
    shifted.load_state_dict(net.state_dict() | {"mean": torch.full((5,), 2.0), "std": torch.full((5,), 3.0)})
    torch.testing.assert_close(shifted(x * 3 + 2, v), net(x, v), atol=1e-5, rtol=1e-5)
