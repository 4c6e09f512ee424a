"""Training: samples → a calibrated ensemble of networks → an exported artefact.

``run(cfg)`` is the whole job behind ``plantation train``:

1. open the region and its labels, build neighbourhood samples and the
   spatial train / validation / test split (:mod:`plantation.model.patches`);
2. train ``network.members`` networks from different seeds (a small deep
   ensemble, Lakshminarayanan et al. 2017), each with early stopping on the
   validation loss;
3. fit the temperature on the validation split and, optionally, a
   split-conformal threshold on it (:mod:`plantation.model.calibration`);
4. score the test split;
5. choose the class mix the exported probabilities are for
   (``calibration.prior``, :func:`target_prior`) and write the run folder.

Class imbalance: each outcome's loss weight is (n_outcome)^−½, normalised
to mean one over the samples, so rare years and classes count more without
letting a handful of points dominate. The weights are divided back out before
calibration, so probabilities refer to the sample's frequencies; the
exported card then shifts them to the region's mix where one is known
(``calibration.prior``). The test metrics and ``validation.json`` describe
the sample-mix probabilities on the (stratified) held-out points.

Label noise: ``training.loss=gce`` (generalised cross-entropy, Zhang &
Sabuncu 2018) or ``sce`` (symmetric cross-entropy, Wang et al. 2019) bound the
pull of a mislabelled point (:mod:`plantation.model.losses`); ``ce`` (the
default) is plain cross-entropy. ``surrogate.pixels`` adds pixels labelled by
a rule on the imagery (:mod:`plantation.reference.rule`) to the training
split, each weighing ``surrogate.weight`` in the loss.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import random
import shutil
import time
import warnings
from collections.abc import Callable, Iterator, Sequence
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import lightning as L
import numpy as np
import pandas as pd
import torch
from torch.utils.data import ConcatDataset, DataLoader, TensorDataset

from plantation import __version__
from plantation.errors import ConfigError, FileFormatError
from plantation.imagery.config import LabelsConfig, RegionConfig, check_labels_config, population_shares
from plantation.imagery.region import TileStack, harmonised_to, open_region
from plantation.model import calibration, runs
from plantation.model.artefact import calibrated_log_probs
from plantation.model.artefact import save as save_artefact
from plantation.model.card import Calibration, ModelCard, write_validation
from plantation.model.config import CalibrationConfig, DistillationConfig, NetworkConfig, PatchConfig, SplitConfig, SurrogateConfig, TrainerConfig, TrainingConfig
from plantation.model.distillation import DistillationTask, agreement
from plantation.model.losses import per_sample_loss
from plantation.model.memory import VALIDATION_BATCH, TrainingBudget, fit_training_budget
from plantation.model.network import ConvRecurrentNet
from plantation.model.outcomes import MASS_GRID, N_STATIC, Outcomes, group_probabilities, interval_coverage_curve, summarise
from plantation.model.patches import SPLITS, PatchSet, build_patches, day_of_year_fraction, features, read_patches, windows_touch, year_of
from plantation.model.task import SeriesTask
from plantation.model.transfer import carry_weights
from plantation.reference.labels import LABEL_CODES, LabelSet, read_labels
from plantation.reference.rule import draw_rule_labels

log = logging.getLogger(__name__)

#: Values of ``training.loss`` (:mod:`plantation.model.losses`; ``forward`` needs a transition matrix a config cannot give).
TRAINING_LOSSES: tuple[str, ...] = ("ce", "gce", "sce")

#: Values of ``calibration.prior`` besides ``auto`` (see :func:`resolve_prior`).
PRIORS: tuple[str, ...] = ("sample", "shares", "inclusion", "bbse")


@dataclass
class TrainConfig:
    """Schema of ``configs/train.yaml``."""

    region: RegionConfig = field(default_factory=RegionConfig)
    patches: PatchConfig = field(default_factory=PatchConfig)
    split: SplitConfig = field(default_factory=SplitConfig)
    network: NetworkConfig = field(default_factory=NetworkConfig)
    training: TrainingConfig = field(default_factory=TrainingConfig)
    trainer: TrainerConfig = field(default_factory=TrainerConfig)
    calibration: CalibrationConfig = field(default_factory=CalibrationConfig)
    distillation: DistillationConfig = field(default_factory=DistillationConfig)
    surrogate: SurrogateConfig = field(default_factory=SurrogateConfig)
    out_dir: str = "outputs/train"
    run_name: str = "run"
    #: Continue an interrupted run of the same name and inputs (see :func:`prepare_resume`); false: start afresh.
    resume: bool = True
    #: Peak resident memory of a training process, MB (None: no budget); see :func:`plantation.model.memory.fit_training_budget`.
    memory_budget_mb: int | None = None


def check_config(cfg: TrainConfig) -> None:
    """Reject values no training could use, naming the key."""
    t = cfg.training
    if t.loss not in TRAINING_LOSSES:
        raise ConfigError(f"training.loss: {t.loss!r} is not one of {list(TRAINING_LOSSES)}")
    if not (t.sce_alpha >= 0 and t.sce_beta >= 0 and t.sce_alpha + t.sce_beta > 0):
        raise ConfigError(f"training.sce_alpha, training.sce_beta: ({t.sce_alpha!r}, {t.sce_beta!r}) must be at least 0 and not both 0")
    if t.class_weighting not in ("inverse_sqrt", "none"):
        raise ConfigError(f"training.class_weighting: {t.class_weighting!r} is not one of ['inverse_sqrt', 'none']")
    if not 0 < t.gce_q <= 1:
        raise ConfigError(f"training.gce_q: {t.gce_q!r} must be in (0, 1]")
    if not 0 <= t.date_dropout < 1:
        raise ConfigError(f"training.date_dropout: {t.date_dropout!r} must be in [0, 1)")
    d = cfg.distillation
    if d.pixels < 0 or d.lr <= 0 or d.epistemic_weight < 0 or d.tolerance <= 0:
        raise ConfigError(f"distillation: pixels ({d.pixels}) and epistemic_weight ({d.epistemic_weight}) must be at least 0, lr ({d.lr}) and tolerance ({d.tolerance}) above 0")
    for key, val in (
        ("training.max_epochs", t.max_epochs),
        ("training.batch_size", t.batch_size),
        ("training.inference_batch", t.inference_batch),
        ("network.members", cfg.network.members),
        ("network.hidden", cfg.network.hidden),
        ("network.date_width", cfg.network.date_width),
        ("network.conv_width", cfg.network.conv_width),
        ("distillation.max_epochs", d.max_epochs),
        ("distillation.patience", d.patience),
    ):
        if val < 1:
            raise ConfigError(f"{key}: {val!r} must be at least 1")
    if not 0 < cfg.calibration.interval_level < 1:
        raise ConfigError(f"calibration.interval_level: {cfg.calibration.interval_level!r} must be in (0, 1)")
    a = cfg.calibration.conformal_alpha
    if a is not None and not 0 < a < 1:
        raise ConfigError(f"calibration.conformal_alpha: {a!r} must be in (0, 1) or null")
    check_labels_config(cfg.region.labels)
    resolve_prior(cfg.calibration, cfg.region.labels)
    if cfg.memory_budget_mb is not None and cfg.memory_budget_mb < 1:
        raise ConfigError(f"memory_budget_mb: {cfg.memory_budget_mb!r} must be at least 1, or null for no budget")
    if cfg.calibration.bbse_pixels < 1:
        raise ConfigError(f"calibration.bbse_pixels: {cfg.calibration.bbse_pixels!r} must be at least 1")


def resolve_prior(cc: CalibrationConfig, lc: LabelsConfig) -> str:
    """The prior source ``calibration.prior`` stands for: ``auto`` becomes shares, else inclusion, by what the region's labels config gives, else bbse.

    Without either, ``auto`` estimates the region's mix from its own pixels
    (``bbse``) rather than keeping the sample's: reference samples are
    rarely drawn in proportion to area, and a sample's mix in every pixel's
    probability is the error that hurts most (forest given conversion
    probability it does not have).

    Raises:
        ConfigError: an unknown value, or ``shares`` / ``inclusion`` without
            the region key it needs.
    """
    p = cc.prior
    if p == "auto":
        return "shares" if population_shares(lc) else "inclusion" if lc.inclusion_column else "bbse"
    if p not in PRIORS:
        raise ConfigError(f"calibration.prior: {p!r} is not one of {['auto', *PRIORS]}")
    if p == "shares" and not population_shares(lc):
        raise ConfigError("calibration.prior: 'shares' needs region.labels.population_shares (each label group's share of the region's area)")
    if p == "inclusion" and not lc.inclusion_column:
        raise ConfigError("calibration.prior: 'inclusion' needs region.labels.inclusion_column (the labels file's column of inclusion probabilities)")
    return p


def outcome_weights(targets: np.ndarray, n_outcomes: int, scheme: str) -> np.ndarray:
    """Per-outcome loss weights (float64, (n_outcomes,)), mean one over ``targets``.

    ``inverse_sqrt``: w ∝ n^−½ (outcomes absent from the sample get the
    weight of a single sample); ``none``: all ones.
    """
    if scheme == "none":
        return np.ones(n_outcomes)
    n = np.bincount(targets, minlength=n_outcomes).astype(np.float64)
    w = 1.0 / np.sqrt(np.maximum(n, 1.0))
    return w / (w[targets].mean())


def feature_statistics(samples: PatchSet) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard deviation per channel over valid observations (float64)."""
    x = np.moveaxis(samples.x, 2, -1)  # (n, t, k, k, c)
    v = samples.valid
    vals = x[v]
    mean = np.nanmean(vals, 0)
    std = np.nanstd(vals, 0)
    return mean, np.where(std > 1e-6, std, 1.0)


