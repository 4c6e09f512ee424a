"""Survey a region's imagery and labels: `python scripts/survey.py region=toy`."""

import hydra
from omegaconf import DictConfig
from plantation.cli.compose import register_configs

from plantation.cli.errors import guarded
from plantation.config import to_object

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="survey")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.reference.survey import SurveyConfig, run

    out = run(to_object(cfg, SurveyConfig))
    print(f"survey written to {out}/ (survey.json, clear_count_*.tif, labels.gpkg, index_series.png, clear_views.png)")


if __name__ == "__main__":
    main()
