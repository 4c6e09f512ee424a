"""Retraining as labels and years grow: ``plantation retrain parent=<run> labels=<grown labels>``.

The job behind ``plantation retrain``:

1. reads the parent run's labelled points (``points.csv``) and the grown
   label file, and says what changed: points added, removed, moved and
   relabelled, matched by location (:mod:`plantation.reference.diff`);
2. cuts the samples with the parent's splits kept: every point the parent
   had keeps its split, a new point takes its spatial block's, and a new
   point whose neighbourhood would touch a point of another split is left
   out (:func:`plantation.model.patches.spatial_split`);
3. starts from the parent's weights (``retrain.start=warm``, the default) or
   from random ones (``afresh``). When the region has gained years since the
   parent, the warm start extends the parent's networks to them: every weight
   is shared across years, so the new year's outcome is scored by what the
   other years taught (:mod:`plantation.model.transfer`); a short fine-tune
   on the grown labels follows. The calibration is fitted afresh;
4. scores the parent and the new model on the same test points, the
   parent's, with the grown file's labels, and says whether each difference
   is larger than seed-to-seed noise: the spread between single networks
   trained from different seeds (the ensemble's members), two standard
   deviations by default;
5. writes the new run folder like ``plantation train``, with
   ``lineage.json`` naming its parent, the parent model's digest, the label
   changes and the comparison. ``plantation runs`` lists runs side by side.
"""

from __future__ import annotations

import re
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field, fields, replace
from pathlib import Path
from typing import Any

import numpy as np
from omegaconf import MISSING

from plantation.errors import ConfigError, InputNotFoundError
from plantation.model import artefact as art_io
from plantation.model import runs
from plantation.model.card import check_bands, check_harmonisation, check_scaling, check_sensors, read_card, resolve_model
from plantation.model.config import CalibrationConfig
from plantation.model.network import ConvRecurrentNet
from plantation.model.outcomes import Outcomes
from plantation.model.patches import PatchSet
from plantation.model.training import Start, TrainConfig, TrainedModel, check_config, load_region_samples, network_spec, score_samples
from plantation.model.training import run as train_run
from plantation.model.transfer import transfer_spec
from plantation.reference.diff import diff_labels

#: Test-split scores compared between a run and its parent (higher is better except nll).
COMPARED: tuple[str, ...] = ("label_accuracy", "year_exact", "nll")
START_MODES: tuple[str, ...] = ("warm", "afresh")


@dataclass
class RetrainSettings:
    """Schema of the ``retrain:`` block of ``configs/retrain.yaml``."""

    start: str = "warm"
    max_epochs: int = 15
    patience: int = 4
    lr: float = 1e-3
    distillation_max_epochs: int = 6
    move_px: float = 3.0
    noise_sds: float = 2.0


@dataclass
class RetrainConfig(TrainConfig):
    """Schema of ``configs/retrain.yaml``: the training config, the parent run and the grown labels."""

    parent: str = MISSING
    labels: str | None = None
    retrain: RetrainSettings = field(default_factory=RetrainSettings)


def next_run_name(parent: str) -> str:
    """``<name>_v<k+1>`` for a parent called ``<name>_v<k>``, else ``<parent>_v2``."""
    m = re.fullmatch(r"(.*)_v(\d+)", parent)
    return f"{m.group(1)}_v{int(m.group(2)) + 1}" if m else f"{parent}_v2"


def check_retrain(cfg: RetrainConfig) -> None:
    r = cfg.retrain
    if r.start not in START_MODES:
        raise ConfigError(f"retrain.start: {r.start!r} is not one of {list(START_MODES)}")
    for key, val in (("retrain.max_epochs", r.max_epochs), ("retrain.patience", r.patience), ("retrain.distillation_max_epochs", r.distillation_max_epochs)):
        if val < 1:
            raise ConfigError(f"{key}: {val!r} must be at least 1")
    if r.lr <= 0 or r.move_px < 0 or r.noise_sds <= 0:
        raise ConfigError(f"retrain: lr ({r.lr}) and noise_sds ({r.noise_sds}) must be above 0, move_px ({r.move_px}) at least 0")


def _scores(nets: list[ConvRecurrentNet], cal: Any, s: PatchSet, cc: CalibrationConfig, batch: int) -> dict[str, float]:
    got = score_samples(nets, cal, s, cc, batch=batch)
    return {k: float(got[k]) for k in COMPARED}


