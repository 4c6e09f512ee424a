"""The verbs of the ``plantation`` command: what each job is called, its config, and how its result is printed.

A verb's handler takes the composed configuration, turns it into the job's
typed config and runs the job. Each handler imports its job when it runs,
so that ``plantation --help`` and the jobs that never touch the network
(sample, assess, farm plots) start without loading torch.
"""

from __future__ import annotations

import json
import os
import sys
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

from omegaconf import DictConfig, OmegaConf

from plantation.config import to_object
from plantation.errors import PlantationError


@dataclass(frozen=True)
class Verb:
    """One job of the command."""

    name: str
    #: Its file in configs/ (without .yaml).
    config: str
    #: One line for ``plantation --help``.
    summary: str
    handler: Callable[[DictConfig], None]


def _resolved(cfg: DictConfig) -> str:
    return OmegaConf.to_yaml(cfg, resolve=True)


def survey(cfg: DictConfig) -> None:
    from plantation.reference.survey import SurveyConfig, run

    out = run(to_object(cfg, SurveyConfig))
    print(f"survey written to {out}/ (survey.json, clear_count_*.tif, labels.gpkg, index_series.png, clear_views.png)")


def train(cfg: DictConfig) -> None:
    from plantation.model.training import TrainConfig, run

    out = run(to_object(cfg, TrainConfig), resolved_config=_resolved(cfg))
    if os.environ.get("LOCAL_RANK", "0") == "0":  # processes started by DDP stay quiet
        print(f"model written to {out}/model (metrics in {out}/metrics.json)")
        dist = json.loads((out / "metrics.json").read_text()).get("distillation")
        if dist:
            a = dist["validation"]
            verdict = "kept: maps run it alone" if dist["within_tolerance"] else f"not kept (tolerance {dist['tolerance']['mean_tv_distance']}): maps run every member"
            print(f"distilled network: mean distance to the ensemble {a['mean_tv_distance']} on validation, same most probable outcome {a['same_most_probable']:.1%}; {verdict}")


def retrain(cfg: DictConfig) -> None:
    from plantation.retraining.retrain import RetrainConfig, run

    result = run(to_object(cfg, RetrainConfig), resolved_config=_resolved(cfg))
    if os.environ.get("LOCAL_RANK", "0") == "0":
        print("\n".join(result.lines()[len(result.diff_lines) :]))


def suggest(cfg: DictConfig) -> None:
    from plantation.retraining.suggest import SuggestConfig, run

    result = run(to_object(cfg, SuggestConfig))
    print("\n".join(result.lines()))


def list_runs(cfg: DictConfig) -> None:
    from plantation.model.runs import list_runs as find
    from plantation.model.runs import runs_table

    print("\n".join(runs_table(find(cfg.out_dir))))


def map_region(cfg: DictConfig) -> None:
    from plantation.mapping.catalog import COLLECTION
    from plantation.mapping.folder import NOTICE
    from plantation.mapping.job import MapConfig, run

    summary = run(to_object(cfg, MapConfig))
    print("\n".join(summary.lines()))
    print(f"maps in {summary.out_dir} (open the .tif files in QGIS; summary.json has these totals)")
    print(f"STAC collection {Path(summary.out_dir) / COLLECTION} (the whole region as one layer set in QGIS or any STAC client)")
    print(NOTICE)


def sample(cfg: DictConfig) -> None:
    from plantation.assessment.design import DesignConfig, run

    run(to_object(cfg, DesignConfig), resolved_config=_resolved(cfg))


def _report(out_dir: Path, map_dir: Path | None = None) -> None:
    from plantation.report.page import build_report

    try:
        print(f"report   {build_report(out_dir, map_dir=map_dir)}")
    except PlantationError as exc:
        # The job's own outputs are complete; a report that cannot be built does not undo them.
        print(f"report not built: {exc}", file=sys.stderr)


def assess(cfg: DictConfig) -> None:
    from plantation.assessment.assess import AssessConfig, run
    from plantation.mapping.folder import NOTICE

    acfg = to_object(cfg, AssessConfig)
    doc = run(acfg, resolved_config=_resolved(cfg))
    if acfg.report:
        _report(Path(acfg.out_dir), Path(doc["map_dir"]))
    print(NOTICE)


def recalibrate(cfg: DictConfig) -> None:
    from plantation.assessment.recalibrate import RecalibrateConfig, run

    result = run(to_object(cfg, RecalibrateConfig))
    print("\n".join(result.lines()))


def farmplots(cfg: DictConfig) -> None:
    from plantation.farmplots.cutoff import PlotsConfig, run
    from plantation.mapping.folder import NOTICE

    result = run(to_object(cfg, PlotsConfig))
    print("\n".join(result.lines()))
    for kind, path in result.files.items():
        print(f"{kind:<8} {path}")
    if result.evidence is not None:
        print(f"evidence {result.evidence.folder}/ ({len(result.evidence.pages)} pages)")
    print(NOTICE)
    _report(result.out_dir)


def simulate(cfg: DictConfig) -> None:
    from plantation.simulation.scenario import SimulationConfig
    from plantation.simulation.writer import write_region

    out = write_region(to_object(cfg.sim, SimulationConfig), cfg.out, progress=cfg.progress)
    print(f"simulated region written to {out}/")


def _write_json(result: dict, dest: str) -> None:
    out = Path(dest)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.with_name(out.name + ".partial")
    tmp.write_text(json.dumps(result, indent=1) + "\n")
    os.replace(tmp, out)
    print(f"written to {out}")


