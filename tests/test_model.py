"""The network: shapes, masking, fully convolutional windows, and one distribution per pixel."""

from __future__ import annotations

import numpy as np
import pytest
import torch

from plantation.model.network import ConvRecurrentNet

T = 12  # three years of four dates
DATE_YEAR = [i // 4 for i in range(T)]
DOY = [(i % 4) / 4 + 0.1 for i in range(T)]


def _net(k: int = 3, hidden: int = 16) -> ConvRecurrentNet:
    torch.manual_seed(0)
    return ConvRecurrentNet(5, DATE_YEAR, DOY, neighbourhood=k, date_width=8, conv_width=8, hidden=hidden, dropout=0.0).eval()


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


def test_yearly_summary_is_the_mean_and_max_of_observed_dates():
    # Reference: the obvious per-pixel loop over each year's observed dates.
    net = _net()
    x, v = _batch(b=3)
    v[0, 4:8] = False  # year 2 of pixel batch 0 never observed
    with torch.no_grad():
        s = net.summarise(x, v)
        z = ((x - net.mean[:, None, None]) / net.std[:, None, None]).nan_to_num(0.0)
        for b in range(3):
            for i in range(3):
                for j in range(3):
                    for y in range(3):
                        dates = [t for t in range(4 * y, 4 * y + 4) if v[b, t, i, j]]
                        got = s[b, y, i, j]
                        if not dates:
                            assert torch.all(got == 0)
                            continue
                        e = torch.stack([net.date_embed(torch.cat([z[b, t, :, i, j], net.season[t]])) for t in dates])
                        torch.testing.assert_close(got[:8], e.mean(0), atol=1e-5, rtol=1e-5)
                        torch.testing.assert_close(got[8:16], e.amax(0), atol=1e-5, rtol=1e-5)
                        torch.testing.assert_close(got[16:21], z[b, dates, :, i, j].mean(0), atol=1e-5, rtol=1e-5)
                        assert float(got[21]) == pytest.approx(len(dates) / 4)


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
    with pytest.raises(ValueError, match="every year present"):
        ConvRecurrentNet(5, [0, 0, 2], [0.1, 0.5, 0.2])
    with pytest.raises(ValueError, match="patches are"):
        _net(k=3)(*_batch(k=5))


def test_normalisation_statistics_are_used():
    net = _net()
    x, v = _batch()
    v[:] = True
    x = x.nan_to_num(0.0)
    shifted = ConvRecurrentNet(5, DATE_YEAR, DOY, neighbourhood=3, date_width=8, conv_width=8, hidden=16, dropout=0.0, mean=np.full(5, 2.0), std=np.full(5, 3.0)).eval()
    shifted.load_state_dict(net.state_dict() | {"mean": torch.full((5,), 2.0), "std": torch.full((5,), 3.0)})
    torch.testing.assert_close(shifted(x * 3 + 2, v), net(x, v), atol=1e-5, rtol=1e-5)