class ConversionTask(SeriesTask):
    """Loss, optimiser and augmentation around a :class:`ConvRecurrentNet`.

    Built from plain values (``net`` holds the network's constructor
    arguments), so a checkpoint reloads with ``load_from_checkpoint`` alone.
    """

    def __init__(
        self,
        net: dict[str, Any],
        *,
        loss_weights: list[float],
        lr: float = 3e-3,
        weight_decay: float = 1e-4,
        loss: str = "ce",
        gce_q: float = 0.7,
        sce_alpha: float = 0.1,
        sce_beta: float = 1.0,
        augment: bool = True,
        date_dropout: float = 0.1,
        max_epochs: int = 40,
    ) -> None:
        super().__init__()
        self.save_hyperparameters()
        self.net = ConvRecurrentNet(**net)
        self.register_buffer("loss_weights", torch.as_tensor(loss_weights, dtype=torch.float32))

    def forward(self, x: torch.Tensor, valid: torch.Tensor) -> torch.Tensor:
        return self.net(x, valid)

    def settings(self) -> tuple[float, float, int, float]:
        h = self.hparams
        return h["lr"], h["weight_decay"], h["max_epochs"], h["date_dropout"]

    def _loss(self, logits: torch.Tensor, y: torch.Tensor, sample_weight: torch.Tensor | None = None) -> torch.Tensor:
        h = self.hparams
        w = self.loss_weights[y]
        if sample_weight is not None:
            w = w * sample_weight
        per = per_sample_loss(h["loss"], logits, y, gce_q=h["gce_q"], sce_alpha=h.get("sce_alpha", 0.1), sce_beta=h.get("sce_beta", 1.0))
        return (w * per).sum() / w.sum()

    def step(self, batch: tuple[torch.Tensor, ...], stage: str) -> torch.Tensor:
        x, valid, y, sample_weight = batch
        if stage == "train" and self.hparams["augment"]:
            x, valid = self.augment(x, valid)
        logits = self.net(x, valid)
        loss = self._loss(logits, y, sample_weight)
        acc = (logits.argmax(-1) == y).float().mean()
        self.log(f"{stage}_loss", loss, prog_bar=True, on_epoch=True, on_step=False, batch_size=len(y), sync_dist=True)
        self.log(f"{stage}_acc", acc, prog_bar=stage == "val", on_epoch=True, on_step=False, batch_size=len(y), sync_dist=True)
        return loss


class SampleDataModule(L.LightningDataModule):
    """Pre-built tensors of the train and validation splits (the parts themselves, not copies: the samples are the largest arrays a training holds).

    ``num_workers`` is 0 on purpose: the samples are already in memory and a
    worker process per loader costs more than it saves for a model this small.
    """

    def __init__(self, train: PatchSet, val: PatchSet, batch_size: int) -> None:
        super().__init__()
        self.train, self.val = train, val
        self.batch_size = batch_size

    @staticmethod
    def tensors(s: PatchSet) -> TensorDataset:
        return TensorDataset(torch.from_numpy(s.x), torch.from_numpy(s.valid), torch.from_numpy(s.target), torch.from_numpy(s.weight_or_ones()))

    def train_dataloader(self) -> DataLoader:
        return DataLoader(self.tensors(self.train), batch_size=self.batch_size, shuffle=True, drop_last=True)

    def val_dataloader(self) -> DataLoader:
        # Fixed, not the inference batch: the validation loss picks the epoch kept, and a batch from measured memory must not change it.
        return DataLoader(self.tensors(self.val), batch_size=VALIDATION_BATCH)


def network_spec(samples: PatchSet, cfg: TrainConfig) -> dict[str, Any]:
    """Constructor arguments of the network (plain lists and numbers, for JSON and checkpoints)."""
    mean, std = feature_statistics(samples.part("train"))
    years = year_of(samples.dates)
    sensors = trained_sensors(samples)
    # One sensor: no sensor input, the network of a single-sensor region is the one built before sensors existed.
    by_sensor: dict[str, Any] = {"n_sensors": len(sensors), "date_sensor": [sensors.index(s) for s in samples.sensors]} if len(sensors) > 1 else {}
    return {
        "n_channels": len(samples.channels),
        "date_year": (years - years.min()).tolist(),
        "day_of_year": [float(v) for v in day_of_year_fraction(samples.dates)],
        "neighbourhood": cfg.patches.neighbourhood,
        "date_width": cfg.network.date_width,
        "amplitude": cfg.network.amplitude,
        "conv_width": cfg.network.conv_width,
        "hidden": cfg.network.hidden,
        "dropout": cfg.network.dropout,
        "mean": [float(v) for v in mean],
        "std": [float(v) for v in std],
        **by_sensor,
    }


def trained_sensors(samples: PatchSet) -> list[str]:
    """The sensors of the samples' dates, sorted (the card's ``sensors``, the order of the network's sensor one-hot); empty where unknown."""
    return sorted(set(samples.sensors))


def member_logits(nets: list[ConvRecurrentNet], s: PatchSet, batch: int = 512) -> torch.Tensor:
    """(members, n, outcomes) logits of samples, networks in eval mode."""
    out = []
    with torch.inference_mode():
        for net in nets:
            net.eval()
            parts = [net(torch.from_numpy(s.x[i : i + batch]), torch.from_numpy(s.valid[i : i + batch])) for i in range(0, len(s), batch)]
            out.append(torch.cat(parts))
    return torch.stack(out)


