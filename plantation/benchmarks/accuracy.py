"""Side-by-side accuracy benchmark: the network against three classical baselines.

``run(cfg)`` trains every method (the network, a tuned and calibrated random
forest on yearly medians and minima, gradient-boosted trees, a break rule) on
the same samples and splits of the training region, for each training seed,
then maps a held-out simulated region (another seed: another landscape, other
clouds) wall to wall and scores each map against that region's complete
truth rasters (:mod:`plantation.benchmarks.scores`). Figures are medians over
the seeds, with their spread.

The reference sample over-samples conversion, so a method's probabilities
reflect the sample's outcome frequencies unless corrected. Every method with
probabilities goes through the chain a user runs, the same way for each:

1. the prior correction of the training config (``calibration.prior``; by
   default black-box shift estimation on the training region's unlabelled
   pixels), the network's inside training, the baselines' here with their
   own validation probabilities;
2. the year interval's mass recalibrated on the validation split so that it
   holds the nominal share of true years;
3. a simulated assessment: a stratified random sample of the held-out map
   (strata: the mapped classes, conversions split at the cutoff), labelled
   from the truth, and the design-weighted logistic recalibration of
   p_conversion and p_after_cutoff that ``plantation recalibrate`` fits.

The figures at the top of each method are of the map after all three; the
ones before step 3, and with the sample's mix (no correction), are kept
beside them. The truth is used only to label the assessment sample and to
score.

Fire in the clearing (:mod:`plantation.mapping.fire`) is scored on the
simulated region, whose truth raster has a ``fire`` band: the network's map
(its class and onset year) is attributed as ``plantation map`` attributes it
and scored against the truth (:func:`plantation.benchmarks.scores.fire_scores`:
``fire_balanced_accuracy`` over observed clearings, ``escaped_fire_area_ratio``),
under the model's ``fire``; the same attribution with the truth's own class
and onset (``fire_with_true_onsets`` in the region's facts) separates the
attribution's errors from the map's. ``fire_only=true`` scores only that,
without training, from the truth's onsets and, with ``fire_map=<folder>``,
from a map of the held-out region made by ``plantation map``, and writes
the figures into the ``fire`` entry of the simulated region in ``out``,
leaving the rest of the file as it was.
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

from plantation.benchmarks.baselines import AnnualForest, AnnualTrees, BreakRule, annual_features
from plantation.benchmarks.scores import false_conversion_rate, fire_scores, map_scores, per_class_f1
from plantation.benchmarks.semireal import SemiRealConfig, ensure_semireal_region, region_config
from plantation.benchmarks.semireal import simulation_config as semireal_simulation
from plantation.errors import ConfigError
from plantation.imagery.config import LabelsConfig, RegionConfig, TileConfig
from plantation.imagery.region import TileStack, open_region
from plantation.mapping.fire import FireRule, attribute, decimal_years, resolve_escaped
from plantation.mapping.folder import BAND, open_map
from plantation.model import artefact as art_io
from plantation.model.calibration import apply_recalibration, bbse_prior, expected_calibration_error, fit_recalibration, outcome_groups, reweight
from plantation.model.inference import predict_tile, read_window
from plantation.model.outcomes import Outcomes, Summary, mass_for_coverage, summarise
from plantation.model.patches import PatchSet, features, year_of
from plantation.model.training import TrainConfig, fit, interval_curve, load_region_samples, model_card, resolve_prior
from plantation.records import load_object, write_object
from plantation.simulation.landscape import Landscape, build_landscape
from plantation.simulation.scenario import EVENTS, FIRE_TRUTH, SimulationConfig, dates_of, decimal_year
from plantation.simulation.writer import tile_names, write_region


@dataclass
class ForestGrid:
    """The random forest's tuning grid (0 in max_depth: unlimited)."""

    n_estimators: list[int] = field(default_factory=lambda: [100, 300])
    max_depth: list[int] = field(default_factory=lambda: [8, 16, 0])
    max_features: list[float] = field(default_factory=lambda: [0.1, 0.3])

    def forest(self, seed: int = 0, n_jobs: int = 1) -> AnnualForest:
        """An untrained :class:`AnnualForest` that tunes over this grid."""
        depths = tuple(None if d == 0 else d for d in self.max_depth)
        return AnnualForest(n_estimators=tuple(self.n_estimators), max_depth=depths, max_features=tuple(self.max_features), seed=seed, n_jobs=n_jobs)


@dataclass
class SemiRealBench:
    """The semi-real benchmark region: one region built from ``train_seed`` to train on, another from ``eval_seed`` to map and score."""

    train_seed: int = 20131
    eval_seed: int = 77031
    size: int = 384
    years: int = 10
    dates_per_year: int = 6
    n_labels: int = 1500
    conversion_oversampling: float = 2.0
    dir: str = "bench/cache/semireal"


