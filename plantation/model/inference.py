"""Run an exported model over whole tiles, window by window.

The network is fully convolutional in space (see :mod:`plantation.model.network`):
each window is read with a halo of ``(k − 1) / 2`` pixels, so every pixel
gets exactly the neighbourhood it would get as a training patch, and window
seams leave no trace.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence
from dataclasses import asdict, dataclass

import numpy as np
import torch

from plantation.errors import RegionError
from plantation.imagery.config import ScalingRule
from plantation.imagery.region import TileStack
from plantation.model.artefact import Artefact, calibrated_mutual_information
from plantation.model.card import check_bands, check_date_sensors, check_harmonisation, check_scaling
from plantation.model.network import split_epistemic
from plantation.model.patches import features


@dataclass
class TileProbabilities:
    """Calibrated outcome probabilities of every pixel of a tile.

    Attributes:
        probs: float32 (y, x, outcomes), rows sum to one.
        epistemic: float32 (y, x), mutual information (nats) between the
            outcome and the ensemble member, members calibrated like ``probs``
            (0 for a single member).
        clear: int16 (y, x), number of dates on which the pixel was observed.
    """

    probs: np.ndarray
    epistemic: np.ndarray
    clear: np.ndarray


def windows(height: int, width: int, size: int) -> Iterator[tuple[int, int, int, int]]:
    """(row, col, h, w) of the windows covering a grid, row-major."""
    for r in range(0, height, size):
        for c in range(0, width, size):
            yield r, c, min(size, height - r), min(size, width - c)


def _span(dates: list[str]) -> str:
    return f"{dates[0][:4]}-{dates[-1][:4]}" if dates else "none"


def check_compatible(art: Artefact, stack: TileStack, scaling: Sequence[ScalingRule] | None = None) -> None:
    """The tile must have the model's dates (hence years), bands in the model's order, sensors and harmonisation (and, when given, its scaling rules).

    Raises:
        RegionError: dates, band roles or their order, sensors or scaling
            rules differ: the first difference, found here against expected
            by the model, and the fix.
    """
    where = f"tile {stack.name!r}"
    dates = [str(d) for d in stack.dates]
    if dates != art.card.dates:
        diff = next((i for i, (a, b) in enumerate(zip(dates, art.card.dates, strict=False)) if a != b), min(len(dates), len(art.card.dates)))
        have = dates[diff] if diff < len(dates) else "none"
        want = art.card.dates[diff] if diff < len(art.card.dates) else "none"
        raise RegionError(
            f"{where}: date {diff + 1} is {have}, the model was trained with {want} ({len(dates)} dates, years {_span(dates)} here; {len(art.card.dates)} dates, "
            f"years {_span(art.card.dates)} in the model); map with the model's dates"
        )
    check_bands(art.card, [str(b) for b in stack.reflectance["band"].values], where)
    check_date_sensors(art.card, dates, stack.date_sensors(), where)
    check_harmonisation(art.card, stack.harmonised_to, where)
    if scaling is not None:
        check_scaling(art.card, [asdict(r) for r in scaling], where)


def read_window(stack: TileStack, r0: int, c0: int, h: int, w: int, halo: int) -> tuple[np.ndarray, np.ndarray]:
    """Reflectance (time, band, h + 2·halo, w + 2·halo) and validity, NaN / False outside the tile."""
    H, W = stack.grid.height, stack.grid.width
    rs, re_ = max(r0 - halo, 0), min(r0 + h + halo, H)
    cs, ce = max(c0 - halo, 0), min(c0 + w + halo, W)
    refl, valid = stack.read(rs, cs, re_ - rs, ce - cs)
    pad = ((rs - (r0 - halo)), ((r0 + h + halo) - re_), (cs - (c0 - halo)), ((c0 + w + halo) - ce))
    if any(pad):
        refl = np.pad(refl, ((0, 0), (0, 0), pad[:2], pad[2:]), constant_values=np.nan)
        valid = np.pad(valid, ((0, 0), pad[:2], pad[2:]), constant_values=False)
    return refl, valid


def predict_tile(
    art: Artefact, stack: TileStack, *, window: int = 128, progress: bool = False, scaling: Sequence[ScalingRule] | None = None, distilled: bool = True, pixel_batch: int | None = 1024
) -> TileProbabilities:
    """Calibrated outcome probabilities for every pixel of ``stack``.

    ``scaling``: the region's scaling rules, checked against the model's.
    ``distilled``, ``pixel_batch``: see :func:`window_probabilities`.
    Memory per window is about time × channels × (window + 2·halo)² × 4 bytes
    for the inputs plus the yearly summaries of (window + 2·halo)² pixels.
    """
    check_compatible(art, stack, scaling)
    H, W = stack.grid.height, stack.grid.width
    halo = art.members[0].halo
    n_out = art.members[0].n_outcomes
    probs = np.zeros((H, W, n_out), np.float32)
    epi = np.zeros((H, W), np.float32)
    clear = np.zeros((H, W), np.int16)
    wins = list(windows(H, W, window))
    it = wins
    if progress:
        from tqdm import tqdm

        it = tqdm(wins, desc=f"tile {stack.name}", unit="window")
    for r0, c0, h, w in it:
        refl, valid = read_window(stack, r0, c0, h, w, halo)
        x = torch.from_numpy(features(refl, art.card.bands, art.card.indices))
        v = torch.from_numpy(valid)
        probs[r0 : r0 + h, c0 : c0 + w], epi[r0 : r0 + h, c0 : c0 + w] = window_probabilities(art, x, v, pixel_batch, distilled=distilled)
        clear[r0 : r0 + h, c0 : c0 + w] = valid[:, halo : halo + h, halo : halo + w].sum(0)
    return TileProbabilities(probs, epi, clear)


def window_probabilities(art: Artefact, x: torch.Tensor, valid: torch.Tensor, pixel_batch: int | None = None, *, distilled: bool = True) -> tuple[np.ndarray, np.ndarray]:
    """Calibrated probabilities (h, w, outcomes) and epistemic MI (h, w, nats) of a window's interior pixels.

    ``x``: features (time, channel, h + 2·halo, w + 2·halo); ``valid``:
    (time, h + 2·halo, w + 2·halo). ``pixel_batch``: pixels per pass of the
    recurrent part (None: all at once; see ``forward_window``). With
    ``distilled`` and a model that has a distilled network, that one network
    gives both (a third of the work of three members); otherwise every member runs and the epistemic term is
    the mutual information between the outcome and the member, each member
    calibrated like the mapped probabilities (0 for a single member).
    """
    with torch.inference_mode():
        if distilled and art.distilled is not None:
            z, e = split_epistemic(art.distilled.forward_window(x, valid, pixel_batch), art.distilled.n_outcomes)
            probs = art.calibrated_log_probs(z.unsqueeze(0)).exp()
            return probs.numpy(), e.numpy().astype(np.float32)
        z = torch.stack([m.forward_window(x, valid, pixel_batch) for m in art.members])  # (m, h, w, o)
        probs = art.calibrated_log_probs(z).exp()
        if len(art.members) > 1:
            epi = calibrated_mutual_information(z, art.card.calibration)
        else:
            epi = np.zeros(probs.shape[:-1], np.float32)
    return probs.numpy(), np.asarray(epi, np.float32)