def benchmark_accuracy(cfg: DictConfig) -> None:
    from plantation.benchmarks.accuracy import ComparisonConfig, run

    report = run(to_object(cfg, ComparisonConfig))
    keys = ("year_exact", "year_within1", "conversion_f1", "macro_f1", "ece", "mean_p_conversion", "forest_plot_after_share", "interval80_coverage")
    for region, r in report["regions"].items():
        print(f"{region}: medians over seeds {report['seeds']} (true conversion share {r['eval_region']['true_conversion_share']}, observable ceiling {r['observable_ceiling']})")
        print(f"{'method':<14}" + "".join(f"{k:>24}" for k in keys))
        for name, m in r["methods"].items():
            print(f"{name:<14}" + "".join(f"{str(m.get(k)):>24}" for k in keys))
    print(f"written to {cfg.out}")


def benchmark_speed(cfg: DictConfig) -> None:
    from plantation.benchmarks.speed import SpeedConfig, run

    sc = to_object(cfg, SpeedConfig)
    res = run(sc)
    print(json.dumps(res, indent=1))
    _write_json(res, sc.out)


def benchmark_labels(cfg: DictConfig) -> None:
    from plantation.benchmarks.labels import LabelsBenchConfig, run, summary_lines

    lc = to_object(cfg, LabelsBenchConfig)
    print("\n".join(summary_lines(run(lc))))
    print(f"written to {lc.out} and {lc.plot}")


def benchmark_read(cfg: DictConfig) -> None:
    from plantation.benchmarks.reading import ReadConfig, run

    rc = to_object(cfg, ReadConfig)
    res = run(rc)
    print(json.dumps(res, indent=1))
    for part, dest in (("memory", rc.result), ("compare", rc.compare.result)):
        if res[part] is not None:
            print(f"written to {dest}")


def benchmark_plots(cfg: DictConfig) -> None:
    from plantation.benchmarks.plotcheck import PlotCheckConfig, run, summary_lines

    pc = to_object(cfg, PlotCheckConfig)
    print("\n".join(summary_lines(run(pc))))
    print(f"written to {pc.result}")


def benchmark_evidence(cfg: DictConfig) -> None:
    from plantation.benchmarks.evidence import EvidenceBenchConfig, run, summary_lines

    ec = to_object(cfg, EvidenceBenchConfig)
    print("\n".join(summary_lines(run(ec))))
    print(f"written to {ec.result}")


def benchmark_faults(cfg: DictConfig) -> None:
    from plantation.benchmarks.faults import FaultsConfig, run

    fc = to_object(cfg, FaultsConfig)
    res = run(fc)
    print(f"{res['cases_held']} of {res['cases_tried']} cases held; {res['kills_survived']}/{res['kills_tried']} kills survived,", end=" ")
    print(f"{res['bad_inputs_refused']}/{res['bad_inputs_tried']} bad inputs refused, {res['outputs_corrupt']} corrupt outputs")
    print(f"written to {fc.result}")


def readme_figures(cfg: DictConfig) -> None:
    from plantation.benchmarks.readme import ReadmeConfig, run

    print("\n".join(run(to_object(cfg, ReadmeConfig))))


VERBS: dict[str, Verb] = {
    v.name: v
    for v in (
        Verb("survey", "survey", "summarise a region's imagery and labels: clear views, label counts, index series", survey),
        Verb("train", "train", "train and calibrate a conversion-year model for a region and export it", train),
        Verb("retrain", "retrain", "retrain from an earlier run on grown labels or imagery: label changes, kept splits, warm start, comparison", retrain),
        Verb("suggest", "suggest", "suggest points to label next, where a label teaches the model most (not a probability sample)", suggest),
        Verb("runs", "runs", "list training runs side by side: labels, years, test scores, parents", list_runs),
        Verb("map", "map", "map every tile of a region with a trained model to Cloud-Optimized GeoTIFFs", map_region),
        Verb("sample", "sample", "draw a stratified validation sample from a map for interpreters to label", sample),
        Verb("assess", "assess", "estimate accuracy and areas with confidence intervals from the labelled sample", assess),
        Verb("recalibrate", "recalibrate", "correct a written map's probabilities from its labelled sample (design-weighted recalibration)", recalibrate),
        Verb("farmplots", "farmplots", "say for each farm plot how much of it the map has converted after a cutoff", farmplots),
        Verb("simulate", "simulate", "write a simulated region (imagery, labels, plots, truth) from a seed", simulate),
        Verb("benchmark-accuracy", "benchmark_accuracy", "compare the model with the baselines on a held-out simulated region", benchmark_accuracy),
        Verb("benchmark-speed", "benchmark_speed", "time and measure the memory of mapping, side by side with the baselines", benchmark_speed),
        Verb("benchmark-labels", "benchmark_labels", "what to label next, wrong labels, rule labels, warm starts and a new year, scored on a held-out region", benchmark_labels),
        Verb("benchmark-read", "benchmark_read", "peak memory of reading a large stack window by window, and delivered product folders against pre-stacked GeoTIFFs", benchmark_read),
        Verb("benchmark-plots", "benchmark_plots", "check the farm-plot verdicts against the simulated region's truth", benchmark_plots),
        Verb("benchmark-evidence", "benchmark_evidence", "time drawing evidence pages for many flagged plots, with their peak memory", benchmark_evidence),
        Verb("benchmark-faults", "benchmark_faults", "kill runs, feed bad, broken and untrusted files, and check every one is survived or refused cleanly", benchmark_faults),
        Verb("readme-figures", "readme_figures", "rewrite the README's figure tables from the JSON the jobs wrote (check=true: only check)", readme_figures),
    )
}