@dataclass
class AssessmentSim:
    """The simulated assessment sample each map is recalibrated from."""

    #: Points in all.
    n: int = 900
    #: Points at least in each stratum (all of a smaller stratum).
    min_per_stratum: int = 100
    #: Seed of the draw (added to the training seed).
    seed: int = 515


@dataclass
class ComparisonConfig(TrainConfig):
    """Schema of ``configs/benchmark_accuracy.yaml``: the training config plus the held-out region.

    ``out_dir`` and ``run_name`` of the training config are not used: the
    benchmark trains in a temporary folder.
    """

    eval_sim: SimulationConfig = field(default_factory=SimulationConfig)
    #: Benchmark regions to run: ``simulated`` (train on the region config, score on ``eval_sim``) and ``semi_real``.
    regions: list[str] = field(default_factory=lambda: ["simulated", "semi_real"])
    semi_real: SemiRealBench = field(default_factory=SemiRealBench)
    #: Training seeds; every figure is the median over them, with its spread.
    seeds: list[int] = field(default_factory=lambda: [0, 1, 2])
    forest: ForestGrid = field(default_factory=lambda: ForestGrid())
    #: Side of the square plots (pixels) of untouched forest for forest_plot_after_share.
    plot_px: int = 10
    eval_dir: str = "bench/cache/eval_region"
    assessment: AssessmentSim = field(default_factory=AssessmentSim)
    window: int = 96
    out: str = "bench/results/accuracy.json"
    progress: bool = True
    #: Also keep the trained model artefact here (None: discard it).
    model_dir: str | None = None
    #: Thresholds of the fire attribution scored (the mapping job's defaults).
    fire: FireRule = field(default_factory=FireRule)
    #: Score only fire in the clearing on the simulated held-out region, without training (see the module docstring).
    fire_only: bool = False
    #: With fire_only: a map of the held-out region made by `plantation map`, whose fire layers are scored too (None: the truth's onsets only).
    fire_map: str | None = None


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


def _truth(tile: TileConfig) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Class, onset year, event and event year bands of a tile's truth raster."""
    if not tile.truth:
        raise ConfigError(f"tile {tile.name!r}: the evaluation region needs truth rasters")
    with rasterio.open(tile.truth) as src:
        return src.read(1), src.read(2), src.read(3), src.read(4)


def _truth_fire(tile: TileConfig) -> np.ndarray | None:
    """The ``fire`` band (6) of a tile's truth raster, or None for truth rasters made before it (and semi-real regions)."""
    with rasterio.open(str(tile.truth)) as src:
        return src.read(6) if src.count >= 6 else None


def tile_fire(stack: TileStack, bands: list[str], label: np.ndarray, onset: np.ndarray, rule: FireRule) -> tuple[np.ndarray, np.ndarray]:
    """Fire codes and years of one tile from its whole series, as the mapping job attributes them (window halo aside)."""
    refl, valid = read_window(stack, 0, 0, stack.grid.height, stack.grid.width, 0)
    fw = attribute(refl, valid, decimal_years(stack.dates), bands, label == 2, onset, rule, forest=label == 1)
    return resolve_escaped(fw.code, fw.year, fw.candidate_year, onset, rule)


def region_fire_scores(stacks: list[TileStack], tiles: list[TileConfig], bands: list[str], labels: list[np.ndarray], onsets: list[np.ndarray], rule: FireRule) -> dict[str, Any] | None:
    """:func:`fire_scores` over a region's tiles for mapped class and onset arrays (one (h, w) pair per tile); None when its truth has no fire band."""
    parts: dict[str, list[np.ndarray]] = {k: [] for k in ("label", "code", "year", "true_label", "true_fire", "true_year")}
    for st, tile, lab, ons in zip(stacks, tiles, labels, onsets, strict=True):
        fire = _truth_fire(tile)
        if fire is None:
            return None
        code, year = tile_fire(st, bands, lab, ons, rule)
        cls, _, _, event_year = _truth(tile)
        for k, v in (("label", lab), ("code", code), ("year", year), ("true_label", cls), ("true_fire", fire), ("true_year", event_year)):
            parts[k].append(np.asarray(v).ravel())
    a = {k: np.concatenate(v) for k, v in parts.items()}
    return fire_scores(a["label"], a["code"], a["year"], a["true_label"], a["true_fire"], a["true_year"])


