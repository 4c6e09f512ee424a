"""The model folder's format: ``model.json`` (the card), ``validation.json``, and where a model folder is.

A model folder holds ``model.safetensors`` (the weights, read by
:mod:`plantation.model.artefact`), ``model.json`` (everything needed to build
the inputs and read the outputs: band roles, scaling rules, indices, dates and
years, the sensors of the training imagery, the network's constructor
arguments with normalisation statistics, the calibration, the cutoff year and
the package version) and, after training,
``validation.json`` (reliability and interval coverage on the held-out test
split). This module reads and writes the card and never imports torch, so the
assessment and the report can describe a model without loading it.
"""

from __future__ import annotations

import json
import os
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from plantation.errors import FileFormatError, InputNotFoundError, RegionError
from plantation.model.calibration import GROUP_NAMES, outcome_groups
from plantation.model.outcomes import mass_for_coverage

FORMAT = "plantation-model/2"
CARD = "model.json"
WEIGHTS = "model.safetensors"
VALIDATION = "validation.json"


@dataclass
class Calibration:
    """How member logits become calibrated outcome probabilities.

    p_sample = softmax((log mean_m softmax(z_m) − log w) / T), where ``w``
    are the per-outcome loss weights used in training (dividing them out
    restores the posteriors of the reference sample) and ``T`` is the
    temperature fitted on validation data. These are posteriors under the
    sample's outcome mix, ``train_prior`` (the training sample's outcome
    frequencies; the validation split the temperature is fitted on is drawn
    the same way).

    With a ``target_prior`` q (the region's outcome frequencies, see
    ``prior_source``), Bayes' rule moves them to the region's mix:
    p ∝ p_sample · q / train_prior (Saerens et al. 2002), i.e.
    p = softmax(log p_sample + log q − log train_prior). An empty
    ``target_prior`` (every card written before it existed) leaves
    p = p_sample.
    """

    temperature: float = 1.0
    loss_weights: list[float] = field(default_factory=list)
    train_prior: list[float] = field(default_factory=list)
    #: Split-conformal threshold on 1 − p(outcome) (None: not calibrated).
    conformal_qhat: float | None = None
    conformal_alpha: float | None = None
    #: The region's outcome frequencies the probabilities are shifted to (empty: none, the sample's mix).
    target_prior: list[float] = field(default_factory=list)
    #: Where ``target_prior`` came from: "sample" (none), "shares" (the region
    #: config's population shares), "inclusion" (Hájek estimate from the
    #: points' inclusion probabilities) or "bbse" (black-box shift estimation
    #: on the region's unlabelled pixels).
    prior_source: str = "sample"
    #: Interval masses and the share of held-out conversions (validation
    #: split, mapped as conversion) whose true year each one's interval held;
    #: empty: not measured (cards written before it existed), the interval
    #: then holds the nominal level of mass.
    interval_masses: list[float] = field(default_factory=list)
    interval_coverage: list[float] = field(default_factory=list)

    def interval_mass(self, level: float) -> float:
        """The year-interval mass to ask for so that the interval holds ``level`` of true years on held-out data (``level`` itself where not measured)."""
        return mass_for_coverage(self.interval_masses, self.interval_coverage, level)

    def prior(self) -> list[float]:
        """The outcome frequencies the calibrated probabilities refer to: ``target_prior``, else ``train_prior``."""
        return list(self.target_prior or self.train_prior)

    def prior_groups(self) -> dict[str, float]:
        """:meth:`prior` summed over the four label groups (empty when the card records no prior)."""
        p = self.prior()
        if len(p) < 4:
            return {}
        g = outcome_groups(len(p))
        return {name: round(sum(v for v, gi in zip(p, g, strict=True) if gi == i), 6) for i, name in enumerate(GROUP_NAMES)}

    def correction(self) -> dict[str, object]:
        """What the probabilities are corrected for, as recorded in maps and metrics: the prior's source and its label-group shares."""
        return {"prior": self.prior_source, "target_prior_groups": self.prior_groups()}


