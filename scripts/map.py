"""Map a region's tiles with a trained model: `python scripts/map.py model=<run> region=<name>`."""

import hydra
from omegaconf import DictConfig

from plantation.cli import guarded
from plantation.config import register_configs, to_object

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="map")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.mapping import NOTICE, MapConfig, run

    summary = run(to_object(cfg, MapConfig))
    print("\n".join(summary.lines()))
    print(f"maps in {summary.out_dir} (open the .tif files in QGIS; summary.json has these totals)")
    print(NOTICE)


if __name__ == "__main__":
    main()
