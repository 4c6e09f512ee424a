"""Composing a job's configuration."""

from __future__ import annotations

from hydra.core.config_store import ConfigStore

from plantation.imagery.config import RegionConfig
from plantation.model.config import NetworkConfig, TrainerConfig, TrainingConfig
from plantation.simulation.landscape import SimulationConfig


def register_configs() -> None:
    """Register the schemas with Hydra's ConfigStore (call before composing)."""
    cs = ConfigStore.instance()
    cs.store(group="region", name="region_schema", node=RegionConfig)
    cs.store(group="sim", name="sim_schema", node=SimulationConfig)
    cs.store(group="network", name="network_schema", node=NetworkConfig)
    cs.store(group="training", name="training_schema", node=TrainingConfig)
    cs.store(group="trainer", name="trainer_schema", node=TrainerConfig)