class RandomState(L.Callback):
    """Keeps the random generators' states in every checkpoint, so a fit resumed from one draws the batches and augmentation an uninterrupted fit would have.

    Lightning restores weights, optimiser, schedule, early stopping and the
    epoch, but not the generators; without them a resumed member would shuffle
    and augment differently from the epoch it resumes at. Stored as tensors
    and plain values, so the checkpoint loads with ``weights_only=True``.
    """

    def state_dict(self) -> dict[str, Any]:
        kind, keys, pos, has_gauss, gauss = np.random.get_state()
        return {
            "torch": torch.get_rng_state(),
            "numpy": {"kind": str(kind), "keys": torch.from_numpy(np.asarray(keys, dtype=np.int64)), "pos": int(pos), "has_gauss": int(has_gauss), "gauss": float(gauss)},
            "python": random.getstate(),
        }

    def load_state_dict(self, state_dict: dict[str, Any]) -> None:
        torch.set_rng_state(state_dict["torch"])
        n = state_dict["numpy"]
        np.random.set_state((n["kind"], n["keys"].numpy().astype(np.uint32), n["pos"], n["has_gauss"], n["gauss"]))
        random.setstate(state_dict["python"])


def last_checkpoint(folder: Path, name: str) -> Path:
    """The checkpoint of the last finished epoch of a fit named ``name`` (``member<i>``, ``distilled``), which a resumed run continues from."""
    return folder / "checkpoints" / f"{name}-last.ckpt"


def make_trainer(cfg: TrainerConfig, max_epochs: int, patience: int, folder: Path, name: str) -> L.Trainer:
    """A Lightning trainer with early stopping, a best-validation checkpoint and a last-epoch one (:func:`last_checkpoint`)."""
    from lightning.pytorch.callbacks import EarlyStopping, ModelCheckpoint
    from lightning.pytorch.loggers import CSVLogger

    # Lightning's start-up notes (no GPU, logger tips) are noise on a CPU tool.
    for logger in ("lightning.pytorch", "lightning.fabric"):
        logging.getLogger(logger).setLevel(logging.WARNING)
    ckpt = ModelCheckpoint(dirpath=folder / "checkpoints", filename=name, monitor="val_loss", mode="min", save_top_k=1, save_last=True, enable_version_counter=False)
    # Members share one folder: each keeps its own last checkpoint (Lightning's default name, "last", is one for all).
    ckpt.CHECKPOINT_NAME_LAST = last_checkpoint(folder, name).stem
    strategy: Any = cfg.strategy
    if strategy == "ddp":
        from lightning.pytorch.strategies import DDPStrategy

        strategy = DDPStrategy(process_group_backend="gloo")
    return L.Trainer(
        accelerator=cfg.accelerator,
        devices=cfg.devices,
        num_nodes=cfg.num_nodes,
        strategy=strategy,
        precision=cfg.precision,  # type: ignore[arg-type]
        max_epochs=max_epochs,
        callbacks=[ckpt, EarlyStopping(monitor="val_loss", mode="min", patience=patience), RandomState()],
        logger=CSVLogger(folder, name="logs", version=name),
        enable_progress_bar=cfg.enable_progress_bar,
        enable_model_summary=False,
        log_every_n_steps=cfg.log_every_n_steps,
        limit_train_batches=cfg.limit_train_batches,
        deterministic=True,
    )


#: The record of a run folder's resumable state: the inputs' key and the fits already finished (``checkpoints/resume.json``).
RESUME = "resume.json"
RESUME_FORMAT = "plantation-resume/1"
#: Keys that do not change what a training computes: a rerun that changes only these may resume (other
#: threads or another inference batch may change the last bits of some float sums, so such a resume is not promised bit-identical).
NOT_CONTENT: tuple[str, ...] = ("out_dir", "run_name", "resume", "trainer.enable_progress_bar", "trainer.log_every_n_steps", "training.threads", "training.inference_batch", "memory_budget_mb")


def rank() -> int:
    """This process's rank among DDP's processes (0 for a single process; the processes Lightning starts set the variables)."""
    return int(os.environ.get("LOCAL_RANK", "0")) + int(os.environ.get("NODE_RANK", "0"))


def usable_cores() -> int:
    """Cores this process may run on (a container's CPU set or ``taskset`` can make them fewer than the machine's)."""
    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)


def threads_per_process(threads: int, processes: int, cores: int | None = None) -> int:
    """Torch threads for each training process on this machine.

    ``threads`` > 0 is taken as asked, but capped at cores ÷ processes when
    several processes share the machine; 0 gives each process its share of the
    cores (at least one). ``cores``: usable cores (default: those this process
    may run on, which a container or ``taskset`` can make fewer than the machine's).
    """
    if cores is None:
        cores = usable_cores()
    share = max(1, cores // max(1, processes))
    return min(threads, share) if threads > 0 and processes > 1 else threads if threads > 0 else share


def resume_key(cfg: TrainConfig, samples: PatchSet, start: Start | None = None) -> str:
    """sha256 over what a training computes from: the config (less :data:`NOT_CONTENT`), the samples' arrays and the start weights.

    A run folder's checkpoints are resumed only by a run with the same key, so
    a rerun with other labels, settings or imagery starts afresh.
    """
    conf = asdict(cfg)
    for key in NOT_CONTENT:
        *path, last = key.split(".")
        d = conf
        for part in path:
            d = d[part]
        d.pop(last, None)
    h = hashlib.sha256(json.dumps(conf, sort_keys=True, default=str).encode())
    for a in (samples.x, samples.valid, samples.target, samples.split, samples.weight_or_ones(), samples.dates.astype("datetime64[D]").astype(np.int64)):
        h.update(np.ascontiguousarray(a).tobytes())
    if start is not None:
        h.update(json.dumps(start.spec, sort_keys=True).encode())
        for state in [*start.members, *([start.distilled] if start.distilled is not None else [])]:
            for k in sorted(state):
                h.update(k.encode())
                h.update(state[k].detach().contiguous().numpy().tobytes())
    return h.hexdigest()


def read_resume(folder: Path) -> dict[str, Any] | None:
    """``checkpoints/resume.json`` of a run folder (None where absent).

    Raises:
        FileFormatError: present but not JSON, not UTF-8 or of another kind.
    """
    path = folder / "checkpoints" / RESUME
    if not path.is_file():
        return None
    try:
        doc = json.loads(path.read_bytes().decode("utf-8"))
    except UnicodeDecodeError as exc:
        raise FileFormatError(f"{path}: not a resume record (byte {exc.start} is not UTF-8 text; the file is binary); delete the folder {folder} or train afresh with resume=false") from None
    except json.JSONDecodeError as exc:
        raise FileFormatError(f"{path}: not a resume record (not valid JSON: {exc.msg}, line {exc.lineno}); delete the folder {folder} or train afresh with resume=false") from None
    if not isinstance(doc, dict) or doc.get("format") != RESUME_FORMAT or not isinstance(doc.get("finished"), dict):
        raise FileFormatError(f"{path}: not a resume record of format {RESUME_FORMAT!r}; delete the folder {folder} or train afresh with resume=false")
    return doc


def _write_resume(folder: Path, doc: dict[str, Any]) -> None:
    path = folder / "checkpoints" / RESUME
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".partial")
    tmp.write_text(json.dumps(doc, indent=1))
    os.replace(tmp, path)


def prepare_resume(folder: Path, key: str, *, resume: bool) -> dict[str, Any]:
    """The resume record ``fit`` works from: the folder's own when ``resume`` and its key is ``key``, else a fresh one (the old checkpoints removed).

    Only the first process writes; the others (DDP) read what it decided.
    """
    doc = read_resume(folder) if resume else None
    if doc is not None and doc.get("key") == key:
        if doc["finished"] or any((folder / "checkpoints").glob("*-last.ckpt")):
            log.warning("%s: resuming an interrupted training (finished: %s)", folder, ", ".join(doc["finished"]) or "none")
        return doc
    doc = {"format": RESUME_FORMAT, "key": key, "finished": {}}
    if rank() == 0:
        shutil.rmtree(folder / "checkpoints", ignore_errors=True)
        _write_resume(folder, doc)
    return doc


