"""Structured configuration: the schema behind the YAML files in ``configs/``.

Hydra validates every YAML file against these dataclasses, so a misspelt key
is an error rather than a silent default. Library code takes these typed
objects (never a DictConfig); :func:`to_object` converts at the edge.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, TypeVar

from omegaconf import MISSING, DictConfig, OmegaConf
from omegaconf.errors import OmegaConfBaseException

from plantation.errors import ConfigError

T = TypeVar("T")


@dataclass
class ScalingRule:
    """Reflectance = stored value × scale + offset, for dates from ``start`` on.

    ``start`` is an ISO date (YYYY-MM-DD) or None for "from the first date".
    Several rules describe processing changes, e.g. a fixed −0.1 offset added
    by a new processing baseline from a given day.
    """

    start: str | None = None
    scale: float = 1.0
    offset: float = 0.0


@dataclass
class MaskConfig:
    """Where the quality (QA) information of each date lives.

    For a GeoTIFF folder, ``band`` is the 1-based band number of the QA band
    inside every file (after the reflectance bands). For a cube, ``variable``
    names a (time, y, x) integer variable. A pixel is invalid when any bit in
    ``invalid_bits`` (0 = least significant) is set.
    """

    band: int | None = None
    variable: str | None = None
    invalid_bits: list[int] = field(default_factory=lambda: [0, 1, 2])


@dataclass
class TileConfig:
    """One tile of a region: a folder of dated GeoTIFFs or one NetCDF/Zarr cube."""

    name: str = MISSING
    path: str = MISSING
    #: Optional truth rasters (simulated regions only), used by benchmarks.
    truth: str | None = None


@dataclass
class LabelsConfig:
    """Reference points labelled by interpreters."""

    path: str | None = None
    #: CRS of the ``x``/``y`` columns of a CSV file (vector files carry their own).
    crs: str | None = "EPSG:4326"


@dataclass
class RegionConfig:
    """Everything the tool needs to know about one region's imagery."""

    name: str = MISSING
    #: ``geotiff_folder`` (one GeoTIFF per date, date in the file name) or ``cube``.
    format: str = "geotiff_folder"
    tiles: list[TileConfig] = field(default_factory=list)
    #: Band roles in file order; indices need blue, red, nir, swir1, swir2.
    bands: list[str] = field(default_factory=lambda: ["blue", "green", "red", "nir", "swir1", "swir2"])
    #: Stored value meaning "no data"; None = take it from each file.
    nodata: float | None = None
    mask: MaskConfig = field(default_factory=MaskConfig)
    scaling: list[ScalingRule] = field(default_factory=lambda: [ScalingRule()])
    #: Name of the reflectance variable in a cube.
    cube_variable: str = "reflectance"
    labels: LabelsConfig = field(default_factory=LabelsConfig)
    #: Spatial chunk (pixels) for lazy reading: bounds memory per task.
    chunk: int = 512


@dataclass
class SamplesConfig:
    """How samples are cut from the imagery."""

    neighbourhood: int = 5
    indices: list[str] = field(default_factory=lambda: ["NDVI", "EVI", "NBR", "NDMI"])


@dataclass
class SplitConfig:
    """Spatial blocks dealt to train / validation / test."""

    block: int = 32
    shares: list[float] = field(default_factory=lambda: [0.7, 0.15, 0.15])
    seed: int = 0


@dataclass
class ModelConfig:
    """Network size and ensemble."""

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
    class_weighting: str = "inverse_sqrt"
    augment: bool = True
    date_dropout: float = 0.1
    threads: int = 0


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


def register_configs() -> None:
    """Register the schemas with Hydra's ConfigStore (call before composing)."""
    from hydra.core.config_store import ConfigStore

    from plantation.simulate import SimulationConfig

    cs = ConfigStore.instance()
    cs.store(group="region", name="region_schema", node=RegionConfig)
    cs.store(group="sim", name="sim_schema", node=SimulationConfig)
    cs.store(group="network", name="network_schema", node=ModelConfig)
    cs.store(group="training", name="training_schema", node=TrainingConfig)
    cs.store(group="trainer", name="trainer_schema", node=TrainerConfig)


def to_object(cfg: Any, cls: type[T]) -> T:
    """Turn a (possibly partial) DictConfig into a validated dataclass instance.

    Raises:
        ConfigError: a key is unknown, a value has the wrong type, or a
            required value (``???``) is missing.
    """
    try:
        # Merge from plain containers: a key forced in with ``+key=`` is then
        # checked against the schema like any other.
        src = OmegaConf.to_container(cfg, resolve=True) if isinstance(cfg, DictConfig) else cfg
        merged = OmegaConf.merge(OmegaConf.structured(cls), src)
        obj = OmegaConf.to_object(merged)
    except OmegaConfBaseException as exc:
        key = getattr(exc, "full_key", None)
        raise ConfigError(f"{cls.__name__}: {key + ': ' if key else ''}{str(exc).splitlines()[0]}") from exc
    if not isinstance(obj, cls):
        raise ConfigError(f"expected a {cls.__name__} configuration, got {type(obj).__name__}")
    return obj