def escaped_fire_observability(stacks: list[TileStack], tiles: list[TileConfig], bands: list[str], rule: FireRule) -> float | None:
    """Share of the truly escaped-fire pixels whose series shows the fire at all: a ceiling for ``escaped_fire_area_ratio`` at full precision.

    A pixel shows it when NBR drops by at least ``rule.min_dnbr_escape``
    between two consecutive clear views, the later one in the fire's year or
    the next (the window the attribution looks in). None without true
    escaped fire or without the bands.
    """
    if any(b not in bands for b in ("nir", "swir2")):
        return None
    shown = total = 0
    for st, tile in zip(stacks, tiles, strict=True):
        fire = _truth_fire(tile)
        if fire is None:
            return None
        esc = fire == FIRE_TRUTH["escaped_fire"]
        if not esc.any():
            continue
        _, _, _, event_year = _truth(tile)
        refl, valid = read_window(st, 0, 0, st.grid.height, st.grid.width, 0)
        t = decimal_years(st.dates)[:, None]
        nir, swir2 = refl[:, bands.index("nir")][:, esc], refl[:, bands.index("swir2")][:, esc]
        ok = valid[:, esc]
        with np.errstate(invalid="ignore", divide="ignore"):
            n = np.where(ok, (nir - swir2) / (nir + swir2), np.nan)
        idx = np.where(ok, np.arange(len(t))[:, None], -1)
        prev = np.concatenate([np.full((1, idx.shape[1]), -1), np.maximum.accumulate(idx, axis=0)[:-1]])
        drop = np.where(ok & (prev >= 0), np.take_along_axis(n, np.clip(prev, 0, None), axis=0) - n, np.nan)
        y = event_year[esc][None, :]
        inside = (t >= y) & (t < y + 2)
        shown += int((np.where(inside & np.isfinite(drop), drop, -np.inf).max(axis=0) >= rule.min_dnbr_escape).sum())
        total += int(esc.sum())
    return round(shown / total, 4) if total else None


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


def _median_tree(parts: list[Any]) -> Any:
    """Median over seeds, leaf by leaf: numbers → median; dicts → per key; anything else → the first seed's value."""
    first = parts[0]
    if isinstance(first, dict):
        return {k: _median_tree([p.get(k) for p in parts if isinstance(p, dict)]) for k in first}
    nums = [p for p in parts if isinstance(p, int | float) and not isinstance(p, bool)]
    if nums and len(nums) == len(parts):
        return round(float(np.median(nums)), 4)
    return first


def _spread(parts: list[dict[str, Any]]) -> dict[str, list[float]]:
    """[min, max] over seeds of every top-level number."""
    out = {}
    for k in parts[0]:
        vals = [p.get(k) for p in parts]
        if all(isinstance(x, int | float) and not isinstance(x, bool) for x in vals):
            out[k] = [round(float(min(vals)), 4), round(float(max(vals)), 4)]
    return out


