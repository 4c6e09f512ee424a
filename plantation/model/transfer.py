"""Carrying a trained network's weights into a new training: a warm start on grown labels, or a series grown by a year.

Every weight of :class:`~plantation.model.network.ConvRecurrentNet` is shared
across dates and years: the date embedding, the convolutions over yearly
summaries, the GRU, the static head and the per-year scorer. Only buffers
describe the series (which year each date falls in, its season). A network
trained on years Y0..Yn therefore becomes one for Y0..Yn+1 by rebuilding it
on the new dates and loading the same weights: the new year's outcome is
scored by the scorer every other year taught. The normalisation statistics
stay the parent's, since the weights were learnt on inputs normalised by them.

A series may gain years at its end and dates in any year; its first year must
stay the same (outcome indices count years from it) and the bands, indices,
neighbourhood and layer sizes must match.
"""

from __future__ import annotations

from typing import Any

import torch

from plantation.errors import ConfigError
from plantation.model.network import ConvRecurrentNet

#: Buffers that describe the series rather than what was learnt.
SERIES_BUFFERS: tuple[str, ...] = ("date_year", "season", "dates_in_year", "sensor")
#: Constructor arguments that must match for weights to carry over.
SHAPE_KEYS: tuple[str, ...] = ("n_channels", "neighbourhood", "date_width", "amplitude", "conv_width", "hidden", "n_sensors")


def transfer_spec(parent: dict[str, Any], child: dict[str, Any], *, parent_years: list[int], child_years: list[int]) -> dict[str, Any]:
    """The child's network spec with the parent's normalisation, after checking the weights can carry over.

    Args:
        parent, child: constructor arguments (see :func:`plantation.model.training.network_spec`).
        parent_years, child_years: calendar years of the two series.

    Raises:
        ConfigError: a shape argument differs, the first year differs, or the
            child has fewer years than the parent.
    """
    diff = {k: (parent.get(k), child.get(k)) for k in SHAPE_KEYS if parent.get(k) != child.get(k)}
    if diff:
        text = ", ".join(f"{k} {a!r} in the parent, {b!r} now" for k, (a, b) in diff.items())
        raise ConfigError(f"retrain: the parent's network differs ({text}); keep the parent's network and patches settings or train afresh (retrain.start=afresh)")
    if child_years[0] != parent_years[0]:
        raise ConfigError(f"retrain: the series now starts in {child_years[0]}, the parent's in {parent_years[0]}; a warm start needs the same first year (or retrain.start=afresh)")
    if len(child_years) < len(parent_years):
        raise ConfigError(f"retrain: the series ends in {child_years[-1]}, before the parent's last year {parent_years[-1]}; a model does not shrink its years (retrain.start=afresh)")
    return {**child, "mean": list(parent["mean"]), "std": list(parent["std"])}


def carry_weights(state: dict[str, torch.Tensor], spec: dict[str, Any]) -> ConvRecurrentNet:
    """A network built from ``spec`` with every learnt weight and normalisation statistic of ``state`` (a parent's ``state_dict``).

    The series buffers are the new spec's; an epistemic output present in
    both is carried too.
    """
    net = ConvRecurrentNet(**spec)
    own = net.state_dict()
    carried = {k: v for k, v in state.items() if k not in SERIES_BUFFERS}
    bad = [k for k, v in carried.items() if k not in own or own[k].shape != v.shape]
    if bad:
        raise ConfigError(f"retrain: the parent's weights {bad[:3]} do not fit the new network; train afresh (retrain.start=afresh)")
    own.update(carried)
    net.load_state_dict(own)
    return net
