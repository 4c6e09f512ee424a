"""Train a conversion-year model: `python scripts/train.py region=toy`."""

import os

import hydra
from omegaconf import DictConfig, OmegaConf
from plantation.cli.compose import register_configs

from plantation.cli.errors import guarded
from plantation.config import to_object

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="train")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.model.training import TrainConfig, run

    out = run(to_object(cfg, TrainConfig), resolved_config=OmegaConf.to_yaml(cfg, resolve=True))
    if os.environ.get("LOCAL_RANK", "0") == "0":  # processes started by DDP stay quiet
        print(f"model written to {out}/model (metrics in {out}/metrics.json)")


if __name__ == "__main__":
    main()
