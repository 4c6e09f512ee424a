"""Assess a map from its interpreted sample: `python scripts/assess.py samples=<filled file> map=<mapped region>`."""

import hydra
from omegaconf import DictConfig, OmegaConf

from plantation.cli import guarded
from plantation.config import register_configs, to_object

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="assess")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.assess import AssessConfig, run
    from plantation.mapping import NOTICE

    run(to_object(cfg, AssessConfig), resolved_config=OmegaConf.to_yaml(cfg, resolve=True))
    print(NOTICE)


if __name__ == "__main__":
    main()
