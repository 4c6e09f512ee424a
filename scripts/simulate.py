"""Simulate a region: `python scripts/simulate.py [sim=toy] [out=toy_tiles]`."""

import hydra
from omegaconf import DictConfig
from plantation.cli.compose import register_configs

from plantation.cli.errors import guarded
from plantation.config import to_object

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="simulate")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.simulation.landscape import SimulationConfig, write_region

    out = write_region(to_object(cfg.sim, SimulationConfig), cfg.out, progress=cfg.progress)
    print(f"simulated region written to {out}/")


if __name__ == "__main__":
    main()