def finish(folder: Path, doc: dict[str, Any], name: str, net: torch.nn.Module, epochs: int) -> None:
    """Record a finished fit: its weights as ``checkpoints/<name>.safetensors`` (no pickle) with their sha256, and its epochs; remove its last-epoch checkpoint (first process only)."""
    from safetensors.torch import save_file

    if rank() != 0:
        return
    path = folder / "checkpoints" / f"{name}.safetensors"
    tmp = path.with_name(path.name + ".partial")
    save_file({k: v.detach().contiguous().clone() for k, v in net.state_dict().items()}, str(tmp))
    os.replace(tmp, path)
    doc["finished"][name] = {"epochs": int(epochs), "sha256": hashlib.sha256(path.read_bytes()).hexdigest()}
    _write_resume(folder, doc)
    # Recorded finished, the fit resumes from its safetensors; the last-epoch checkpoint served resuming only.
    last_checkpoint(folder, name).unlink(missing_ok=True)


def load_finished(folder: Path, doc: dict[str, Any], name: str, net: torch.nn.Module) -> int:
    """Load a finished fit's weights into ``net`` (checked against the recorded sha256); its epochs.

    Raises:
        FileFormatError: the file is missing, changed since it was recorded or does not fit the network.
    """
    from safetensors.torch import load_file

    path = folder / "checkpoints" / f"{name}.safetensors"
    rec = doc["finished"][name]
    hint = f"delete the folder {folder} or train afresh with resume=false"
    if not path.is_file() or hashlib.sha256(path.read_bytes()).hexdigest() != rec.get("sha256"):
        raise FileFormatError(f"{path}: missing or changed since {name} finished (sha256 differs from {RESUME}); {hint}")
    try:
        net.load_state_dict(load_file(str(path)))
    except Exception as exc:  # safetensors and torch raise their own types for a damaged or foreign file
        raise FileFormatError(f"{path}: does not fit {name}'s network ({str(exc).splitlines()[0]}); {hint}") from None
    return int(rec["epochs"])


def resumable_checkpoint(folder: Path, name: str) -> tuple[Path, int] | None:
    """The last checkpoint of an interrupted fit and the epochs it holds, checked to load as tensors and plain values only (None: none, start the fit afresh).

    Loaded with ``weights_only=True``: torch's restricted unpickler builds
    tensors and plain containers and refuses any other object, so a file
    planted in its place runs no code.

    Raises:
        FileFormatError: the file is damaged, not a checkpoint, or holds other objects.
    """
    path = last_checkpoint(folder, name)
    if not path.is_file():
        return None
    hint = "delete it (the fit restarts) or train afresh with resume=false"
    try:
        ck = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # UnpicklingError for foreign objects, RuntimeError for a damaged archive
        why = "it holds objects other than tensors and plain values" if "weights_only" in str(exc).lower() or "unpickl" in type(exc).__name__.lower() else "unreadable"
        raise FileFormatError(f"{path}: refused as a checkpoint to resume from ({why}); {hint}") from None
    if not isinstance(ck, dict) or not {"state_dict", "loops", "epoch"} <= set(ck):
        raise FileFormatError(f"{path}: not a training checkpoint (no state_dict, loops or epoch); {hint}")
    return path, int(ck["epoch"]) + 1


@dataclass
class TrainedModel:
    """Result of :func:`fit`: networks, calibration, and what was measured."""

    members: list[ConvRecurrentNet]
    spec: dict[str, Any]
    calibration: Calibration
    metrics: dict[str, Any]
    is_global_zero: bool = True
    #: The network distilled from the members (None: not asked for, a single member, or outside the tolerance).
    distilled: ConvRecurrentNet | None = None
    #: Samples through the networks at once outside optimiser steps, as the run used it (after a memory budget).
    inference_batch: int = 512


@dataclass
class Start:
    """Weights a training starts from instead of random ones (a warm start, :mod:`plantation.model.transfer`)."""

    #: The network spec to train (the parent's normalisation, this series' dates).
    spec: dict[str, Any]
    #: State dicts of the parent's members; member m starts from ``members[m % len(members)]``.
    members: list[dict[str, torch.Tensor]]
    #: State dict of the parent's distilled network (None: the distillation starts from member 0).
    distilled: dict[str, torch.Tensor] | None = None


#: Environment variable carrying the first process's budgeted inference batch to the processes DDP starts.
CHOSEN_INFERENCE_BATCH = "PLANTATION_INFERENCE_BATCH"


def training_budget(cfg: TrainConfig, samples: PatchSet) -> TrainingBudget | None:
    """The inference batch that keeps this process within ``cfg.memory_budget_mb`` (None without a budget), measured from the process as it is now, samples cut.

    Raises:
        ConfigError: the budget cannot hold the run (see :func:`plantation.model.memory.fit_training_budget`).
    """
    if cfg.memory_budget_mb is None:
        return None
    import psutil

    distilling = cfg.distillation.enabled and cfg.network.members > 1
    plan = fit_training_budget(
        cfg.memory_budget_mb,
        process_mb=psutil.Process().memory_info().rss / 2**20,
        dates=int(samples.x.shape[1]),
        channels=int(samples.x.shape[2]),
        years=len(np.unique(year_of(samples.dates))),
        neighbourhood=cfg.patches.neighbourhood,
        network=asdict(cfg.network),
        batch_size=cfg.training.batch_size,
        distil_batch=max(cfg.training.batch_size, 128) if distilling else 0,
        held_pixels=cfg.distillation.pixels if distilling else 0,
        inference_batch=cfg.training.inference_batch,
    )
    log.info("memory budget %s MB: inference batch %d (estimated peak %.0f MB, %.0f MB of it the process with its samples)", cfg.memory_budget_mb, plan.inference_batch, plan.need_mb, plan.process_mb)
    return plan


