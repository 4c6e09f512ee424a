"""Draw a stratified validation sample from a mapped region: `python scripts/sample.py map=<mapped region>`."""

import hydra
from omegaconf import DictConfig, OmegaConf
from plantation.cli.compose import register_configs

from plantation.cli.errors import guarded
from plantation.config import to_object

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="sample")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.assessment.design import DesignConfig, run

    run(to_object(cfg, DesignConfig), resolved_config=OmegaConf.to_yaml(cfg, resolve=True))


if __name__ == "__main__":
    main()
