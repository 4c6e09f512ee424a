"""The exported model loaded for inference: the card plus one network per ensemble member, without pickle.

An artefact is two files side by side:

* ``model.safetensors`` — the tensors of every ensemble member, keys
  ``member<i>.<parameter name>``, and of the network distilled from them
  when there is one, keys ``distilled.<parameter name>``;
* ``model.json`` — everything needed to build the inputs and read the
  outputs: band roles, scaling rules, indices, dates and years, the network's
  constructor arguments (normalisation statistics included), the calibration
  (temperature, per-outcome loss weights, training outcome frequencies,
  optional conformal threshold, optional region prior and its source), the
  cutoff year and the package version.

Reading it back uses only ``safetensors`` and ``json``: no code object is
ever unpickled. A file planted in either place (a pickle, say) is refused as
data: the card must be UTF-8 JSON of the card's format, and the weights must
have the sha256 the card records (``weights_sha256``) before safetensors even
parses them.

Cards written before the checksum existed have none. They are loaded with a
warning rather than refused: the checksum guards against a weights file
damaged or swapped after export, not against a forger (who could rewrite the
card's checksum as well), and safetensors parsing runs no code whatever the
bytes, so refusing those models would cost users a retraining for no safety
gained. Re-exporting (``plantation train``) adds the checksum.
"""

from __future__ import annotations

import hashlib
import logging
import os
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np
import torch
from safetensors.torch import load_file, save_file

from plantation.errors import FileFormatError, InputNotFoundError, PlantationError
from plantation.model.calibration import mutual_information
from plantation.model.card import CARD, FORMAT, WEIGHTS, Calibration, ModelCard, read_card, write_card
from plantation.model.network import ConvRecurrentNet

log = logging.getLogger(__name__)


@dataclass
class Artefact:
    """A loaded artefact: the card, one network per ensemble member and the distilled network if any (in eval mode)."""

    card: ModelCard
    members: list[ConvRecurrentNet]
    distilled: ConvRecurrentNet | None = None

    def calibrated_log_probs(self, member_logits: torch.Tensor) -> torch.Tensor:
        """Calibrated log-probabilities (…, outcomes) from (members, …, outcomes) logits."""
        return calibrated_log_probs(member_logits, self.card.calibration)


def calibrated_log_probs(member_logits: torch.Tensor, cal: Calibration) -> torch.Tensor:
    """See :class:`Calibration` for the formula.

    Raises:
        PlantationError: the card's ``target_prior`` has no matching
            ``train_prior`` (the probabilities' own mix is needed to divide out).
    """
    lp = torch.logsumexp(torch.log_softmax(member_logits, -1), 0) - np.log(member_logits.shape[0])
    if cal.loss_weights:
        lp = lp - torch.log(torch.as_tensor(cal.loss_weights, dtype=lp.dtype))
    lp = torch.log_softmax(lp / cal.temperature, -1)
    if cal.target_prior:
        k = lp.shape[-1]
        if len(cal.target_prior) != k or len(cal.train_prior) != k:
            raise PlantationError(
                f"calibration: target_prior ({len(cal.target_prior)} values) and train_prior ({len(cal.train_prior)}) must both have one value per outcome ({k}); re-export the model"
            )
        # Bayes' rule: posteriors under the sample's mix (train_prior) → under the region's (target_prior).
        shift = np.log(np.asarray(cal.target_prior, dtype=np.float64)) - np.log(np.asarray(cal.train_prior, dtype=np.float64))
        lp = torch.log_softmax(lp + torch.as_tensor(shift, dtype=lp.dtype), -1)
    return lp


def calibrated_mutual_information(member_logits: torch.Tensor, cal: Calibration) -> np.ndarray:
    """The epistemic term the maps carry (…,): mutual information (nats) between the outcome and the member, each member calibrated by ``cal`` like the mapped probabilities."""
    each = torch.stack([calibrated_log_probs(zm.unsqueeze(0), cal) for zm in member_logits]).exp()
    return mutual_information(each.numpy())