def fit(samples: PatchSet, cfg: TrainConfig, folder: Path, *, stacks: Sequence[TileStack] = (), labels: LabelSet | None = None, start: Start | None = None) -> TrainedModel:
    """Train the ensemble on ``samples`` (split already assigned) and calibrate it.

    Checkpoints and logs go under ``folder``. ``labels`` (with inclusion
    probabilities) is needed by ``calibration.prior=inclusion``, the
    region's ``stacks`` by ``bbse``. ``start``: weights to start from (a
    warm start); the calibration is fitted afresh either way.

    Resuming (``cfg.resume``): each fit keeps the checkpoint of its last
    epoch (``checkpoints/member<i>-last.ckpt``, random states included) and
    a finished fit's weights go to ``checkpoints/member<i>.safetensors``,
    recorded in ``checkpoints/resume.json`` with the key of the inputs
    (:func:`resume_key`). Called again on the same folder and inputs, finished
    members are loaded rather than trained and the interrupted one continues
    from its last epoch (:func:`resumable_checkpoint`), so the result is the
    one an uninterrupted run gives (the slow test in ``tests/test_resume.py``
    compares them). Other inputs start afresh.
    """
    check_config(cfg)
    train, val = samples.part("train"), samples.part("val")
    if len(train) < cfg.training.batch_size or len(val) == 0:
        raise ConfigError(
            f"split: {len(train)} training and {len(val)} validation samples; need at least training.batch_size={cfg.training.batch_size} and one (lower split.block or change split.shares)"
        )
    n_out = samples.outcomes.size
    weights = outcome_weights(train.target, n_out, cfg.training.class_weighting)
    spec = start.spec if start is not None else network_spec(samples, cfg)
    nets: list[ConvRecurrentNet] = []
    epochs: list[int] = []
    began = time.perf_counter()
    is_zero = rank() == 0
    doc = prepare_resume(folder, resume_key(cfg, samples, start), resume=cfg.resume)
    infer = cfg.training.inference_batch
    # What an interrupted run left and this one took up: "finished", or the epochs of the checkpoint continued from.
    resumed: dict[str, int | str] = {}
    for m in range(cfg.network.members):
        name = f"member{m}"
        if name in doc["finished"]:
            net = ConvRecurrentNet(**spec)
            epochs.append(load_finished(folder, doc, name, net))
            nets.append(net.eval())
            resumed[name] = "finished"
            continue
        L.seed_everything(cfg.training.seed * 1000 + m, workers=True, verbose=False)
        t = cfg.training
        task = ConversionTask(
            spec,
            loss_weights=weights.tolist(),
            lr=t.lr,
            weight_decay=t.weight_decay,
            loss=t.loss,
            gce_q=t.gce_q,
            sce_alpha=t.sce_alpha,
            sce_beta=t.sce_beta,
            augment=t.augment,
            date_dropout=t.date_dropout,
            max_epochs=t.max_epochs,
        )
        if start is not None:
            task.net.load_state_dict(carry_weights(start.members[m % len(start.members)], spec).state_dict())
        trainer = make_trainer(cfg.trainer, cfg.training.max_epochs, cfg.training.patience, folder, name)
        last = resumable_checkpoint(folder, name) if cfg.resume else None
        if last is not None:
            resumed[name] = last[1]
        with warnings.catch_warnings():
            # One small in-memory dataset: Lightning's advice to add loader workers does not apply.
            warnings.filterwarnings("ignore", message=".*does not have many workers.*")
            warnings.filterwarnings("ignore", message=".*number of training batches.*")
            # A deprecation inside Lightning itself, about torch's pytree API.
            warnings.filterwarnings("ignore", message=".*treespec, LeafSpec.*")
            # Members share one checkpoint folder, each with its own file name.
            warnings.filterwarnings("ignore", message=".*exists and is not empty.*")
            trainer.fit(task, SampleDataModule(train, val, cfg.training.batch_size), ckpt_path=last[0] if last else None, weights_only=True)
        is_zero = trainer.is_global_zero
        best = trainer.checkpoint_callback.best_model_path if trainer.checkpoint_callback else ""
        if best and Path(best).is_file():
            state = torch.load(best, map_location="cpu", weights_only=True)["state_dict"]
            task.load_state_dict(state)
        epochs.append(int(trainer.current_epoch))
        nets.append(task.net.eval())
        finish(folder, doc, name, task.net, trainer.current_epoch)
    train_seconds = time.perf_counter() - began

    # The sample's mix is that of the interpreters' labels (weight 1); rule labels (surrogate) are drawn at random and would blur it.
    trusted = train.weight_or_ones() >= 1.0
    prior = np.bincount(train.target[trusted] if trusted.any() else train.target, minlength=n_out).astype(np.float64)
    prior = np.maximum(prior, 0.5) / np.maximum(prior, 0.5).sum()
    cal = Calibration(temperature=1.0, loss_weights=weights.tolist(), train_prior=prior.tolist())
    val_logits = member_logits(nets, val, infer)
    uncal = calibrated_log_probs(val_logits, cal).numpy()
    cal.temperature = calibration.fit_temperature(uncal, val.target)
    val_lp = calibrated_log_probs(val_logits, cal).numpy()
    if cfg.calibration.conformal_alpha is not None:
        cal.conformal_alpha = cfg.calibration.conformal_alpha
        cal.conformal_qhat = calibration.conformal_threshold(np.exp(val_lp), val.target, cfg.calibration.conformal_alpha)
    metrics: dict[str, Any] = {
        "train_seconds": round(train_seconds, 1),
        **({"resumed": resumed} if resumed else {}),
        "epochs": epochs,
        "temperature": round(cal.temperature, 4),
        "val_nll_before_temperature": round(calibration.nll(uncal, val.target), 4),
        "val_nll": round(calibration.nll(val_lp, val.target), 4),
    }
    test = samples.part("test")
    if len(test):
        metrics["test"] = score_samples(nets, cal, test, cfg.calibration, batch=infer)
    held, held_name = (test, "test") if len(test) else (val, "val")
    # The metrics above are of the sample-mix probabilities on stratified points; the card's prior applies from here on.
    source = resolve_prior(cfg.calibration, cfg.region.labels)
    q = target_prior(source, cfg, cal, samples, np.exp(val_lp), nets=nets, stacks=stacks, labels=labels)
    refused: dict[str, Any] | None = None
    gone = calibration.vanished_groups(q, samples.target) if source == "bbse" and q is not None else []
    if gone:
        # A map with no conversion anywhere would answer nothing; the sample's mix over-states conversion, but says so on the card.
        estimate = np.bincount(calibration.outcome_groups(len(q)), weights=q)
        refused = {"source": source, "vanished": gone, "estimate_groups": {n: round(float(v), 6) for n, v in zip(calibration.GROUP_NAMES, estimate, strict=True)}}
        log.warning(
            "calibration.prior: bbse estimated no %s in the region although the labels hold some (wrong labels, or points not drawn like the region's pixels); "
            "the sample's mix is kept instead: give region.labels.population_shares or inclusion_column",
            " or ".join(gone),
        )
        q, source = None, "sample"
    if q is not None:
        cal.target_prior = [float(v) for v in q]
    cal.prior_source = source
    # Recalibrate the interval's level on the validation split, with the region-mix probabilities the maps carry.
    cal.interval_masses, cal.interval_coverage = interval_curve(np.exp(calibrated_log_probs(val_logits, cal).numpy()), val.target, samples.outcomes)
    metrics["interval_mass"] = {"nominal": cfg.calibration.interval_level, "mass": cal.interval_mass(cfg.calibration.interval_level)}
    # Reliability of the sample-mix probabilities on the stratified held-out points, with the intervals the maps will carry.
    metrics["validation"] = reliability_record(nets, replace(cal, target_prior=[]), held, held_name, cfg.calibration, batch=infer)
    record = {
        **cal.correction(),
        "target_prior": [round(v, 6) for v in cal.target_prior],
        "sample_prior_groups": Calibration(train_prior=cal.train_prior).prior_groups(),
        "metrics_prior": "sample",
    }
    if refused is not None:
        record["refused"] = refused
    metrics["prior"] = record
    metrics["validation"]["prior"] = record
    log.info("probabilities for the %s prior: %s", source, record["target_prior_groups"])
    student = None
    if cfg.distillation.enabled and len(nets) > 1:
        # After the calibration: the distilled epistemic term is that of the calibrated members.
        student, metrics["distillation"] = distil(nets, cal, spec, samples, cfg, folder, stacks, start=start.distilled if start is not None else None, resume=doc)
    return TrainedModel(nets, spec, cal, metrics, is_zero, student, infer)


def interval_curve(probs: np.ndarray, targets: np.ndarray, outcomes: Outcomes) -> tuple[list[float], list[float]]:
    """(masses, coverage) of the year interval on labelled points: true conversions mapped as conversion (see :func:`interval_coverage_curve`); empty when there are none."""
    true_label = outcomes.label_code(targets)
    summ_label = group_probabilities(probs).argmax(-1) + 1
    hit = (true_label == LABEL_CODES["conversion"]) & (summ_label == LABEL_CODES["conversion"])
    if not hit.any():
        return [], []
    years_idx = np.asarray(targets)[hit] - N_STATIC
    cover = interval_coverage_curve(probs[hit][:, N_STATIC:], years_idx)
    return list(MASS_GRID), [round(c, 4) for c in cover]


