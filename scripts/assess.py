"""Assess a map from its interpreted sample: `python scripts/assess.py samples=<filled file> map=<mapped region>`."""

import hydra
from omegaconf import DictConfig, OmegaConf
from plantation.cli.compose import register_configs

from plantation.cli.errors import guarded
from plantation.config import to_object

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="assess")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.assessment.assess import AssessConfig, run
    from plantation.mapping.folder import NOTICE

    run(to_object(cfg, AssessConfig), resolved_config=OmegaConf.to_yaml(cfg, resolve=True))
    print(NOTICE)


if __name__ == "__main__":
    main()