@dataclass
class ModelCard:
    """Metadata of an artefact (the content of ``model.json``)."""

    bands: list[str]
    indices: list[str]
    scaling: list[dict[str, Any]]
    dates: list[str]
    years: list[int]
    network: dict[str, Any]
    members: int
    calibration: Calibration
    cutoff_year: int
    interval_level: float
    region: str
    labels_fingerprint: str
    package_version: str
    #: The network distilled from the ensemble (empty: none): how it was
    #: trained and how closely it follows the ensemble on the validation
    #: split (see :mod:`plantation.model.distillation`).
    distilled: dict[str, Any] = field(default_factory=dict)
    #: The sensors of the training imagery's dates, sorted (``""``: a sensor
    #: nobody named); with more than one, the order of the network's sensor
    #: one-hot. Empty: not recorded (cards written before it existed), no check.
    sensors: list[str] = field(default_factory=list)
    #: The sensor the training imagery was adjusted to (``region.harmonise``),
    #: ``""`` for imagery as stored; None: not recorded (older cards), no check.
    harmonised_to: str | None = None
    #: sha256 (hex) of ``model.safetensors``, written by
    #: :func:`plantation.model.artefact.save` and checked by ``load``; ``""``:
    #: not recorded (cards written before it existed, see ``load``).
    weights_sha256: str = ""
    format: str = FORMAT


def _sensor_names(sensors: list[str] | set[str]) -> str:
    return "[" + ", ".join(s if s else "unnamed" for s in sorted(sensors)) + "]"


def check_sensors(card: ModelCard, sensors: list[str], where: str) -> None:
    """Refuse imagery with a sensor the model was not trained on (nothing is checked for a card that records none).

    Args:
        sensors: the sensor of each date of the imagery (``""``: unnamed).
        where: the culprit, first in the message (``tile 't01'``, ``region 'x'``).

    Raises:
        RegionError: a sensor not among ``card.sensors``, naming both lists.
    """
    if not card.sensors:
        return
    foreign = set(sensors) - set(card.sensors)
    if foreign:
        raise RegionError(
            f"{where}: sensor(s) {_sensor_names(foreign)} are not among the model's {_sensor_names(card.sensors)}; use imagery of the model's sensors (named by region.sensors) or train on these"
        )


def check_harmonisation(card: ModelCard, harmonised_to: str, where: str) -> None:
    """Refuse imagery adjusted to another sensor than the training imagery was (or adjusted where it was not, or the reverse).

    Raises:
        RegionError: naming both settings.
    """
    if card.harmonised_to is None or card.harmonised_to == harmonised_to:
        return
    have = f"adjusted to {harmonised_to}" if harmonised_to else "as stored (region.harmonise off)"
    want = f"adjusted to {card.harmonised_to}" if card.harmonised_to else "as stored (region.harmonise off)"
    raise RegionError(f"{where}: the imagery is read {have}, the model's was read {want}; set region.harmonise as it was for training")


def check_date_sensors(card: ModelCard, dates: list[str], sensors: list[str], where: str) -> None:
    """Refuse imagery whose sensor on some date differs from the training imagery's on that date, where the network reads each date's sensor (more than one sensor).

    Args:
        dates, sensors: the imagery's dates (the model's) and the sensor of each.

    Raises:
        RegionError: a date of another sensor, naming it.
    """
    check_sensors(card, sensors, where)
    index = card.network.get("date_sensor")
    if not index or len(card.sensors) < 2:
        return
    for d, s, i in zip(dates, sensors, index, strict=False):
        if s != card.sensors[int(i)]:
            have, want = s or "unnamed", card.sensors[int(i)] or "unnamed"
            raise RegionError(f"{where}: date {d} is {have}, the model was trained with {want} on that date; map imagery with the model's sensor on each date")


def first_difference(have: list[Any], want: list[Any]) -> str:
    """Where two lists first differ, in words: ``item 3 is 'nir' here, 'red' in the model`` (or which one is longer)."""
    for i, (a, b) in enumerate(zip(have, want, strict=False)):
        if a != b:
            return f"item {i + 1} is {a!r} here, {b!r} in the model"
    if len(have) != len(want):
        return f"{len(have)} here, {len(want)} in the model"
    return "none"


def check_bands(card: ModelCard, bands: list[str], where: str) -> None:
    """Refuse imagery whose band roles or band order differ from the training imagery's.

    Raises:
        RegionError: naming the first band that differs, both lists, and the fix.
    """
    if list(bands) != list(card.bands):
        raise RegionError(
            f"{where}: bands {list(bands)} are not the model's {card.bands} ({first_difference(list(bands), card.bands)}); list region.bands in the files' order with the model's band roles"
        )


