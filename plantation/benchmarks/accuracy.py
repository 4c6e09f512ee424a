"""Side-by-side accuracy benchmark: the network against two classical baselines.

``run(cfg)`` trains all three methods on the same samples and splits of the
training region, then maps a held-out simulated region (another seed: another
landscape, other clouds) wall to wall and scores each map against that
region's complete truth rasters (:mod:`plantation.scores`).

The reference sample is stratified, so every method's probabilities reflect
the sample's outcome frequencies, not the map's. With ``prior_adjust`` the
model's and the trees' probabilities are re-weighted to the held-out
region's frequencies estimated from its unlabelled pixels by EM (Saerens et
al. 2002, see :mod:`plantation.model.calibration`); the truth is never used.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
import time
from dataclasses import asdict, dataclass, field, fields, replace
from pathlib import Path
from typing import Any

import numpy as np
import rasterio
import torch

from plantation.benchmarks.baselines import AnnualTrees, BreakRule, annual_features
from plantation.benchmarks.scores import map_scores
from plantation.errors import ConfigError
from plantation.imagery.config import RegionConfig, TileConfig
from plantation.imagery.region import TileStack, open_region
from plantation.model import artefact as art_io
from plantation.model.calibration import adjust_priors
from plantation.model.inference import predict_tile
from plantation.model.outcomes import Outcomes, summarise
from plantation.model.patches import PatchSet, features, year_of
from plantation.model.training import TrainConfig, fit, load_region_samples, model_card
from plantation.simulation.landscape import Landscape, build_landscape
from plantation.simulation.scenario import SimulationConfig, dates_of, decimal_year
from plantation.simulation.writer import tile_names, write_region


@dataclass
class ComparisonConfig(TrainConfig):
    """Schema of ``configs/benchmark_accuracy.yaml``: the training config plus the held-out region.

    ``out_dir`` and ``run_name`` of the training config are not used: the
    benchmark trains in a temporary folder.
    """

    eval_sim: SimulationConfig = field(default_factory=SimulationConfig)
    eval_dir: str = "bench/cache/eval_region"
    prior_adjust: bool = False
    window: int = 96
    out: str = "bench/results/accuracy.json"
    progress: bool = True
    #: Also keep the trained model artefact here (None: discard it).
    model_dir: str | None = None


def train_config(cfg: ComparisonConfig) -> TrainConfig:
    """The training part of a benchmark config."""
    return TrainConfig(**{f.name: getattr(cfg, f.name) for f in fields(TrainConfig)})


def ensure_region(sim: SimulationConfig, folder: Path, progress: bool) -> Path:
    """Simulate the evaluation region unless ``folder`` already holds this exact simulation."""
    stamp = folder / "simulation.json"
    want = json.dumps(asdict(sim), indent=2, sort_keys=True) + "\n"
    if stamp.is_file() and stamp.read_text() == want:
        return folder
    return write_region(sim, folder, progress=progress)


def eval_region_config(train_region: RegionConfig, sim: SimulationConfig, folder: Path) -> RegionConfig:
    """The training region's reading rules, pointed at the simulated tiles."""
    tiles = [TileConfig(name=n, path=str(folder / n / "imagery"), truth=str(folder / n / "truth.tif")) for n, _, _ in tile_names(sim)]
    return replace(train_region, name=f"{sim.name}_seed{sim.seed}", tiles=tiles)


def centre_series(s: PatchSet) -> tuple[np.ndarray, np.ndarray]:
    """(n, time, channel) values and (n, time) validity of each sample's centre pixel."""
    r = s.x.shape[-1] // 2
    return s.x[:, :, :, r, r], s.valid[:, :, r, r]


def tile_series(stack: TileStack, bands: list[str], index_names: list[str]) -> tuple[np.ndarray, np.ndarray]:
    """Every pixel's series: (pixels, time, channel) and (pixels, time), row-major."""
    refl = stack.reflectance.values.astype(np.float32)
    valid = stack.valid.values.astype(bool)
    f = features(refl, bands, index_names)  # (t, c, y, x)
    t, c, h, w = f.shape
    return f.transpose(2, 3, 0, 1).reshape(h * w, t, c), valid.transpose(1, 2, 0).reshape(h * w, t)