def build_network(spec: dict[str, Any]) -> ConvRecurrentNet:
    """A network from the constructor arguments stored in a card."""
    return ConvRecurrentNet(**spec)


def distilled_spec(card: ModelCard) -> dict[str, Any]:
    """Constructor arguments of the distilled network: the members' plus its epistemic output."""
    return {**card.network, "epistemic": True}


def save(folder: str | Path, card: ModelCard, members: list[ConvRecurrentNet], distilled: ConvRecurrentNet | None = None) -> Path:
    """Write ``model.safetensors`` and ``model.json`` into ``folder`` (each atomically)."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if (distilled is None) != (not card.distilled):
        raise PlantationError("a distilled network and the card's distilled record go together")
    tensors = {f"member{i}.{k}": v.detach().contiguous().clone() for i, m in enumerate(members) for k, v in m.state_dict().items()}
    if distilled is not None:
        tensors |= {f"distilled.{k}": v.detach().contiguous().clone() for k, v in distilled.state_dict().items()}
    tmp = folder / (WEIGHTS + ".partial")
    save_file(tensors, str(tmp), metadata={"format": FORMAT})
    digest = file_sha256(tmp)
    os.replace(tmp, folder / WEIGHTS)
    write_card(folder, replace(card, weights_sha256=digest))
    return folder


def file_sha256(path: Path) -> str:
    """sha256 (hex) of a file's bytes, read in blocks."""
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def verify_weights(folder: Path, card: ModelCard) -> None:
    """Check ``model.safetensors`` against the card's ``weights_sha256`` (a warning for a card without one, see the module docstring).

    Raises:
        FileFormatError: the bytes differ from those exported.
    """
    weights = folder / WEIGHTS
    if not card.weights_sha256:
        log.warning("%s: records no checksum of %s (a model exported before checksums); its weights are loaded unchecked, re-export it to add one", folder / CARD, WEIGHTS)
        return
    have = file_sha256(weights)
    if have != card.weights_sha256:
        raise FileFormatError(
            f"{weights}: sha256 {have[:12]}… is not the {card.weights_sha256[:12]}… recorded in {CARD}: the file was changed or replaced after export; re-export the model with `plantation train`"
        )


def load(folder: str | Path) -> Artefact:
    """Read an artefact folder written by :func:`save`.

    Raises:
        InputNotFoundError: a file is missing.
        FileFormatError: the card is not a plantation model card, the weights'
            sha256 differs from the card's, or they do not match it.
    """
    folder = Path(folder)
    meta, weights = folder / CARD, folder / WEIGHTS
    for f in (meta, weights):
        if not f.is_file():
            raise InputNotFoundError(f"{f.absolute()}: model file not found (export a model with `plantation train`)")
    card = read_card(folder)
    verify_weights(folder, card)
    try:
        tensors = load_file(str(weights))
    except Exception as exc:  # safetensors raises its own error type for a damaged file
        raise FileFormatError(f"{weights}: cannot read the weights ({str(exc).splitlines()[0]})") from None

    def build(spec: dict[str, Any], prefix: str, name: str) -> ConvRecurrentNet:
        try:
            net = build_network(spec)
        except (TypeError, ValueError) as exc:
            raise FileFormatError(f"{meta}: the network's settings do not build a network ({str(exc).splitlines()[0]}); re-export the model") from None
        state = {k[len(prefix) :]: v for k, v in tensors.items() if k.startswith(prefix)}
        try:
            net.load_state_dict(state)
        except RuntimeError as exc:
            raise PlantationError(f"{weights}: {name} does not match {meta.name} ({str(exc).splitlines()[0]})") from None
        return net.eval()

    members = [build(card.network, f"member{i}.", f"member {i}") for i in range(card.members)]
    distilled = build(distilled_spec(card), "distilled.", "the distilled network") if card.distilled else None
    return Artefact(card, members, distilled)
