"""Map a region's tiles with a trained model: `python scripts/map.py model=<run> region=<name>`."""

import hydra
from omegaconf import DictConfig
from plantation.cli.compose import register_configs

from plantation.cli.errors import guarded
from plantation.config import to_object

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="map")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.mapping.folder import NOTICE
    from plantation.mapping.job import MapConfig, run

    summary = run(to_object(cfg, MapConfig))
    print("\n".join(summary.lines()))
    print(f"maps in {summary.out_dir} (open the .tif files in QGIS; summary.json has these totals)")
    print(NOTICE)


if __name__ == "__main__":
    main()