def _truth(tile: TileConfig) -> tuple[np.ndarray, np.ndarray]:
    if not tile.truth:
        raise ConfigError(f"tile {tile.name!r}: the evaluation region needs truth rasters")
    with rasterio.open(tile.truth) as src:
        return src.read(1), src.read(2)


def conversion_observability(land: Landscape, date_years: np.ndarray, stack: TileStack, tile: TileConfig) -> tuple[np.ndarray, np.ndarray]:
    """Which truly converted pixels the imagery shows cleared: a ceiling for every method.

    For each pixel, the first date after its clearing (from the simulated
    landscape) on which it was observed clear. A conversion never seen
    cleared cannot be detected; one whose first clear view after clearing
    falls in a later year can only have its year inferred.

    Args:
        land: the simulated region's landscape (clearing times per parcel).
        date_years: (time,) decimal year of each date.

    Returns:
        (seen, first_view_in_onset_year): bool arrays of the tile's shape,
        False outside true conversions.
    """
    t = np.asarray(date_years, dtype=np.float64)
    with rasterio.open(str(tile.truth)) as src:
        cls, onset, parcel = src.read(1), src.read(2), src.read(5)
    conv = cls == 2
    after = stack.valid.values[:, conv] & (t[:, None] > land.t_event[parcel[conv]][None, :])
    has = after.any(0)
    first_year = np.floor(t[after.argmax(0)]).astype(int)
    seen = np.zeros(cls.shape, bool)
    in_year = np.zeros(cls.shape, bool)
    seen[conv] = has
    in_year[conv] = has & (first_year == onset[conv])
    return seen, in_year