def target_prior(
    source: str, cfg: TrainConfig, cal: Calibration, samples: PatchSet, val_probs: np.ndarray, *, nets: list[ConvRecurrentNet], stacks: Sequence[TileStack] = (), labels: LabelSet | None = None
) -> np.ndarray | None:
    """The region's outcome prior (k,) for ``source`` (see :data:`PRIORS`), or None for ``sample``.

    ``shares``: the region config's group shares, the conversion share
    spread over the years like the training sample's; ``inclusion``: every
    labelled point weighted by 1/π (Hájek); ``bbse``: black-box shift
    estimation on label groups, with the validation split's confusion matrix
    (``val_probs``, sample-mix probabilities (n_val, k)) and the mean
    prediction on ``calibration.bbse_pixels`` random pixels of ``stacks``.
    """
    train_prior = np.asarray(cal.train_prior, dtype=np.float64)
    k = len(train_prior)
    if source == "sample":
        return None
    if source == "shares":
        return calibration.prior_from_shares(population_shares(cfg.region.labels) or {}, train_prior)
    if source == "inclusion":
        if labels is None or "inclusion" not in labels.points:
            raise ConfigError("calibration.prior: 'inclusion' needs labels read with region.labels.inclusion_column")
        pts = labels.points
        targets = samples.outcomes.encode(pts["label"].tolist(), pts["onset_year"].tolist())
        return calibration.population_prior(targets, pts["inclusion"].to_numpy(), k)
    if source == "bbse":
        if not stacks:
            raise ConfigError("calibration.prior: 'bbse' needs the region's tiles to draw unlabelled pixels from")
        pixels = unlabelled_probs(nets, cal, stacks, cfg, n=cfg.calibration.bbse_pixels, seed=cfg.training.seed)
        return calibration.bbse_prior(val_probs, samples.part("val").target, pixels, train_prior, groups=calibration.outcome_groups(k))
    raise ConfigError(f"calibration.prior: {source!r} is not one of {list(PRIORS)}")


def unlabelled_patches(stacks: Sequence[TileStack], cfg: TrainConfig, *, n: int, seed: int) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """Features (m, time, channel, k, k) and validity of up to ``n`` pixels drawn at random (seeded, with replacement) across the tiles, in proportion to their areas.

    Yielded in chunks of at most ``cfg.training.inference_batch`` pixels, read like training
    patches; pixels with no clear date are left out.
    """
    rng = np.random.default_rng(seed)
    sizes = np.array([s.grid.height * s.grid.width for s in stacks], dtype=np.float64)
    counts = rng.multinomial(n, sizes / sizes.sum())
    k, chunk = cfg.patches.neighbourhood, cfg.training.inference_batch
    for stack, m in zip(stacks, counts, strict=True):
        flat = np.sort(rng.integers(0, stack.grid.height * stack.grid.width, int(m)))
        rows, cols = flat // stack.grid.width, flat % stack.grid.width
        for i in range(0, len(flat), chunk):
            refl, valid = read_patches(stack, rows[i : i + chunk], cols[i : i + chunk], k)
            seen = valid[:, :, k // 2, k // 2].any(1)
            if seen.any():
                yield np.ascontiguousarray(features(refl[seen], cfg.region.bands, cfg.patches.indices)), np.ascontiguousarray(valid[seen])


def unlabelled_probs(nets: list[ConvRecurrentNet], cal: Calibration, stacks: Sequence[TileStack], cfg: TrainConfig, *, n: int, seed: int) -> np.ndarray:
    """Sample-mix probabilities (m, k) of the pixels of :func:`unlabelled_patches` (memory: one chunk's neighbourhoods)."""
    out = []
    for x, v in unlabelled_patches(stacks, cfg, n=n, seed=seed):
        with torch.inference_mode():
            z = torch.stack([net.eval()(torch.from_numpy(x), torch.from_numpy(v)) for net in nets])
        out.append(np.exp(calibrated_log_probs(z, cal).numpy()))
    if not out:
        raise ConfigError("calibration.prior: 'bbse' found no clear pixel among those drawn; raise calibration.bbse_pixels")
    return np.concatenate(out)


def distil(
    nets: list[ConvRecurrentNet],
    cal: Calibration,
    spec: dict[str, Any],
    samples: PatchSet,
    cfg: TrainConfig,
    folder: Path,
    stacks: Sequence[TileStack],
    *,
    start: dict[str, torch.Tensor] | None = None,
    resume: dict[str, Any] | None = None,
) -> tuple[ConvRecurrentNet | None, dict[str, Any]]:
    """The network distilled from ``nets`` (None when it misses the tolerance) and its record for the card.

    ``start``: a parent's distilled network to start from (a warm start) instead of member 0.
    ``resume``: the run's resume record (:func:`prepare_resume`): a distillation
    finished before is loaded, an interrupted one continues from its last epoch.
    """
    dc = cfg.distillation
    train, val = samples.part("train"), samples.part("val")
    # The parts side by side rather than concatenated: the same items in the same order, without a copy of them all.
    parts = [TensorDataset(torch.from_numpy(train.x), torch.from_numpy(train.valid))]
    if stacks and dc.pixels > 0:
        for x, v in unlabelled_patches(stacks, cfg, n=dc.pixels, seed=cfg.training.seed + 7919):
            parts.append(TensorDataset(torch.from_numpy(x), torch.from_numpy(v)))
    data = ConcatDataset(parts)
    held = TensorDataset(torch.from_numpy(val.x), torch.from_numpy(val.valid))
    L.seed_everything(cfg.training.seed * 1000 + 999, workers=True, verbose=False)
    began = time.perf_counter()
    task = DistillationTask(nets, cal, spec, lr=dc.lr, epistemic_weight=dc.epistemic_weight, max_epochs=dc.max_epochs, date_dropout=cfg.training.date_dropout, weight_decay=cfg.training.weight_decay)
    if start is not None:
        task.net.load_state_dict(carry_weights(start, {**spec, "epistemic": True}).state_dict())
    if resume is not None and "distilled" in resume["finished"]:
        n_epochs = load_finished(folder, resume, "distilled", task.net)
    else:
        trainer = make_trainer(cfg.trainer, dc.max_epochs, dc.patience, folder, "distilled")
        last = resumable_checkpoint(folder, "distilled") if resume is not None else None
        last_path = last[0] if last else None
        with warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=".*does not have many workers.*")
            warnings.filterwarnings("ignore", message=".*treespec, LeafSpec.*")
            warnings.filterwarnings("ignore", message=".*exists and is not empty.*")
            data_loader = DataLoader(data, batch_size=max(cfg.training.batch_size, 128), shuffle=True, drop_last=True)
            trainer.fit(task, data_loader, DataLoader(held, batch_size=VALIDATION_BATCH), ckpt_path=last_path, weights_only=True)
        best = trainer.checkpoint_callback.best_model_path if trainer.checkpoint_callback else ""
        if best and Path(best).is_file():
            task.load_state_dict(torch.load(best, map_location="cpu", weights_only=True)["state_dict"])
        n_epochs = int(trainer.current_epoch)
        if resume is not None:
            finish(folder, resume, "distilled", task.net, n_epochs)
    net = task.net.eval()
    record: dict[str, Any] = {
        "inputs": {"training_patches": len(train), "unlabelled_pixels": len(data) - len(train)},
        "epochs": n_epochs,
        "seconds": round(time.perf_counter() - began, 1),
        "tolerance": {"mean_tv_distance": dc.tolerance},
        "validation": agreement(nets, net, cal, torch.from_numpy(val.x), torch.from_numpy(val.valid), batch=cfg.training.inference_batch),
    }
    record["within_tolerance"] = record["validation"]["mean_tv_distance"] <= dc.tolerance
    return (net if record["within_tolerance"] else None), record


