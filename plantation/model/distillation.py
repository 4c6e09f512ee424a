"""One network distilled from the ensemble: the members' mean distribution and their disagreement from a single pass.

Mapping with an ensemble costs one pass per member. A network of the
members' own architecture with one output more is trained to give

* the members' mean distribution: the loss is the KL divergence from it
  (knowledge distillation, Hinton et al. 2015, "Distilling the knowledge in
  a neural network");
* the members' disagreement, the mutual information between the outcome and
  the member that the maps carry as their epistemic layer, each member
  calibrated like the mapped probabilities: its squared error is added
  (one network standing in for an ensemble's uncertainty as well as its mean,
  after Malinin et al. 2020, "Ensemble distribution distillation"; here its
  scalar summary only).

It learns on the training split's patches and on unlabelled pixels drawn
across the region, rotated, mirrored and with dates hidden like the
members' training; the members' outputs are computed on the same altered
inputs, so it learns what they say under clouds too. It starts from the
first member's weights. Early stopping watches the same loss on the
validation split, where :func:`agreement` then measures how far it is from
the ensemble; the training job keeps it only within the configured
tolerance.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import torch

from plantation.model.artefact import calibrated_log_probs, calibrated_mutual_information
from plantation.model.card import Calibration
from plantation.model.network import ConvRecurrentNet, split_epistemic
from plantation.model.outcomes import N_STATIC
from plantation.model.task import SeriesTask


def ensemble_targets(members: list[ConvRecurrentNet], cal: Calibration, x: torch.Tensor, valid: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
    """The members' mean log-probabilities before calibration (b, k) and the mutual information (b,) of the calibrated members (nats)."""
    with torch.no_grad():
        z = torch.stack([m(x, valid) for m in members])
        mean_lp = torch.logsumexp(torch.log_softmax(z, -1), 0) - np.log(len(members))
        mi = torch.from_numpy(calibrated_mutual_information(z, cal)).to(z.dtype)
    return mean_lp, mi


def start_from(member: ConvRecurrentNet, spec: dict[str, Any]) -> ConvRecurrentNet:
    """A network with the epistemic output, every weight copied from ``member`` (the new output's row starts at 0)."""
    net = ConvRecurrentNet(**{**spec, "epistemic": True})
    state = member.state_dict()
    own = net.state_dict()
    last = [k for k in own if k.startswith("static_head.") and own[k].shape != state[k].shape]
    for k in last:
        w = torch.zeros_like(own[k])
        w[:N_STATIC] = state[k]
        state[k] = w
    net.load_state_dict(state)
    return net


class DistillationTask(SeriesTask):
    """Trains :attr:`net` to stand in for ``members`` (frozen, in eval mode)."""

    def __init__(
        self, members: list[ConvRecurrentNet], cal: Calibration, spec: dict[str, Any], *, lr: float, epistemic_weight: float, max_epochs: int, date_dropout: float, weight_decay: float = 1e-4
    ) -> None:
        super().__init__()
        self.net = start_from(members[0], spec)
        # A plain list: the members are not trained and not part of the checkpoint.
        self.members = [m.eval() for m in members]
        self.cal = cal
        self.lr, self.epistemic_weight, self.max_epochs, self.date_dropout, self.weight_decay = lr, epistemic_weight, max_epochs, date_dropout, weight_decay

    def settings(self) -> tuple[float, float, int, float]:
        return self.lr, self.weight_decay, self.max_epochs, self.date_dropout

    def step(self, batch: tuple[torch.Tensor, ...], stage: str) -> torch.Tensor:
        x, valid = batch
        if stage == "train":
            x, valid = self.augment(x, valid)
        target_lp, target_mi = ensemble_targets(self.members, self.cal, x, valid)
        z, mi = split_epistemic(self.net(x, valid), self.net.n_outcomes)
        kl = (target_lp.exp() * (target_lp - torch.log_softmax(z, -1))).sum(-1).mean()
        err = ((mi - target_mi) ** 2).mean()
        loss = kl + self.epistemic_weight * err
        self.log(f"{stage}_loss", loss, prog_bar=True, on_epoch=True, on_step=False, batch_size=len(x), sync_dist=True)
        return loss


def agreement(members: list[ConvRecurrentNet], net: ConvRecurrentNet, cal: Calibration, x: torch.Tensor, valid: torch.Tensor, batch: int = 512) -> dict[str, float]:
    """How closely ``net`` follows the ensemble on patches ``x`` (n, time, channel, k, k), both calibrated by ``cal``.

    Returns mean and 99th-percentile total-variation distance between the
    two distributions, the mean absolute difference of p(conversion), the
    share of patches whose most probable outcome is the same, and the mean
    absolute error of the epistemic term (nats) against the members' mutual
    information.
    """
    tv, dconv, same, dmi = [], [], [], []
    with torch.no_grad():
        for i in range(0, len(x), batch):
            xb, vb = x[i : i + batch], valid[i : i + batch]
            z = torch.stack([m(xb, vb) for m in members])
            p_ens = calibrated_log_probs(z, cal).exp()
            zs, mi = split_epistemic(net(xb, vb), net.n_outcomes)
            p_net = calibrated_log_probs(zs.unsqueeze(0), cal).exp()
            tv.append(0.5 * (p_ens - p_net).abs().sum(-1))
            dconv.append((p_ens[:, N_STATIC:].sum(-1) - p_net[:, N_STATIC:].sum(-1)).abs())
            same.append(p_ens.argmax(-1) == p_net.argmax(-1))
            dmi.append((mi - torch.from_numpy(calibrated_mutual_information(z, cal)).to(mi.dtype)).abs() if mi is not None else torch.zeros(len(xb)))
    t = torch.cat(tv)
    return {
        "n": len(t),
        "mean_tv_distance": round(float(t.mean()), 4),
        "p99_tv_distance": round(float(torch.quantile(t, 0.99)), 4),
        "mean_abs_diff_p_conversion": round(float(torch.cat(dconv).mean()), 4),
        "same_most_probable": round(float(torch.cat(same).float().mean()), 4),
        "mean_abs_diff_epistemic": round(float(torch.cat(dmi).mean()), 4),
    }