def check_scaling(card: ModelCard, scaling: list[dict[str, Any]], where: str) -> None:
    """Refuse scaling rules (stored integers → reflectance) other than the training imagery's: they would shift every value the model sees.

    Raises:
        RegionError: naming the first rule and field that differ, with both values.
    """
    if scaling == card.scaling:
        return
    detail = first_difference(scaling, card.scaling)
    for i, (a, b) in enumerate(zip(scaling, card.scaling, strict=False)):
        if a != b:
            key = next((k for k in sorted(set(a) | set(b)) if a.get(k) != b.get(k)), "")
            detail = f"rule {i + 1} has {key} {a.get(key)!r} here, {b.get(key)!r} in the model"
            break
    raise RegionError(f"{where}: scaling rules differ from the model's ({detail}); map with the rules the model was trained with (region.scaling)")


def resolve_model(path: str | Path) -> Path:
    """The artefact folder of a training run folder (``<run>/model``) or of an artefact folder itself.

    Raises:
        InputNotFoundError: neither holds a ``model.json``.
    """
    p = Path(path)
    for cand in (p, p / "model"):
        if (cand / "model.json").is_file():
            return cand
    raise InputNotFoundError(f"{p.absolute()}: no model here (expected a training run folder with model/model.json, or a folder with model.json); train one with `plantation train`")


def write_card(folder: str | Path, card: ModelCard) -> Path:
    """Write ``model.json`` into ``folder`` atomically."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    tmp = folder / (CARD + ".partial")
    tmp.write_text(json.dumps(asdict(card), indent=2))
    os.replace(tmp, folder / CARD)
    return folder / CARD


def read_card(folder: str | Path) -> ModelCard:
    """Read ``model.json`` of a model folder.

    Raises:
        InputNotFoundError: there is no ``model.json``.
        PlantationError: the file is not valid JSON, not a plantation model
            card, or incomplete.
    """
    meta = Path(folder) / CARD
    if not meta.is_file():
        raise InputNotFoundError(f"{meta.absolute()}: model file not found (export a model with `plantation train`)")
    try:
        raw = json.loads(meta.read_bytes().decode("utf-8"))
    except UnicodeDecodeError as exc:
        # A binary file in the card's place (a pickle, say) is data to refuse, never to run.
        raise FileFormatError(f"{meta}: not a model card (byte {exc.start} is not UTF-8 text; the file is binary); re-export the model with `plantation train`") from None
    except json.JSONDecodeError as exc:
        raise FileFormatError(f"{meta}: not valid JSON ({exc.msg}, line {exc.lineno})") from None
    if not isinstance(raw, dict) or raw.get("format") != FORMAT:
        got = raw.get("format") if isinstance(raw, dict) else None
        raise FileFormatError(f"{meta}: format {got!r}, expected {FORMAT!r}")
    try:
        raw["calibration"] = Calibration(**raw["calibration"])
        card = ModelCard(**raw)
    except (TypeError, KeyError) as exc:
        raise FileFormatError(f"{meta}: not a complete model card ({exc})") from None
    kinds = {"bands": list, "indices": list, "scaling": list, "dates": list, "years": list, "network": dict, "members": int, "weights_sha256": str}
    wrong = [k for k, t in kinds.items() if not isinstance(getattr(card, k), t)]
    if wrong:
        raise FileFormatError(f"{meta}: {wrong[0]} is a {type(getattr(card, wrong[0])).__name__}, expected a {kinds[wrong[0]].__name__}; re-export the model")
    return card


def write_validation(folder: str | Path, record: dict[str, Any]) -> Path:
    """Write ``validation.json`` (held-out reliability and coverage) into a model folder atomically."""
    path = Path(folder) / VALIDATION
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text(json.dumps(record, indent=1))
    os.replace(tmp, path)
    return path


def read_validation(folder: str | Path) -> dict[str, Any] | None:
    """``validation.json`` of a model folder, or None where training wrote none.

    Raises:
        PlantationError: the file exists but is not valid JSON.
    """
    path = Path(folder) / VALIDATION
    if not path.is_file():
        return None
    try:
        return json.loads(path.read_text())
    except json.JSONDecodeError as exc:
        raise FileFormatError(f"{path}: not valid JSON ({exc.msg}, line {exc.lineno})") from None