def score_samples(nets: list[ConvRecurrentNet], cal: Calibration, s: PatchSet, cc: CalibrationConfig, *, batch: int) -> dict[str, Any]:
    """Label-sample metrics (the sample is stratified, so these are not map accuracies); ``batch``: samples through the networks at once."""
    probs = np.exp(calibrated_log_probs(member_logits(nets, s, batch), cal).numpy())
    years = s.outcomes.years
    summ = summarise(probs, years, cutoff_year=cc.cutoff_year, level=cc.interval_level)
    true_label = s.outcomes.label_code(s.target)
    true_year = s.outcomes.onset_year(s.target)
    conv = true_label == 2
    hit = conv & (summ.label == 2)
    out: dict[str, Any] = {
        "n": len(s),
        "label_accuracy": round(float((summ.label == true_label).mean()), 4),
        "nll": round(float(-np.log(np.clip(probs[np.arange(len(s)), s.target], 1e-12, 1)).mean()), 4),
        "conversion_recall": round(float(hit.sum() / max(conv.sum(), 1)), 4),
        "year_exact": round(float((hit & (summ.year == true_year)).sum() / max(conv.sum(), 1)), 4),
        "interval_coverage": round(float((hit & (summ.year_low <= true_year) & (true_year <= summ.year_high)).sum() / max(conv.sum(), 1)), 4),
        "ece_p_conversion": round(calibration.expected_calibration_error(summ.p_conversion, conv), 4),
    }
    if cal.conformal_qhat is not None:
        sets = calibration.conformal_sets(probs, cal.conformal_qhat)
        out["conformal_coverage"] = round(float(sets[np.arange(len(s)), s.target].mean()), 4)
        out["conformal_mean_size"] = round(float(sets.sum(-1).mean()), 3)
    return out


#: Nominal levels at which the year intervals' coverage is checked.
COVERAGE_LEVELS = (0.5, 0.8, 0.9, 0.95)


def reliability_record(nets: list[ConvRecurrentNet], cal: Calibration, s: PatchSet, split: str, cc: CalibrationConfig, n_bins: int = 10, *, batch: int) -> dict[str, Any]:
    """How well the calibrated probabilities and intervals hold on held-out points (for the report).

    ``reliability``: per equal-width bin of p_conversion, the mean predicted
    probability, the observed share of conversions and the number of points
    (empty bins left out). ``interval_coverage``: for each nominal level, the
    share of true conversions mapped as conversion whose true onset year lies
    in the interval of that level (the interval is of the year given
    conversion, so misses of the class are not counted here), the interval
    asking each point's year distribution for ``mass``: the mass whose
    coverage on the validation split was the level (``cal``'s curve, see
    :func:`interval_curve`). On the test split that is a check on data the
    curve was not fitted on. The sample is the stratified
    label sample, so these are not map accuracies.
    """
    probs = np.exp(calibrated_log_probs(member_logits(nets, s, batch), cal).numpy())
    years = s.outcomes.years
    true_label = s.outcomes.label_code(s.target)
    true_year = s.outcomes.onset_year(s.target)
    conv = true_label == LABEL_CODES["conversion"]
    base = summarise(probs, years, cutoff_year=cc.cutoff_year, level=cc.interval_level)
    p = base.p_conversion.astype(np.float64)
    b = np.minimum((p * n_bins).astype(np.int64), n_bins - 1)
    bins = []
    for k in range(n_bins):
        m = b == k
        if m.any():
            bins.append({"p_mean": round(float(p[m].mean()), 4), "observed": round(float(conv[m].mean()), 4), "n": int(m.sum())})
    hit = conv & (base.label == LABEL_CODES["conversion"])
    cover = []
    for level in COVERAGE_LEVELS:
        mass = cal.interval_mass(level)
        sm = summarise(probs, years, cutoff_year=cc.cutoff_year, level=mass)
        ok = hit & (sm.year_low <= true_year) & (true_year <= sm.year_high)
        cover.append({"level": level, "mass": mass, "coverage": round(float(ok.sum() / max(hit.sum(), 1)), 4), "n": int(hit.sum())})
    return {"split": split, "n": len(s), "reliability": bins, "ece": round(calibration.expected_calibration_error(p, conv, n_bins), 4), "interval_coverage": cover}


def load_region_samples(cfg: TrainConfig, *, inherit: dict[tuple[str, int, int], int] | None = None) -> tuple[list[TileStack], LabelSet, PatchSet]:
    """Open the region and labels of ``cfg`` and cut the samples.

    ``inherit``: a parent run's split of each point by (tile, row, col)
    (:func:`plantation.model.runs.split_of_points`); those points keep it,
    new ones take their block's (see :func:`plantation.model.patches.spatial_split`).
    """
    if not cfg.region.labels.path:
        raise ConfigError(f"region {cfg.region.name!r}: labels.path is not set; training needs labelled points")
    stacks = open_region(cfg.region)
    labels = read_labels(
        cfg.region.labels.path, grids={s.name: s.grid for s in stacks}, years=[int(y) for y in stacks[0].years], csv_crs=cfg.region.labels.crs, inclusion_column=cfg.region.labels.inclusion_column
    )
    samples = build_patches(
        stacks, labels, bands=cfg.region.bands, index_names=cfg.patches.indices, k=cfg.patches.neighbourhood, block=cfg.split.block, shares=cfg.split.shares, seed=cfg.split.seed, inherit=inherit
    )
    if cfg.surrogate.pixels > 0:
        samples = samples.concat(surrogate_samples(stacks, labels, samples, cfg))
    return stacks, labels, samples


