"""Mapping speed and memory side by side: `python scripts/benchmark_speed.py` writes bench/results/speed.json."""

import json
import os
from pathlib import Path

import hydra
from omegaconf import DictConfig
from plantation.cli.compose import register_configs

from plantation.cli.errors import guarded
from plantation.config import to_object

register_configs()


@hydra.main(version_base="1.3", config_path="../configs", config_name="benchmark_speed")
@guarded
def main(cfg: DictConfig) -> None:
    from plantation.benchmarks.speed import SpeedConfig, run

    sc = to_object(cfg, SpeedConfig)
    res = run(sc)
    out = Path(sc.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".partial")
    tmp.write_text(json.dumps(res, indent=1) + "\n")
    os.replace(tmp, out)
    print(json.dumps(res, indent=1))
    print(f"written to {out}")


if __name__ == "__main__":
    main()