def run(cfg: ComparisonConfig) -> dict[str, Any]:
    """Train, map and score the three methods; write ``cfg.out`` (JSON) atomically."""
    if cfg.trainer.devices > 1 or cfg.trainer.num_nodes > 1:
        # DDP re-runs the script in more processes; they would all simulate, map and write.
        raise ConfigError("trainer: the accuracy benchmark trains in one process; use trainer=cpu (DDP is for `plantation train`)")
    torch.set_num_threads(cfg.training.threads or (os.cpu_count() or 1))
    tc = train_config(cfg)
    _, labels, samples = load_region_samples(tc)
    outcomes: Outcomes = samples.outcomes
    train = samples.part("train")
    date_year = year_of(samples.dates) - year_of(samples.dates).min()
    ny = len(outcomes.years)
    results: dict[str, Any] = {}

    with tempfile.TemporaryDirectory(prefix="plantation-bench-") as tmp:
        t0 = time.perf_counter()
        trained = fit(samples, tc, Path(tmp))
        model_seconds = time.perf_counter() - t0
        art_io.save(Path(tmp) / "model", model_card(tc, samples, trained, labels), trained.members)
        artefact = art_io.load(Path(tmp) / "model")
        if cfg.model_dir:
            shutil.copytree(Path(tmp) / "model", cfg.model_dir, dirs_exist_ok=True)

    xs, vs = centre_series(train)
    t0 = time.perf_counter()
    trees = AnnualTrees(seed=cfg.training.seed).fit(annual_features(xs, vs, date_year, ny, samples.channels), train.target, outcomes.size)
    trees_seconds = time.perf_counter() - t0
    t0 = time.perf_counter()
    nbr, static = BreakRule.series(xs, vs, date_year, ny, samples.channels)
    rule = BreakRule().fit(nbr, static, train.target)
    rule_seconds = time.perf_counter() - t0

    folder = ensure_region(cfg.eval_sim, Path(cfg.eval_dir), cfg.progress)
    region = eval_region_config(cfg.region, cfg.eval_sim, folder)
    stacks = open_region(region)
    probs: dict[str, list[np.ndarray]] = {"model": [], "trees": [], "breakpoint": []}
    truth_label, truth_year, seen_parts, in_year_parts = [], [], [], []
    land = build_landscape(cfg.eval_sim)
    date_years = np.array([decimal_year(d) for d in dates_of(cfg.eval_sim)])
    map_seconds = {"model": 0.0, "trees": 0.0, "breakpoint": 0.0}
    for st, tile in zip(stacks, region.tiles, strict=True):
        t0 = time.perf_counter()
        tp = predict_tile(artefact, st, window=cfg.window, progress=cfg.progress, scaling=region.scaling)
        map_seconds["model"] += time.perf_counter() - t0
        probs["model"].append(tp.probs.reshape(-1, outcomes.size))
        x, v = tile_series(st, list(cfg.region.bands), list(cfg.patches.indices))
        t0 = time.perf_counter()
        probs["trees"].append(trees.predict_proba(annual_features(x, v, date_year, ny, samples.channels)))
        map_seconds["trees"] += time.perf_counter() - t0
        t0 = time.perf_counter()
        n_, s_ = BreakRule.series(x, v, date_year, ny, samples.channels)
        probs["breakpoint"].append(rule.predict_proba(n_, s_, outcomes))
        map_seconds["breakpoint"] += time.perf_counter() - t0
        cls, onset = _truth(tile)
        truth_label.append(cls.ravel())
        truth_year.append(onset.ravel())
        seen_t, in_year_t = conversion_observability(land, date_years, st, tile)
        seen_parts.append(seen_t.ravel())
        in_year_parts.append(in_year_t.ravel())
    true_label = np.concatenate(truth_label)
    true_year = np.concatenate(truth_year)
    seen = np.concatenate(seen_parts)
    n_conv = max(int((true_label == 2).sum()), 1)
    train_prior = np.asarray(artefact.card.calibration.train_prior)
    seconds = {"model": model_seconds, "trees": trees_seconds, "breakpoint": rule_seconds}
    for name, parts in probs.items():
        p = np.concatenate(parts)
        extra: dict[str, Any] = {}
        if name != "breakpoint":
            # Report the other choice of prior handling beside the chosen one.
            p_adj, est = adjust_priors(p, train_prior)
            other = summarise(p if cfg.prior_adjust else p_adj, outcomes.years, cutoff_year=cfg.calibration.cutoff_year, level=cfg.calibration.interval_level)
            extra["ece_without_prior_adjust" if cfg.prior_adjust else "ece_with_prior_adjust"] = map_scores(other, true_label, true_year)["ece"]
            extra["em_estimated_conversion_share"] = round(float(est[3:].sum()), 4)
            if cfg.prior_adjust:
                p = p_adj
        summ = summarise(p, outcomes.years, cutoff_year=cfg.calibration.cutoff_year, level=cfg.calibration.interval_level)
        sc = map_scores(summ, true_label, true_year, has_interval=name != "breakpoint", has_probability=name != "breakpoint")
        seen_sc = map_scores(summ, np.where(seen | (true_label != 2), true_label, 0), np.where(seen, true_year, 0), has_interval=name != "breakpoint")
        sc["on_conversions_seen_cleared"] = {k: seen_sc[k] for k in ("year_exact", "year_within1", "interval80_coverage")}
        sc.update(extra)
        sc["train_seconds"] = round(seconds[name], 1)
        sc["map_seconds"] = round(map_seconds[name], 1)
        sc["n_train_labels"] = len(train)
        results[name] = sc
    results["model"]["members"] = len(artefact.members)
    results["model"]["temperature"] = round(artefact.card.calibration.temperature, 4)
    results["model"]["test_split"] = trained.metrics.get("test")
    results["breakpoint"]["params"] = rule.params_
    report = {
        "eval_region": {
            "name": region.name,
            "seed": cfg.eval_sim.seed,
            "tiles": len(stacks),
            "pixels": int(true_label.size),
            "true_conversion_share": round(float((true_label == 2).mean()), 4),
            "conversions_in_last_year": round(float(((true_label == 2) & (true_year == max(outcomes.years))).sum() / max((true_label == 2).sum(), 1)), 4),
            # Shares of true conversions seen clear after clearing at all, and
            # first seen so in the onset year: ceilings for every method.
            "conversions_seen_cleared": round(float(seen.sum() / n_conv), 4),
            "conversions_first_seen_in_onset_year": round(float(np.concatenate(in_year_parts).sum() / n_conv), 4),
        },
        "train_region": cfg.region.name,
        "labels_fingerprint": labels.fingerprint,
        "prior_adjust": cfg.prior_adjust,
        "threads": torch.get_num_threads(),
        "methods": results,
    }
    out = Path(cfg.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    tmpf = out.with_name(out.name + ".partial")
    tmpf.write_text(json.dumps(report, indent=2) + "\n")
    os.replace(tmpf, out)
    return report