def compare_models(old: art_io.Artefact, new_members: list[ConvRecurrentNet], new_cal: Any, points: PatchSet, cc: CalibrationConfig, *, noise_sds: float = 2.0, batch: int) -> dict[str, Any]:
    """The parent's and the new model's test scores on the same points, and whether each difference exceeds seed-to-seed noise.

    Both are scored with the probabilities of the label sample's mix (the
    region prior left out, as in ``metrics.json``), the parent on its own
    dates. Points labelled with a year the parent does not know (a year added
    since) are left out of both. Seed-to-seed noise is the pooled standard
    deviation of the single members' scores of the two models; a difference
    larger than ``noise_sds`` of them is called better or worse.

    Args:
        points: the fixed test points with the grown file's labels, on the new series.
        batch: points through the networks at once (the run's inference batch, within its memory budget).
    """
    card = old.card
    old_dates = np.asarray(card.dates, dtype="datetime64[D]")
    idx = np.flatnonzero(np.isin(points.dates, old_dates))
    if len(idx) != len(old_dates):
        missing = sorted(set(card.dates) - {str(d) for d in points.dates})
        raise ConfigError(f"retrain: the parent's dates {missing[:3]} are no longer in the region's imagery; compare on the same imagery or train afresh")
    old_outcomes = Outcomes(tuple(int(y) for y in card.years))
    known = points.target < old_outcomes.size
    mine = points.subset(known)
    theirs = replace(mine, x=mine.x[:, idx], valid=mine.valid[:, idx], dates=points.dates[idx], outcomes=old_outcomes, sensors=tuple(np.asarray(points.sensors)[idx]) if points.sensors else ())
    old_cal = replace(card.calibration, target_prior=[])
    new_cal = replace(new_cal, target_prior=[])
    out: dict[str, Any] = {"points": int(known.sum()), "left_out_new_years": int((~known).sum()), "noise_sds": noise_sds, "metrics": {}}
    if not known.any():
        out["note"] = "no fixed test point to compare on"
        return out
    old_all = _scores(old.members, old_cal, theirs, cc, batch)
    new_all = _scores(new_members, new_cal, mine, cc, batch)
    old_each = [_scores([m], old_cal, theirs, cc, batch) for m in old.members]
    new_each = [_scores([m], new_cal, mine, cc, batch) for m in new_members]
    for k in COMPARED:
        diff = new_all[k] - old_all[k]
        rec: dict[str, Any] = {"parent": round(old_all[k], 4), "new": round(new_all[k], 4), "difference": round(diff, 4)}
        a, b = [e[k] for e in old_each], [e[k] for e in new_each]
        if len(a) >= 2 and len(b) >= 2:
            sd = float(np.sqrt((np.var(a, ddof=1) + np.var(b, ddof=1)) / 2))
            rec["seed_sd"] = round(sd, 4)
            better = diff < 0 if k == "nll" else diff > 0
            rec["verdict"] = ("better" if better else "worse") if abs(diff) > noise_sds * sd else "within seed-to-seed noise"
        else:
            rec["verdict"] = "noise unknown (one member; train with network.members of 2 or more)"
        out["metrics"][k] = rec
    return out


def comparison_lines(comp: dict[str, Any]) -> list[str]:
    """The comparison as printed."""
    lines = [f"parent and new model on the same {comp['points']} test points (labels of the grown file; {comp['left_out_new_years']} labelled in years the parent lacks left out):"]
    for k, r in comp.get("metrics", {}).items():
        noise = f", seed-to-seed sd {r['seed_sd']}" if "seed_sd" in r else ""
        lines.append(f"  {k:<15} parent {r['parent']:.4f}  new {r['new']:.4f}  difference {r['difference']:+.4f}{noise}: {r['verdict']}")
    if "note" in comp:
        lines.append(f"  {comp['note']}")
    return lines


@dataclass
class RetrainResult:
    folder: Path
    start: str
    diff_lines: list[str]
    comparison: dict[str, Any]
    seconds: float

    def lines(self) -> list[str]:
        return [
            *self.diff_lines,
            f"start: {self.start} ({self.seconds:.0f} s)",
            *comparison_lines(self.comparison),
            f"run written to {self.folder} (lineage.json names its parent; `plantation runs` lists runs)",
        ]


def training_config(cfg: RetrainConfig, *, warm: bool) -> TrainConfig:
    """The training part of a retrain config, with the short fine-tune's settings on a warm start."""
    tc = TrainConfig(**{f.name: getattr(cfg, f.name) for f in fields(TrainConfig)})
    if cfg.labels:
        tc = replace(tc, region=replace(tc.region, labels=replace(tc.region.labels, path=cfg.labels)))
    if not tc.run_name:
        tc = replace(tc, run_name=next_run_name(Path(cfg.parent).name))
    return fine_tune(tc, cfg.retrain) if warm else tc


