"""Every config composes against its schema; typos are errors, not silent defaults."""

from __future__ import annotations

from pathlib import Path

import pytest

from plantation.cli.compose import compose_job
from plantation.config import to_object
from plantation.errors import ConfigError
from plantation.imagery.config import RegionConfig
from plantation.reference.survey import SurveyConfig
from plantation.simulation.scenario import SimulationConfig, check_config

CONFIGS = Path(__file__).resolve().parents[1] / "configs"


def _compose(name: str, overrides: list[str] | None = None):
    """Compose as the command does: the same checks, the same messages."""
    return compose_job(name, overrides or [], verb=name)


@pytest.mark.parametrize("region", sorted(p.stem for p in (CONFIGS / "region").glob("*.yaml")))
def test_every_region_config_composes(region):
    cfg = to_object(_compose("survey", [f"region={region}"]), SurveyConfig)
    assert isinstance(cfg.region, RegionConfig) and cfg.region.tiles


@pytest.mark.parametrize("sim", sorted(p.stem for p in (CONFIGS / "sim").glob("*.yaml")))
def test_every_sim_config_composes_and_checks(sim):
    cfg = to_object(_compose("simulate", [f"sim={sim}"]).sim, SimulationConfig)
    check_config(cfg)


def test_typo_in_override_is_an_error():
    with pytest.raises(ConfigError, match=r"^survey: unknown key 'region.nodat' \(did you mean 'region.nodata'\?\)"):
        _compose("survey", ["region.nodat=0"])
    # A key forced in with + gets the same answer, never the advice to add it.
    with pytest.raises(ConfigError, match="unknown key 'region.nodat'") as err:
        _compose("survey", ["+region.nodat=0"])
    assert "+" not in str(err.value)


def test_wrong_type_is_an_error():
    with pytest.raises(ConfigError, match="region.chunk"):
        _compose("survey", ["region.chunk=big"])
    with pytest.raises(ConfigError, match="chunk"):
        to_object({"name": "x", "chunk": "big"}, RegionConfig)


def test_sim_config_checks():
    with pytest.raises(ConfigError, match="cloud_share_by_month needs 12 values"):
        check_config(SimulationConfig(cloud_share_by_month=[0.5] * 11))
    with pytest.raises(ConfigError, match="label_shares: unknown label"):
        check_config(SimulationConfig(label_shares={"forest": 1.0}))


@pytest.mark.parametrize("trainer", sorted(p.stem for p in (CONFIGS / "trainer").glob("*.yaml")))
@pytest.mark.parametrize("network", sorted(p.stem for p in (CONFIGS / "network").glob("*.yaml")))
@pytest.mark.parametrize("training", sorted(p.stem for p in (CONFIGS / "training").glob("*.yaml")))
def test_every_training_config_group_composes_and_checks(trainer, network, training):
    from plantation.model.training import TrainConfig
    from plantation.model.training import check_config as check_train

    cfg = to_object(_compose("train", [f"trainer={trainer}", f"network={network}", f"training={training}"]), TrainConfig)
    check_train(cfg)
    assert cfg.run_name == f"{cfg.region.name}_seed{cfg.training.seed}"


def test_benchmark_config_composes_with_another_seed():
    from plantation.benchmarks.accuracy import ComparisonConfig

    cfg = to_object(_compose("benchmark_accuracy"), ComparisonConfig)
    sim = to_object(_compose("simulate").sim, SimulationConfig)
    assert cfg.eval_sim.seed != sim.seed and cfg.eval_sim.tile_size == sim.tile_size


def test_training_typos_are_errors():
    from plantation.model.training import TrainConfig

    with pytest.raises(ConfigError, match="network.hiden"):
        _compose("train", ["network.hiden=8"])
    with pytest.raises(ConfigError, match="hiden"):
        to_object(_compose("train", ["+network.hiden=8"]), TrainConfig)
    with pytest.raises(ConfigError, match="training.lr"):
        _compose("train", ["training.lr=fast"])


def test_map_config_composes_and_takes_a_model_path():
    from plantation.mapping.job import MapConfig, check_config

    cfg = to_object(_compose("map", ["model=somewhere/run", "engine.workers=2"]), MapConfig)
    check_config(cfg)
    assert cfg.model == "somewhere/run" and cfg.engine.workers == 2 and cfg.out_dir == f"outputs/maps/{cfg.region.name}"
    with pytest.raises(ConfigError, match="windw"):
        to_object(_compose("map", ["+windw=3"]), MapConfig)
