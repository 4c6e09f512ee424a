"""Accuracy benchmark, model vs. baselines: `python scripts/benchmark_accuracy.py`."""

import hydra
from omegaconf import DictConfig
from plantation.cli.compose import register_configs

from plantation.cli.errors import guarded
from plantation.config import to_object

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="benchmark_accuracy")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.benchmarks.accuracy import ComparisonConfig, run

    report = run(to_object(cfg, ComparisonConfig))
    keys = ("year_exact", "year_within1", "conversion_f1", "macro_f1", "year_mae", "ece", "interval80_coverage", "train_seconds")
    print(f"{'method':<11}" + "".join(f"{k:>20}" for k in keys))
    for name, m in report["methods"].items():
        print(f"{name:<11}" + "".join(f"{str(m.get(k)):>20}" for k in keys))
    print(f"written to {cfg.out}")


if __name__ == "__main__":
    main()