def fine_tune(tc: TrainConfig, r: RetrainSettings) -> TrainConfig:
    """``tc`` with the warm start's short fine-tune: ``r``'s epochs, patience and learning rate."""
    return replace(
        tc,
        training=replace(tc.training, max_epochs=r.max_epochs, patience=r.patience, lr=r.lr),
        distillation=replace(tc.distillation, max_epochs=min(tc.distillation.max_epochs, r.distillation_max_epochs)),
    )


def run(cfg: RetrainConfig, resolved_config: str | None = None, echo: Callable[[str], None] = print) -> RetrainResult:
    """Retrain from a parent run on grown labels (and imagery); see the module docstring."""
    check_retrain(cfg)
    parent = Path(cfg.parent)
    model_dir = resolve_model(parent)
    if model_dir == parent:
        raise InputNotFoundError(f"{parent.absolute()}: parent= needs a training run folder (with model/, points.csv and lineage.json), not a model folder")
    card = read_card(model_dir)
    if card.region != cfg.region.name:
        raise ConfigError(f"parent: {parent} was trained on region {card.region!r}, not {cfg.region.name!r}; give region={card.region} (its file, with the grown imagery)")
    # Before the samples are read: a parent whose inputs differ, or whose files were changed, is refused at once.
    where = f"region {cfg.region.name!r}"
    check_bands(card, list(cfg.region.bands), where)
    check_scaling(card, [asdict(r) for r in cfg.region.scaling], where)
    old = art_io.load(model_dir)
    warm = cfg.retrain.start == "warm"
    tc = training_config(cfg, warm=warm)
    check_config(tc)
    if (Path(tc.out_dir) / tc.run_name).resolve() == parent.resolve():
        raise ConfigError(f"run_name: {tc.run_name!r} would replace the parent run; choose another")
    old_points = runs.read_points(parent)
    inherit = runs.split_of_points(old_points) if old_points is not None else None
    loaded = load_region_samples(tc, inherit=inherit)
    stacks, labels, samples = loaded
    check_sensors(card, stacks[0].date_sensors(), f"region {cfg.region.name!r}")
    check_harmonisation(card, stacks[0].harmonised_to, f"region {cfg.region.name!r}")
    if old_points is not None:
        pixel = abs(stacks[0].grid.transform.a)
        diff = diff_labels(old_points, labels.points, move_px=cfg.retrain.move_px, pixel_size=pixel)
        diff_lines, changes = diff.lines(), diff.record()
    else:
        diff_lines, changes = [f"{parent}: no points.csv (a run older than retraining): label changes unknown, splits not kept"], {}
    for line in diff_lines:
        echo(line)
    years = [int(y) for y in samples.outcomes.years]
    kind, start = "afresh", None
    if warm:
        spec = transfer_spec(card.network, network_spec(samples, tc), parent_years=list(card.years), child_years=years)
        kind = "extended" if len(years) > len(card.years) else "warm"
        start = Start(spec=spec, members=[m.state_dict() for m in old.members], distilled=old.distilled.state_dict() if old.distilled is not None else None)
        if kind == "extended":
            echo(f"the series grew from {card.years[0]}-{card.years[-1]} to {years[0]}-{years[-1]}: the parent's networks are extended to the new years and fine-tuned")
    parent_test = {k for k, s in (inherit or {}).items() if s == 2}
    comparison: dict[str, Any] = {}

    def after_fit(s: PatchSet, trained: TrainedModel) -> dict[str, Any]:
        keys = list(zip(s.tile, s.row.tolist(), s.col.tolist(), strict=True))
        fixed = np.array([(str(t), r, c) in parent_test for t, r, c in keys]) if parent_test else s.split == 2
        comparison.update(compare_models(old, trained.members, trained.calibration, s.subset(fixed), tc.calibration, noise_sds=cfg.retrain.noise_sds, batch=trained.inference_batch))
        comparison["test_points"] = "the parent's test split" if parent_test else "this run's test split (the parent predates points.csv)"
        return {"comparison": comparison}

    lineage = {
        "start": kind,
        "parent": str(parent.resolve()),
        "parent_model_sha256": runs.model_digest(parent),
        "parent_labels_fingerprint": card.labels_fingerprint,
        "label_changes": changes,
        "settings": {"max_epochs": tc.training.max_epochs, "lr": tc.training.lr} if warm else {},
    }
    t0 = time.perf_counter()
    folder = train_run(tc, resolved_config, start=start, inherit=inherit, lineage=lineage, after_fit=after_fit, loaded=loaded)
    return RetrainResult(folder, kind, diff_lines, comparison, time.perf_counter() - t0)
