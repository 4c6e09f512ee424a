"""The farm-plot cutoff report: `python scripts/plots.py plots=<file> map=<mapped region> [cutoff=2020-12-31]`."""

import sys

import hydra
from omegaconf import DictConfig
from plantation.cli.compose import register_configs

from plantation.cli.errors import guarded
from plantation.config import to_object
from plantation.errors import PlantationError

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="plots")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.farmplots.cutoff import PlotsConfig, run
    from plantation.mapping.folder import NOTICE

    result = run(to_object(cfg, PlotsConfig))
    print("\n".join(result.lines()))
    for kind, path in result.files.items():
        print(f"{kind:<8} {path}")
    print(NOTICE)
    from plantation.report.page import build_report

    try:
        print(f"report   {build_report(result.out_dir)}")
    except PlantationError as exc:
        # The plot outputs are complete; a report that cannot be built does not undo them.
        print(f"report not built: {exc}", file=sys.stderr)


if __name__ == "__main__":
    main()
