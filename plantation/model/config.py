"""Schemas of the training config groups: patches, split, network, training, trainer, calibration.

The files in ``configs/network/``, ``configs/training/`` and
``configs/trainer/`` are validated against these dataclasses.
"""

from __future__ import annotations

from dataclasses import dataclass, field


@dataclass
class PatchConfig:
    """How training patches are cut from the imagery around labelled points."""

    neighbourhood: int = 5
    indices: list[str] = field(default_factory=lambda: ["NDVI", "EVI", "NBR", "NDMI"])


@dataclass
class SplitConfig:
    """Spatial blocks dealt to train / validation / test."""

    block: int = 32
    shares: list[float] = field(default_factory=lambda: [0.7, 0.15, 0.15])
    seed: int = 0


@dataclass
class NetworkConfig:
    """Network size and ensemble."""

    date_width: int = 16
    amplitude: bool = True
    conv_width: int = 32
    hidden: int = 64
    dropout: float = 0.1
    members: int = 3


@dataclass
class TrainingConfig:
    """Optimisation."""

    seed: int = 0
    max_epochs: int = 40
    patience: int = 10
    batch_size: int = 64
    lr: float = 3e-3
    weight_decay: float = 1e-4
    loss: str = "ce"
    gce_q: float = 0.7
    sce_alpha: float = 0.1
    sce_beta: float = 1.0
    class_weighting: str = "inverse_sqrt"
    augment: bool = True
    date_dropout: float = 0.1
    threads: int = 0
    #: Pixels through the networks at once outside optimiser steps (lowered to fit ``memory_budget_mb`` when set).
    inference_batch: int = 512


@dataclass
class TrainerConfig:
    """Arguments of ``lightning.Trainer`` that a user may change."""

    accelerator: str = "cpu"
    devices: int = 1
    num_nodes: int = 1
    strategy: str = "auto"
    precision: str = "32-true"
    enable_progress_bar: bool = True
    log_every_n_steps: int = 10
    limit_train_batches: float = 1.0


@dataclass
class CalibrationConfig:
    """What the outputs say."""

    cutoff_year: int = 2020
    interval_level: float = 0.8
    conformal_alpha: float | None = 0.2
    #: Class mix the probabilities are for: ``sample`` (the reference
    #: sample's), ``shares`` (region.labels.population_shares), ``inclusion``
    #: (Hájek estimate from region.labels.inclusion_column), ``bbse``
    #: (estimated from the region's unlabelled pixels) or ``auto`` (shares if
    #: given, else inclusion if given, else bbse).
    prior: str = "auto"
    #: Unlabelled pixels drawn (seeded, across tiles) for ``prior=bbse``.
    bbse_pixels: int = 20000


@dataclass
class DistillationConfig:
    """One network distilled from the ensemble (see :mod:`plantation.model.distillation`)."""

    enabled: bool = True
    pixels: int = 4000
    max_epochs: int = 12
    patience: int = 3
    lr: float = 2e-3
    epistemic_weight: float = 1.0
    tolerance: float = 0.05


@dataclass
class SurrogateConfig:
    """Automatic labels from the index-drop rule (:mod:`plantation.reference.rule`) added to the training split."""

    #: Pixels drawn at random across the region and labelled by the rule (0: none).
    pixels: int = 0
    #: Loss weight of a rule label; an interpreter's label weighs 1.
    weight: float = 0.3
    #: Seed of the draw.
    seed: int = 0