def _pixel_xy(stacks: Sequence[TileStack], tile: np.ndarray, row: np.ndarray, col: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pixel-centre coordinates (imagery CRS) of (tile, row, col) triples."""
    x, y = np.zeros(len(tile)), np.zeros(len(tile))
    for st in stacks:
        m = np.asarray(tile) == st.name
        x[m], y[m] = st.grid.transform * (np.asarray(col)[m] + 0.5, np.asarray(row)[m] + 0.5)
    return x, y


def surrogate_samples(stacks: Sequence[TileStack], labels: LabelSet, samples: PatchSet, cfg: TrainConfig) -> PatchSet:
    """Training samples of ``surrogate.pixels`` pixels labelled by the index-drop rule, weighing ``surrogate.weight`` each.

    They go to the training split only, never on a labelled pixel, and a
    pixel whose neighbourhood touches a validation or test point's is left
    out, so the held-out points stay unseen.

    Raises:
        ConfigError: the rule labelled no pixel, or a weight outside (0, 1].
    """
    sc = cfg.surrogate
    if not 0 < sc.weight <= 1:
        raise ConfigError(f"surrogate.weight: {sc.weight!r} must be in (0, 1] (an interpreter's label weighs 1)")
    pts = labels.points
    taken = {(str(t), int(r), int(c)) for t, r, c in zip(pts["tile"], pts["row"], pts["col"], strict=True)}
    table = draw_rule_labels(stacks, cfg.region.bands, n=sc.pixels, seed=sc.seed, exclude=taken)
    if table.empty:
        raise ConfigError(f"surrogate.pixels: the rule labelled none of {sc.pixels} pixels drawn (it abstains where a pixel is not clearly forest at the start)")
    x, y = _pixel_xy(stacks, table["tile"].to_numpy(), table["row"].to_numpy(), table["col"].to_numpy())
    points = pd.DataFrame(
        {
            "label": table["label"].to_numpy(),
            "code": table["label"].map(LABEL_CODES).to_numpy(dtype=np.uint8),
            "onset_year": table["onset_year"].to_numpy(dtype=np.int16),
            "tile": table["tile"].astype(str).to_numpy(),
            "row": table["row"].to_numpy(dtype=np.int64),
            "col": table["col"].to_numpy(dtype=np.int64),
            "x": x,
            "y": y,
            "source": np.arange(len(table)) + 1,
        }
    )
    rule = LabelSet(points=points, fingerprint="index-drop rule", path=Path("index-drop rule"))
    keep_train = {(t, int(r), int(c)): 0 for t, r, c in zip(points["tile"], points["row"], points["col"], strict=True)}
    k = cfg.patches.neighbourhood
    sur = build_patches(stacks, rule, bands=cfg.region.bands, index_names=cfg.patches.indices, k=k, block=cfg.split.block, shares=cfg.split.shares, seed=cfg.split.seed, inherit=keep_train)
    res = abs(stacks[0].grid.transform.a)
    held = samples.split > 0
    hx, hy = _pixel_xy(stacks, samples.tile[held], samples.row[held], samples.col[held])
    sx, sy = _pixel_xy(stacks, sur.tile, sur.row, sur.col)
    clear = ~windows_touch(sx / res, sy / res, hx / res, hy / res, k)
    sur = sur.subset(clear)
    sur.weight = np.full(len(sur), sc.weight, np.float32)
    log.info("surrogate labels: %d pixels labelled by the rule, %d kept for training", len(table), len(sur))
    return sur


def model_card(cfg: TrainConfig, samples: PatchSet, trained: TrainedModel, labels: LabelSet) -> ModelCard:
    return ModelCard(
        bands=list(cfg.region.bands),
        indices=[n.upper() for n in cfg.patches.indices],
        scaling=[asdict(r) for r in cfg.region.scaling],
        dates=[str(d) for d in samples.dates.astype("datetime64[D]")],
        years=list(samples.outcomes.years),
        network=trained.spec,
        members=len(trained.members),
        calibration=trained.calibration,
        cutoff_year=cfg.calibration.cutoff_year,
        interval_level=cfg.calibration.interval_level,
        region=cfg.region.name,
        labels_fingerprint=labels.fingerprint,
        package_version=__version__,
        distilled=trained.metrics["distillation"] if trained.distilled is not None else {},
        sensors=trained_sensors(samples),
        harmonised_to=harmonised_to(cfg.region),
    )


def set_threads(cfg: TrainConfig) -> int:
    """Set torch's threads for this process (:func:`threads_per_process`: DDP's processes on one machine share its cores, see DEVELOPERS.md); the number set (0: left as torch chose)."""
    n = threads_per_process(cfg.training.threads, cfg.trainer.devices)
    if cfg.training.threads > 0 or cfg.trainer.devices > 1:
        torch.set_num_threads(n)
        return n
    return 0


def sample_splits(samples: PatchSet) -> dict[tuple[str, int, int], int]:
    """(tile, row, col) → split code of every sample."""
    return {(str(t), int(r), int(c)): int(s) for t, r, c, s in zip(samples.tile, samples.row, samples.col, samples.split, strict=True)}


def run(
    cfg: TrainConfig,
    resolved_config: str | None = None,
    *,
    start: Start | None = None,
    inherit: dict[tuple[str, int, int], int] | None = None,
    lineage: dict[str, Any] | None = None,
    after_fit: Callable[[PatchSet, TrainedModel], dict[str, Any]] | None = None,
    loaded: tuple[list[TileStack], LabelSet, PatchSet] | None = None,
) -> Path:
    """Train on a region and write the run folder ``<out_dir>/<run_name>``.

    The folder holds ``config.yaml`` (resolved), ``labels.json`` (fingerprint,
    counts, split sizes), ``points.csv`` and ``lineage.json`` (see
    :mod:`plantation.model.runs`), ``metrics.json``,
    ``checkpoints/member<i>.ckpt``, ``logs/`` (CSV per member) and the
    artefact ``model/`` (see :mod:`plantation.model.artefact`). It is built as
    ``<run_name>.partial`` and renamed when complete; an earlier run of the
    same name is replaced.

    A retrain passes ``start`` (weights to start from), ``inherit`` (the
    parent's splits), ``lineage`` (fields of ``lineage.json`` besides the
    defaults of a first run) and ``after_fit``, called with the samples and
    the trained model before anything is written; what it returns is added
    to ``lineage.json``. ``loaded``: the region, labels and samples when the
    caller has already read them.
    """
    check_config(cfg)
    threads = set_threads(cfg)
    stacks, labels, samples = loaded if loaded is not None else load_region_samples(cfg, inherit=inherit)
    # Before the run folder: a budget too small is refused with nothing written. Decided by the first process only:
    # the processes DDP starts later re-run this job and take its choice from the environment they inherit.
    budget = training_budget(cfg, samples) if rank() == 0 else None
    if budget is not None:
        cfg = replace(cfg, training=replace(cfg.training, inference_batch=budget.inference_batch))
        os.environ[CHOSEN_INFERENCE_BATCH] = str(budget.inference_batch)
    elif rank() > 0 and os.environ.get(CHOSEN_INFERENCE_BATCH):
        cfg = replace(cfg, training=replace(cfg.training, inference_batch=int(os.environ[CHOSEN_INFERENCE_BATCH])))
    final = Path(cfg.out_dir) / cfg.run_name
    work = final.with_name(final.name + ".partial")
    # Processes started by DDP re-run this script (LOCAL_RANK / NODE_RANK > 0):
    # only the first process may clear a folder left by an interrupted run.
    # With resume, fit keeps its checkpoints when the inputs are the same (and clears them otherwise).
    if rank() == 0 and work.exists() and not cfg.resume:
        shutil.rmtree(work)
    work.mkdir(parents=True, exist_ok=True)
    trained = fit(samples, cfg, work, stacks=stacks, labels=labels, start=start)
    if not trained.is_global_zero:
        return final
    record = runs.lineage_record(run=final.name, start="afresh", labels_fingerprint=labels.fingerprint, years=list(samples.outcomes.years))
    record.update(lineage or {})
    if after_fit is not None:
        record.update(after_fit(samples, trained))
    # What each process was given, so a run on a shared machine can be checked for oversubscription.
    if budget is not None:
        trained.metrics["memory_budget"] = {**{k: round(v, 1) if isinstance(v, float) else v for k, v in asdict(budget).items()}, "need_mb": round(budget.need_mb, 1)}
    trained.metrics["threads"] = {"torch_per_process": threads or torch.get_num_threads(), "processes_per_machine": cfg.trainer.devices, "usable_cores": usable_cores()}
    split_counts = {name: int((samples.split == i).sum()) for i, name in enumerate(SPLITS)}
    split_counts["dropped_buffer"] = int((samples.split == -1).sum())
    split_counts["dropped_never_clear"] = int(samples.dropped_unseen)
    (work / runs.LABELS).write_text(json.dumps({"path": str(labels.path), "fingerprint": labels.fingerprint, "counts": labels.counts(), "split": split_counts}, indent=2))
    (work / runs.METRICS).write_text(json.dumps(trained.metrics, indent=2))
    runs.write_points(work, labels.points, sample_splits(samples))
    runs.write_lineage(work, record)
    if resolved_config is not None:
        (work / "config.yaml").write_text(resolved_config)
    save_artefact(work / "model", model_card(cfg, samples, trained, labels), trained.members, trained.distilled)
    # Beside the artefact, so that a map's assessment can show how the model's probabilities held up.
    write_validation(work / "model", trained.metrics["validation"])
    # Swap in the new run; the old one goes only once the new one is in place.
    old = final.with_name(final.name + ".old")
    if old.exists():
        shutil.rmtree(old)
    if final.exists():
        os.replace(final, old)
    os.replace(work, final)
    if old.exists():
        shutil.rmtree(old)
    return final