def untouched_forest_plots(true_label: np.ndarray, true_event: np.ndarray, shape: tuple[int, int], plot_px: int) -> np.ndarray:
    """Pixels (flattened, row-major) inside square plots of ``plot_px`` pixels whose every pixel is untouched stable forest."""
    lab = true_label.reshape(shape)
    ev = true_event.reshape(shape)
    h, w = (shape[0] // plot_px) * plot_px, (shape[1] // plot_px) * plot_px
    clean = ((lab == 1) & (ev == 0))[:h, :w].reshape(h // plot_px, plot_px, w // plot_px, plot_px).all(axis=(1, 3))
    keep = np.zeros(shape, bool)
    keep[:h, :w] = np.repeat(np.repeat(clean, plot_px, 0), plot_px, 1)
    return keep.ravel()


def _scores(summ: Any, truth: dict[str, np.ndarray], outcomes: Outcomes, cfg: ComparisonConfig, *, has_probability: bool) -> dict[str, Any]:
    """Every figure of one method on one region."""
    sc = map_scores(summ, truth["label"], truth["year"], has_interval=has_probability, has_probability=has_probability)
    seen = truth["seen"]
    seen_sc = map_scores(summ, np.where(seen | (truth["label"] != 2), truth["label"], 0), np.where(seen, truth["year"], 0), has_interval=has_probability)
    sc["on_conversions_seen_cleared"] = {k: seen_sc[k] for k in ("year_exact", "year_within1", "interval80_coverage")}
    p_conv = np.asarray(summ.p_conversion).ravel()
    p_after = np.asarray(summ.p_after_cutoff).ravel()
    after_true = (truth["label"] == 2) & (truth["year"] > cfg.calibration.cutoff_year)
    sc["ece_after_cutoff"] = round(float(expected_calibration_error(p_after, after_true)), 4)
    sc["mean_p_conversion"] = round(float(p_conv.mean()), 4)
    sc["true_conversion_share"] = round(float((truth["label"] == 2).mean()), 4)
    plots = truth["forest_plots"]
    sc["forest_plot_after_share"] = round(float(p_after[plots].mean()), 4) if plots.any() else None
    sc["per_class_f1"] = per_class_f1(summ, truth["label"])
    sc["false_conversion_rate"] = false_conversion_rate(np.asarray(summ.label).ravel() == 2, truth["event"], truth["event_year"], outcomes.years, EVENTS)
    return sc


def assessment_strata(summ: Summary, cutoff_year: int) -> np.ndarray:
    """Stratum of each pixel (flattened): its mapped class code, with conversions after ``cutoff_year`` apart (code 5)."""
    lab = np.asarray(summ.label).ravel().astype(np.int64)
    after = (lab == 2) & (np.asarray(summ.year).ravel() > cutoff_year)
    return np.where(after, 5, lab)


def draw_assessment(strata: np.ndarray, n: int, min_per_stratum: int, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """A stratified random sample without replacement: (pixel indices, design weights 1/π).

    Each stratum gets ``min_per_stratum`` points (all of a smaller one); the
    rest of ``n`` is shared in proportion to the strata's sizes, as the
    common compromise between proportional and equal allocation (Olofsson
    et al. 2014, section 5.1.4).
    """
    codes, sizes = np.unique(strata, return_counts=True)
    base = np.minimum(sizes, min_per_stratum)
    spare = max(n - int(base.sum()), 0)
    extra = np.floor(spare * sizes / sizes.sum()).astype(np.int64)
    alloc = np.minimum(base + extra, sizes)
    idx, wts = [], []
    for c, size, k in zip(codes, sizes, alloc, strict=True):
        members = np.flatnonzero(strata == c)
        pick = rng.choice(members, size=int(k), replace=False)
        idx.append(pick)
        wts.append(np.full(len(pick), size / k))
    return np.concatenate(idx), np.concatenate(wts)


def recalibrated(summ: Summary, truth: dict[str, np.ndarray], cfg: ComparisonConfig, seed: int) -> tuple[Summary, dict[str, Any]]:
    """``summ`` with p_conversion and p_after_cutoff recalibrated from a simulated assessment sample of the map, and what was fitted.

    The sample is labelled from the truth, as interpreters would label it;
    the fit is :func:`plantation.model.calibration.fit_recalibration`, the
    one ``plantation recalibrate`` applies to written maps. Unlike a written
    map (:func:`plantation.mapping.folder.recalibrate_stored`), p_after_cutoff
    is not capped at p_conversion here, and the probabilities are not
    rounded to the map's int16 codes.
    """
    a = cfg.assessment
    strata = assessment_strata(summ, cfg.calibration.cutoff_year)
    idx, w = draw_assessment(strata, a.n, a.min_per_stratum, np.random.default_rng(a.seed + seed))
    conv = truth["label"] == 2
    after = conv & (truth["year"] > cfg.calibration.cutoff_year)
    p_conv = np.asarray(summ.p_conversion, dtype=np.float64).ravel()
    p_after = np.asarray(summ.p_after_cutoff, dtype=np.float64).ravel()
    fitted: dict[str, Any] = {"n": len(idx), "strata": {str(int(c)): int((strata[idx] == c).sum()) for c in np.unique(strata)}}
    out = {}
    for name, p, y in (("p_conversion", p_conv, conv), ("p_after_cutoff", p_after, after)):
        if y[idx].min() == y[idx].max():
            # One outcome only in the sample: nothing to fit, keep the probabilities.
            out[name], fitted[name] = p, None
            continue
        coef = fit_recalibration(p[idx], y[idx], w)
        out[name] = apply_recalibration(p, coef)
        fitted[name] = [round(coef[0], 4), round(coef[1], 4)]
    shape = np.asarray(summ.p_conversion).shape
    return replace(summ, p_conversion=out["p_conversion"].reshape(shape).astype(np.float32), p_after_cutoff=out["p_after_cutoff"].reshape(shape).astype(np.float32)), fitted


def baseline_prior(source: str, network_prior: np.ndarray, train_prior: np.ndarray, val_probs: np.ndarray, val_target: np.ndarray, pixel_probs: np.ndarray) -> np.ndarray:
    """A baseline's target prior by the network's ``source``: BBSE with the baseline's own probabilities, else the network's (shares and inclusion do not depend on the classifier)."""
    if source == "bbse":
        return bbse_prior(val_probs, val_target, pixel_probs, train_prior, groups=outcome_groups(len(train_prior)))
    if source == "sample":
        return train_prior
    return network_prior


def training_pixels(stacks: list[TileStack], bands: list[str], index_names: list[str], n: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Series of up to ``n`` random pixels of the training region with at least one clear date: ((m, time, channel), (m, time))."""
    rng = np.random.default_rng(seed)
    xs, vs = [], []
    sizes = np.array([s.grid.height * s.grid.width for s in stacks], dtype=np.float64)
    for st, m in zip(stacks, rng.multinomial(n, sizes / sizes.sum()), strict=True):
        x, v = tile_series(st, bands, index_names)
        pick = rng.choice(len(x), size=min(int(m), len(x)), replace=False)
        keep = pick[v[pick].any(1)]
        xs.append(x[keep])
        vs.append(v[keep])
    return np.concatenate(xs), np.concatenate(vs)


def _headline(sc: dict[str, Any]) -> dict[str, Any]:
    return {k: sc[k] for k in ("ece", "ece_after_cutoff", "mean_p_conversion", "forest_plot_after_share")}


@dataclass
class HeldOut:
    """One benchmark region: the training config (its region and labels) and the held-out region scored wall to wall."""

    train: TrainConfig
    region: RegionConfig
    #: The held-out region's simulation (landscape and dates, for the observability ceiling).
    sim: SimulationConfig


def simulated_held_out(cfg: ComparisonConfig) -> HeldOut:
    """Train on the configured region (the toy region by default); score on the simulated ``eval_sim`` region."""
    folder = ensure_region(cfg.eval_sim, Path(cfg.eval_dir), cfg.progress)
    return HeldOut(train_config(cfg), eval_region_config(cfg.region, cfg.eval_sim, folder), cfg.eval_sim)


def semi_real_regions(sr: SemiRealBench, base: RegionConfig, progress: bool) -> dict[str, tuple[SemiRealConfig, RegionConfig]]:
    """The semi-real training (``train``) and held-out (``eval``) regions, built into ``sr.dir`` when absent, each with its labels file."""
    built = {}
    for role, seed in (("train", sr.train_seed), ("eval", sr.eval_seed)):
        shape = {"size": sr.size, "years": sr.years, "dates_per_year": sr.dates_per_year, "n_labels": sr.n_labels, "conversion_oversampling": sr.conversion_oversampling}
        scfg = SemiRealConfig(name=f"semireal_{role}", seed=seed, **shape)
        folder = ensure_semireal_region(scfg, Path(sr.dir) / role, progress=progress)
        region = region_config(scfg, folder, base=base)
        built[role] = (scfg, replace(region, labels=LabelsConfig(path=str(folder / "labels.csv"), crs="EPSG:4326")))
    return built


def semi_real_held_out(cfg: ComparisonConfig) -> HeldOut:
    """Train on a semi-real region built from ``train_seed`` and its labels; score on another built from ``eval_seed``."""
    built = semi_real_regions(cfg.semi_real, cfg.region, cfg.progress)
    tc = train_config(cfg)
    return HeldOut(replace(tc, region=built["train"][1]), built["eval"][1], semireal_simulation(built["eval"][0]))


def evaluate_seed(cfg: ComparisonConfig, held: HeldOut, seed: int) -> tuple[dict[str, dict[str, Any]], dict[str, Any]]:
    """Train every method with one training seed, map the held-out region, score each: ({method: scores}, region facts)."""
    tc = replace(held.train, training=replace(held.train.training, seed=seed))
    train_stacks, labels, samples = load_region_samples(tc)
    outcomes: Outcomes = samples.outcomes
    train, val = samples.part("train"), samples.part("val")
    date_year = year_of(samples.dates) - year_of(samples.dates).min()
    ny = len(outcomes.years)

    with tempfile.TemporaryDirectory(prefix="plantation-bench-") as tmp:
        t0 = time.perf_counter()
        trained = fit(samples, tc, Path(tmp), stacks=train_stacks, labels=labels)
        model_seconds = time.perf_counter() - t0
        art_io.save(Path(tmp) / "model", model_card(tc, samples, trained, labels), trained.members, trained.distilled)
        artefact = art_io.load(Path(tmp) / "model")
        if cfg.model_dir:
            shutil.copytree(Path(tmp) / "model", Path(cfg.model_dir) / f"seed{seed}", dirs_exist_ok=True)

    xs, vs = centre_series(train)
    xv, vv = centre_series(val)
    t0 = time.perf_counter()
    trees = AnnualTrees(seed=seed).fit(annual_features(xs, vs, date_year, ny, samples.channels), train.target, outcomes.size)
    trees_seconds = time.perf_counter() - t0
    t0 = time.perf_counter()
    forest = cfg.forest.forest(seed=seed, n_jobs=torch.get_num_threads())
    forest.fit(AnnualForest.features(xs, vs, date_year, ny, samples.channels), train.target, outcomes.size, val=(AnnualForest.features(xv, vv, date_year, ny, samples.channels), val.target))
    forest_seconds = time.perf_counter() - t0
    t0 = time.perf_counter()
    nbr, static = BreakRule.series(xs, vs, date_year, ny, samples.channels)
    rule = BreakRule().fit(nbr, static, train.target)
    rule_seconds = time.perf_counter() - t0

    # The network's corrections come with its card; the baselines get the same ones from their own probabilities.
    cal = artefact.card.calibration
    source = resolve_prior(tc.calibration, tc.region.labels)
    train_prior = np.asarray(cal.train_prior, dtype=np.float64)
    level = cfg.calibration.interval_level
    priors = {"model": np.asarray(cal.prior(), dtype=np.float64)}
    masses = {"model": cal.interval_mass(level)}
    val_probs = {
        "trees": trees.predict_proba(annual_features(xv, vv, date_year, ny, samples.channels)),
        "random_forest": forest.predict_proba(AnnualForest.features(xv, vv, date_year, ny, samples.channels)),
    }
    pixel_probs: dict[str, np.ndarray] = {}
    if source == "bbse":
        px, pv = training_pixels(train_stacks, list(tc.region.bands), list(cfg.patches.indices), tc.calibration.bbse_pixels, seed)
        pixel_probs = {
            "trees": trees.predict_proba(annual_features(px, pv, date_year, ny, samples.channels)),
            "random_forest": forest.predict_proba(AnnualForest.features(px, pv, date_year, ny, samples.channels)),
        }
    for name, pv_ in val_probs.items():
        priors[name] = baseline_prior(source, priors["model"], train_prior, pv_, val.target, pixel_probs.get(name, pv_))
        masses[name] = mass_for_coverage(*interval_curve(reweight(pv_, train_prior, priors[name]), val.target, outcomes), level)

    region = held.region
    stacks = open_region(region)
    # With a distilled network the model maps with it (the default); the full ensemble is mapped too, to show what distilling costs.
    methods = ("model", "random_forest", "trees", "breakpoint") + (("ensemble",) if artefact.distilled is not None else ())
    priors["ensemble"], masses["ensemble"] = priors["model"], masses["model"]
    probs: dict[str, list[np.ndarray]] = {m: [] for m in methods}
    map_seconds = dict.fromkeys(methods, 0.0)
    parts: dict[str, list[np.ndarray]] = {k: [] for k in ("label", "year", "event", "event_year", "seen", "in_year", "forest_plots")}
    land = build_landscape(held.sim)
    date_years = np.array([decimal_year(d) for d in dates_of(held.sim)])
    for st, tile in zip(stacks, region.tiles, strict=True):
        t0 = time.perf_counter()
        tp = predict_tile(artefact, st, window=cfg.window, progress=cfg.progress, scaling=region.scaling)
        map_seconds["model"] += time.perf_counter() - t0
        probs["model"].append(tp.probs.reshape(-1, outcomes.size))
        if "ensemble" in methods:
            t0 = time.perf_counter()
            tp = predict_tile(artefact, st, window=cfg.window, progress=cfg.progress, scaling=region.scaling, distilled=False)
            map_seconds["ensemble"] += time.perf_counter() - t0
            probs["ensemble"].append(tp.probs.reshape(-1, outcomes.size))
        x, v = tile_series(st, list(region.bands), list(cfg.patches.indices))
        t0 = time.perf_counter()
        probs["trees"].append(trees.predict_proba(annual_features(x, v, date_year, ny, samples.channels)))
        map_seconds["trees"] += time.perf_counter() - t0
        t0 = time.perf_counter()
        probs["random_forest"].append(forest.predict_proba(AnnualForest.features(x, v, date_year, ny, samples.channels)))
        map_seconds["random_forest"] += time.perf_counter() - t0
        t0 = time.perf_counter()
        n_, s_ = BreakRule.series(x, v, date_year, ny, samples.channels)
        probs["breakpoint"].append(rule.predict_proba(n_, s_, outcomes))
        map_seconds["breakpoint"] += time.perf_counter() - t0
        cls, onset, event, event_year = _truth(tile)
        seen_t, in_year_t = conversion_observability(land, date_years, st, tile)
        for k, arr in (("label", cls), ("year", onset), ("event", event), ("event_year", event_year), ("seen", seen_t), ("in_year", in_year_t)):
            parts[k].append(arr.ravel())
        parts["forest_plots"].append(untouched_forest_plots(cls.ravel(), event.ravel(), cls.shape, cfg.plot_px))
    truth = {k: np.concatenate(v) for k, v in parts.items()}
    n_conv = max(int((truth["label"] == 2).sum()), 1)
    seconds = {"model": model_seconds, "ensemble": model_seconds, "random_forest": forest_seconds, "trees": trees_seconds, "breakpoint": rule_seconds}
    results: dict[str, dict[str, Any]] = {}
    finals: dict[str, Summary] = {}
    for name in methods:
        p = np.concatenate(probs[name])
        if name == "breakpoint":
            summ = summarise(p, outcomes.years, cutoff_year=cfg.calibration.cutoff_year, level=level)
            sc = _scores(summ, truth, outcomes, cfg, has_probability=False)
        else:
            # The network's probabilities already carry its prior; undo it for the sample-mix figures.
            own = name in ("model", "ensemble")
            p_sample = reweight(p, priors["model"], train_prior) if own else p
            p_region = p if own else reweight(p, train_prior, priors[name])
            summ = summarise(p_region, outcomes.years, cutoff_year=cfg.calibration.cutoff_year, level=masses[name])
            final, fitted = recalibrated(summ, truth, cfg, seed)
            finals[name] = final
            sc = _scores(final, truth, outcomes, cfg, has_probability=True)
            sc["before_recalibration"] = _headline(_scores(summ, truth, outcomes, cfg, has_probability=True))
            as_sample = summarise(p_sample, outcomes.years, cutoff_year=cfg.calibration.cutoff_year, level=masses[name])
            sc["sample_prior"] = _headline(_scores(as_sample, truth, outcomes, cfg, has_probability=True))
            sc["recalibration"] = fitted
            sc["prior"] = {"source": source, "conversion_share": round(float(priors[name][3:].sum()), 4), "sample_conversion_share": round(float(train_prior[3:].sum()), 4)}
            sc["interval_mass"] = round(masses[name], 2)
        sc["train_seconds"] = round(seconds[name], 1)
        sc["map_seconds"] = round(map_seconds[name], 1)
        sc["n_train_labels"] = len(train)
        results[name] = sc
    if "ensemble" in results:
        ens = results.pop("ensemble")
        results["model"]["ensemble"] = {k: ens[k] for k in (*ENSEMBLE_KEYS, "map_seconds")}
        results["model"]["distillation"] = trained.metrics["distillation"]["validation"]
    # Fire in the clearing, attributed from the network's map (its class and onset year) as `plantation map` does.
    shapes = [(st.grid.height, st.grid.width) for st in stacks]
    cuts = np.cumsum([h * w for h, w in shapes])[:-1]
    per_tile = [[part.reshape(shape) for part, shape in zip(np.split(np.asarray(a).ravel(), cuts), shapes, strict=True)] for a in (finals["model"].label, finals["model"].year)]
    fire = region_fire_scores(stacks, region.tiles, list(region.bands), per_tile[0], per_tile[1], cfg.fire)
    if fire is not None:
        results["model"]["fire_balanced_accuracy"] = fire["fire_balanced_accuracy"]
        results["model"]["escaped_fire_area_ratio"] = fire["escaped_fire_area_ratio"]
        results["model"]["fire"] = fire
    results["model"]["networks"] = "distilled" if artefact.distilled is not None else "ensemble"
    results["model"]["members"] = len(artefact.members)
    results["model"]["temperature"] = round(artefact.card.calibration.temperature, 4)
    results["model"]["test_split"] = trained.metrics.get("test")
    results["random_forest"]["params"] = {k: str(v) for k, v in forest.params_.items()}
    results["random_forest"]["temperature"] = round(forest.temperature_, 4)
    results["breakpoint"]["params"] = rule.params_
    facts = {
        "name": region.name,
        "seed": held.sim.seed,
        "tiles": len(stacks),
        "pixels": int(truth["label"].size),
        "true_conversion_share": round(float((truth["label"] == 2).mean()), 4),
        "conversions_in_last_year": round(float(((truth["label"] == 2) & (truth["year"] == max(outcomes.years))).sum() / n_conv), 4),
        # Shares of true conversions seen clear after clearing at all, and
        # first seen so in the onset year: ceilings for every method.
        "observable_ceiling": round(float(truth["seen"].sum() / n_conv), 4),
        "conversions_first_seen_in_onset_year": round(float(truth["in_year"].sum() / n_conv), 4),
        "forest_plot_pixels": int(truth["forest_plots"].sum()),
        # The fire attribution with the truth's own class and onset: its errors without the map's.
        "fire_with_true_onsets": true_onset_fire(stacks, region, cfg.fire),
        # Share of the truly escaped-fire pixels the imagery shows burning at all: a ceiling for the escaped-fire area at full precision.
        "escaped_fire_observable": escaped_fire_observability(stacks, region.tiles, list(region.bands), cfg.fire),
        "train_region": held.train.region.name,
        "labels_fingerprint": labels.fingerprint,
    }
    return results, facts


def true_onset_fire(stacks: list[TileStack], region: RegionConfig, rule: FireRule) -> dict[str, Any] | None:
    """Fire scores of the held-out region attributed from the truth's class and onset year (None without a fire truth band)."""
    truths = [_truth(t) for t in region.tiles]
    return region_fire_scores(stacks, region.tiles, list(region.bands), [t[0] for t in truths], [t[1] for t in truths], rule)


def fire_only(cfg: ComparisonConfig) -> dict[str, Any]:
    """Score fire in the clearing on the simulated held-out region without training; merge the figures into ``cfg.out`` under ``regions.simulated.fire``.

    From the truth's class and onset always; from a map of the region
    (``cfg.fire_map``, made by ``plantation map``) when given: the fire
    layers it holds, or, for a map made before them, the attribution of its
    class and onset bands.
    """
    held = simulated_held_out(cfg)
    region = held.region
    stacks = open_region(region)
    out: dict[str, Any] = {
        "rule": asdict(cfg.fire),
        "fire_with_true_onsets": true_onset_fire(stacks, region, cfg.fire),
        "escaped_fire_observable": escaped_fire_observability(stacks, region.tiles, list(region.bands), cfg.fire),
    }
    if out["fire_with_true_onsets"] is None:
        raise ConfigError(f"{cfg.eval_dir}: the held-out region's truth rasters have no fire band; delete the folder so that it is simulated again")
    if cfg.fire_map:
        made = open_map(cfg.fire_map)
        mapped = {t.name: t for t in made.tiles}
        missing = [t.name for t in region.tiles if t.name not in mapped]
        if missing:
            raise ConfigError(f"fire_map: {cfg.fire_map} has no tile(s) {missing} of the held-out region {region.name}; map that region (eval_dir {cfg.eval_dir}) with `plantation map`")
        parts: dict[str, list[np.ndarray]] = {k: [] for k in ("label", "code", "year", "true_label", "true_fire", "true_year")}
        for st, tile in zip(stacks, region.tiles, strict=True):
            mt = mapped[tile.name]
            with rasterio.open(mt.path) as src:
                lab, onset = src.read(BAND["class"]), src.read(BAND["onset_year"])
                code, year = (src.read(BAND["fire"]), src.read(BAND["fire_year"])) if mt.has_fire else tile_fire(st, list(region.bands), lab, onset, cfg.fire)
            cls, _, _, event_year = _truth(tile)
            for k, v in (("label", lab), ("code", code), ("year", year), ("true_label", cls), ("true_fire", _truth_fire(tile)), ("true_year", event_year)):
                parts[k].append(np.asarray(v).ravel())
        a = {k: np.concatenate(v) for k, v in parts.items()}
        scores = fire_scores(a["label"], a["code"], a["year"], a["true_label"], a["true_fire"], a["true_year"])
        origin = {"folder": Path(cfg.fire_map).name, "model_sha256": made.model_sha256, "fire_layers": all(t.has_fire for t in made.tiles)}
        out.update({"fire_balanced_accuracy": scores["fire_balanced_accuracy"], "escaped_fire_area_ratio": scores["escaped_fire_area_ratio"], "map": origin, "from_map": scores})
    report: dict[str, Any] = load_object(Path(cfg.out), what="an accuracy benchmark result", again="run `plantation benchmark-accuracy` again") if Path(cfg.out).is_file() else {}
    report.setdefault("regions", {}).setdefault("simulated", {})["fire"] = out
    write_object(report, cfg.out, indent=2)
    return report


#: Figures kept of the full ensemble beside the distilled network's.
ENSEMBLE_KEYS = ("year_exact", "year_within1", "conversion_f1", "macro_f1", "ece", "interval80_coverage", "forest_plot_after_share", "per_class_f1")


def run(cfg: ComparisonConfig) -> dict[str, Any]:
    """Train, map and score every method for each training seed; write ``cfg.out`` (JSON) atomically.

    Every figure of a method is the median over ``cfg.seeds``, with the
    [min, max] over seeds in ``spread``; per-seed figures are kept in ``by_seed``.
    """
    if cfg.trainer.devices > 1 or cfg.trainer.num_nodes > 1:
        # DDP re-runs the script in more processes; they would all simulate, map and write.
        raise ConfigError("trainer: the accuracy benchmark trains in one process; use trainer=cpu (DDP is for `plantation train`)")
    if not cfg.seeds:
        raise ConfigError("seeds: give at least one training seed, e.g. seeds=[0,1,2]")
    torch.set_num_threads(cfg.training.threads or (os.cpu_count() or 1))
    if cfg.fire_only:
        return fire_only(cfg)
    builders = {"simulated": simulated_held_out, "semi_real": semi_real_held_out}
    unknown = [r for r in cfg.regions if r not in builders]
    if unknown or not cfg.regions:
        raise ConfigError(f"regions: {cfg.regions!r}; choose from {sorted(builders)}")
    regions = {}
    for name in cfg.regions:
        held = builders[name](cfg)
        per_seed = [evaluate_seed(cfg, held, seed) for seed in cfg.seeds]
        methods = {}
        for m in per_seed[0][0]:
            runs = [r[m] for r, _ in per_seed]
            methods[m] = _median_tree(runs) | {"seeds": list(cfg.seeds), "spread": _spread(runs), "by_seed": runs}
        facts = per_seed[0][1]
        regions[name] = {"eval_region": facts, "observable_ceiling": facts["observable_ceiling"], "methods": methods}
    report = {
        "regions": regions,
        "seeds": list(cfg.seeds),
        "assessment": asdict(cfg.assessment),
        "threads": torch.get_num_threads(),
    }
    write_object(report, cfg.out, indent=2)
    return report
