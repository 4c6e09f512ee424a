"""Labels benchmark: what to label next, labels that are wrong, labels from a rule, warm starts and a new year of imagery.

``run(cfg)`` trains on the semi-real training region (real forest texture
with simulated events, :mod:`plantation.benchmarks.semireal`) and scores every
model wall to wall on the held-out semi-real region against its complete
truth (:func:`plantation.benchmarks.scores.map_scores`). Labels are drawn
from a pool: ``pool`` pixels of the training region drawn the way the
region's interpreters' sample was (stratified by the true class, conversion
over-sampled) and labelled from the truth, as interpreters would label them.

* **Active learning** (per seed): ``start_labels`` pool points at random;
  then ``rounds`` rounds adding ``batch`` points, either the ones
  ``plantation suggest`` picks from the rest of the pool (its scoring and
  spread selection, :mod:`plantation.retraining.suggest`) or random ones;
  every round trains afresh on the labels so far. ``suggest_gain`` is the
  suggested curve's mean lead over random across the rounds after the first
  (medians over seeds); ``labels_saved`` the share of random's final label
  count the suggested curve needed to reach random's final ``year_exact``
  (linear between rounds).
* **Label noise**: ``noise_labels`` pool points with ``noise_levels`` of
  them made wrong (half of the wrong conversions shifted by ±1–2 years, the
  rest and all other wrong labels flipped to another class), trained with
  each loss of ``noise_losses``. Each model is scored twice: with the
  region prior its training chose (``by_loss_own_prior``: by default black-box
  shift estimation, which measures its confusion matrix against the same
  wrong labels) and with the training region's true class shares
  (``by_loss``: what the loss alone does, as for a user who gives
  ``labels.population_shares``).
* **Surrogate labels**: ``surrogate_pixels`` pixels labelled by the
  index-drop rule (:mod:`plantation.reference.rule`) plus 0, 100 or 400
  trusted pool labels, against the 400 trusted labels alone; scored with
  the training region's true shares and with each model's own prior.
* **Warm start**: a model retrained from the previous round's model on a
  grown label set (``plantation retrain``'s fine-tune) against training
  afresh on the same labels: time and scores.
* **A new year**: a model trained with the last year of imagery withheld
  (its labels as an interpreter would have given them then: a conversion or
  disturbance in that year was still forest) extended to the full series and
  fine-tuned on the grown labels, against training afresh on all years.
"""

from __future__ import annotations

import json
import tempfile
import time
from dataclasses import asdict, dataclass, field, fields, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import rasterio
import torch

from plantation.benchmarks.accuracy import SemiRealBench, semi_real_regions
from plantation.benchmarks.scores import map_scores
from plantation.benchmarks.semireal import label_shares
from plantation.errors import ConfigError
from plantation.imagery.config import LabelsConfig, RegionConfig
from plantation.imagery.region import TileStack, open_region
from plantation.model.artefact import Artefact
from plantation.model.calibration import prior_from_shares
from plantation.model.inference import predict_tile
from plantation.model.outcomes import summarise
from plantation.model.training import Start, TrainConfig, fit, load_region_samples, model_card, network_spec, sample_splits
from plantation.model.transfer import transfer_spec
from plantation.records import write_object
from plantation.reference.labels import LABEL_NAMES
from plantation.reference.rule import draw_rule_labels
from plantation.retraining.retrain import RetrainSettings, fine_tune
from plantation.retraining.suggest import group_names, score_pixels, select

PARTS: tuple[str, ...] = ("active", "noise", "surrogate", "warm", "new_year")
SCORES: tuple[str, ...] = ("year_exact", "conversion_f1")


@dataclass
class LabelsBenchConfig(TrainConfig):
    """Schema of ``configs/benchmark_labels.yaml``: the training config plus the benchmark's design."""

    semi_real: SemiRealBench = field(default_factory=SemiRealBench)
    retrain: RetrainSettings = field(default_factory=RetrainSettings)
    parts: list[str] = field(default_factory=lambda: list(PARTS))
    seeds: list[int] = field(default_factory=lambda: [0, 1, 2])
    pool: int = 5000
    pool_seed: int = 4242
    start_labels: int = 400
    batch: int = 200
    rounds: int = 4
    suggest_min_distance_px: float = 4.0
    suggest_epistemic_weight: float = 1.0
    noise_labels: int = 1000
    noise_levels: list[float] = field(default_factory=lambda: [0.0, 0.1, 0.2, 0.3])
    noise_losses: list[str] = field(default_factory=lambda: ["ce", "gce", "sce"])
    noise_seeds: list[int] = field(default_factory=lambda: [0])
    surrogate_pixels: int = 4000
    surrogate_trusted: list[int] = field(default_factory=lambda: [0, 100, 400])
    surrogate_seeds: list[int] = field(default_factory=lambda: [0])
    window: int = 128
    out: str = "bench/results/labels.json"
    plot: str = "bench/results/labels.png"
    progress: bool = True
    #: Keep the parts of an earlier result at ``out`` that this run does not redo (same design settings only).
    merge: bool = False


def train_part(cfg: LabelsBenchConfig) -> TrainConfig:
    return TrainConfig(**{f.name: getattr(cfg, f.name) for f in fields(TrainConfig)})


@dataclass
class Regions:
    train: RegionConfig
    eval: RegionConfig
    eval_stacks: list[TileStack]
    truth_label: np.ndarray
    truth_year: np.ndarray
    #: The training region's true area shares of the label groups (the prior a user who knew them would give).
    train_shares: dict[str, float] = field(default_factory=dict)


def regions(cfg: LabelsBenchConfig) -> Regions:
    """The semi-real training and held-out regions (built into the cache when absent) and the held-out truth."""
    built = {role: region for role, (_, region) in semi_real_regions(cfg.semi_real, cfg.region, cfg.progress).items()}
    ev = built["eval"]
    stacks = open_region(ev)
    labs, yrs = [], []
    for t in ev.tiles:
        with rasterio.open(str(t.truth)) as src:
            labs.append(src.read(1).ravel())
            yrs.append(src.read(2).ravel())
    train_cls = []
    for t in built["train"].tiles:
        with rasterio.open(str(t.truth)) as src:
            train_cls.append(src.read(1).ravel())
    counts = np.bincount(np.concatenate(train_cls), minlength=len(LABEL_NAMES) + 1)[1 : len(LABEL_NAMES) + 1].astype(np.float64)
    shares = {n: float(c / counts.sum()) for n, c in zip(LABEL_NAMES, counts, strict=True)}
    return Regions(built["train"], ev, stacks, np.concatenate(labs), np.concatenate(yrs), shares)


def draw_pool(region: RegionConfig, n: int, oversampling: float, seed: int) -> pd.DataFrame:
    """``n`` pixels of the region drawn like its interpreters' sample (stratified by true class, conversion over-sampled), labelled from the truth.

    Columns: tile, row, col, x, y (pixel centre, imagery CRS), label,
    onset_year (0 unless conversion), event_year (year of the pixel's last
    event, 0 if none).
    """
    rng = np.random.default_rng(np.random.SeedSequence([seed, 17]))
    parts = []
    for t in region.tiles:
        with rasterio.open(str(t.truth)) as src:
            cls, onset, event_year, transform, crs = src.read(1), src.read(2), src.read(4), src.transform, src.crs
        parts.append((t.name, cls, onset, event_year, transform, crs))
    all_cls = np.concatenate([p[1].ravel() for p in parts])
    shares = label_shares(all_cls, oversampling)
    rows = []
    for code, name in enumerate(LABEL_NAMES, 1):
        want = int(round(shares[name] * n))
        cand = [(i, np.flatnonzero(p[1].ravel() == code)) for i, p in enumerate(parts)]
        total = sum(len(c) for _, c in cand)
        if total == 0 or want == 0:
            continue
        flat = np.concatenate([np.stack([np.full(len(c), i), c], 1) for i, c in cand])
        pick = flat[rng.choice(len(flat), size=min(want, len(flat)), replace=False)]
        for i, f in pick:
            name_t, cls, onset, ev, tr, _ = parts[int(i)]
            r, c = divmod(int(f), cls.shape[1])
            x, y = tr * (c + 0.5, r + 0.5)
            rows.append({"tile": name_t, "row": r, "col": c, "x": x, "y": y, "label": name, "onset_year": int(onset[r, c]) if name == "conversion" else 0, "event_year": int(ev[r, c])})
    table = pd.DataFrame(rows)
    return table.iloc[rng.permutation(len(table))].reset_index(drop=True)


def with_labels(tc: TrainConfig, table: pd.DataFrame, folder: Path, name: str = "labels.csv") -> TrainConfig:
    """``tc`` reading ``table`` as its labels file (written into ``folder`` in the imagery CRS)."""
    path = folder / name
    out = table.loc[:, ["x", "y", "label", "onset_year"]].copy()
    out["onset_year"] = [str(int(y)) if lab == "conversion" else "" for lab, y in zip(out["label"], out["onset_year"], strict=True)]
    out.to_csv(path, index=False)
    crs = open_region(replace(tc.region, labels=LabelsConfig()))[0].grid.crs.to_string()
    return replace(tc, region=replace(tc.region, labels=LabelsConfig(path=str(path), crs=crs)))


@dataclass
class Trained:
    art: Artefact
    seconds: float
    splits: dict[tuple[str, int, int], int]


def train(
    tc: TrainConfig,
    table: pd.DataFrame,
    *,
    start_from: Trained | None = None,
    inherit: dict[tuple[str, int, int], int] | None = None,
    settings: RetrainSettings | None = None,
) -> Trained:
    """Train on ``table``'s labels; the model in memory and the seconds taken.

    With ``start_from``: a warm start from its weights (extended to any new
    year), fine-tuned as ``plantation retrain`` does with ``settings``.
    """
    if start_from is not None:
        tc = fine_tune(tc, settings or RetrainSettings())
    with tempfile.TemporaryDirectory(prefix="plantation-labels-") as tmp:
        tcl = with_labels(tc, table, Path(tmp))
        stacks, labels, samples = load_region_samples(tcl, inherit=inherit)
        start = None
        if start_from is not None:
            card = start_from.art.card
            spec = transfer_spec(card.network, network_spec(samples, tcl), parent_years=list(card.years), child_years=list(samples.outcomes.years))
            d = start_from.art.distilled
            start = Start(spec=spec, members=[m.state_dict() for m in start_from.art.members], distilled=d.state_dict() if d is not None else None)
        t0 = time.perf_counter()
        trained = fit(samples, tcl, Path(tmp), stacks=stacks, labels=labels, start=start)
        seconds = time.perf_counter() - t0
        card = model_card(tcl, samples, trained, labels)
    return Trained(Artefact(card, trained.members, trained.distilled), seconds, sample_splits(samples))


def prior_groups(art: Artefact) -> dict[str, Any]:
    """The region prior a model's probabilities carry: its source, conversion share, and whether an estimate was refused."""
    cal = art.card.calibration
    return {"source": cal.prior_source, "conversion": round(float(cal.prior_groups().get("conversion", float("nan"))), 4)}


def with_shares(art: Artefact, shares: dict[str, float]) -> Artefact:
    """``art`` with its probabilities moved to the label groups' ``shares`` (the training sample's mix within each group)."""
    cal = art.card.calibration
    q = prior_from_shares(shares, np.asarray(cal.train_prior))
    return replace(art, card=replace(art.card, calibration=replace(cal, target_prior=[float(v) for v in q], prior_source="shares")))


def score(art: Artefact, reg: Regions, cfg: LabelsBenchConfig) -> dict[str, float]:
    """Wall-to-wall scores of the model's map of the held-out region."""
    probs = [predict_tile(art, st, window=cfg.window, scaling=reg.eval.scaling).probs.reshape(-1, art.members[0].n_outcomes) for st in reg.eval_stacks]
    summ = summarise(np.concatenate(probs), art.card.years, cutoff_year=cfg.calibration.cutoff_year, level=cfg.calibration.interval_level)
    sc = map_scores(summ, reg.truth_label, reg.truth_year, has_interval=False)
    return {k: round(float(sc[k]), 4) for k in (*SCORES, "macro_f1")}


def suggest_from_pool(art: Artefact, tc: TrainConfig, pool: pd.DataFrame, labelled: np.ndarray, n: int, cfg: LabelsBenchConfig, stacks: list[TileStack]) -> np.ndarray:
    """Indices of ``n`` pool points ``plantation suggest`` would pick among the unlabelled ones (its scoring, round-robin over predicted groups and spacing)."""
    rest = np.flatnonzero(~labelled)
    ps = score_pixels(art, stacks, pool["tile"].to_numpy()[rest], pool["row"].to_numpy()[rest], pool["col"].to_numpy()[rest], min_clear=4)
    pixel = abs(stacks[0].grid.transform.a)
    gx, gy = pool["x"].to_numpy() / pixel, -pool["y"].to_numpy() / pixel
    sel = select(
        ps.score(cfg.suggest_epistemic_weight),
        gx[rest],
        gy[rest],
        group_names(ps.label, ps.year),
        n,
        cfg.suggest_min_distance_px,
        labelled_x=gx[labelled],
        labelled_y=gy[labelled],
    )
    chosen = rest[np.asarray(sel.chosen, dtype=np.int64)]
    if len(chosen) < n:
        # Spacing ran out: the rest at random, so that both curves add the same number of labels.
        rng = np.random.default_rng(len(chosen))
        left = np.setdiff1d(rest, chosen)
        chosen = np.concatenate([chosen, rng.choice(left, n - len(chosen), replace=False)])
    return chosen


def _median(curves: list[list[float]]) -> list[float]:
    return [round(float(v), 4) for v in np.median(np.asarray(curves), 0)]


def labels_to_reach(counts: list[int], curve: list[float], target: float) -> float | None:
    """Label count at which ``curve`` first reaches ``target`` (linear between rounds), or None."""
    for i, v in enumerate(curve):
        if v >= target:
            if i == 0:
                return float(counts[0])
            a, b = curve[i - 1], v
            return float(counts[i - 1] + (counts[i] - counts[i - 1]) * (target - a) / (b - a))
    return None


def active_learning(cfg: LabelsBenchConfig, tc: TrainConfig, reg: Regions, pool: pd.DataFrame, log: list[str]) -> tuple[dict[str, Any], dict[str, Any]]:
    """Both curves per seed, and the warm-start comparison on the random curve's last round."""
    counts = [cfg.start_labels + i * cfg.batch for i in range(cfg.rounds + 1)]
    per: dict[str, dict[str, list[list[float]]]] = {s: {k: [] for k in SCORES} for s in ("suggest", "random")}
    warm: list[dict[str, Any]] = []
    stacks = open_region(tc.region)
    for seed in cfg.seeds:
        rng = np.random.default_rng(np.random.SeedSequence([seed, 29]))
        tcs = replace(tc, training=replace(tc.training, seed=seed))
        first = np.zeros(len(pool), bool)
        first[rng.choice(len(pool), cfg.start_labels, replace=False)] = True
        t0 = train(tcs, pool[first])
        s0 = score(t0.art, reg, cfg)
        log.append(f"seed {seed}: {cfg.start_labels} labels {s0}")
        for strategy in ("suggest", "random"):
            have, model = first.copy(), t0
            curve = {k: [s0[k]] for k in SCORES}
            srng = np.random.default_rng(np.random.SeedSequence([seed, 31]))
            for r in range(1, cfg.rounds + 1):
                if strategy == "suggest":
                    add = suggest_from_pool(model.art, tcs, pool, have, cfg.batch, cfg, stacks)
                else:
                    add = srng.choice(np.flatnonzero(~have), cfg.batch, replace=False)
                have[add] = True
                parent = model
                model = train(tcs, pool[have])
                sc = score(model.art, reg, cfg)
                for k in SCORES:
                    curve[k].append(sc[k])
                log.append(f"seed {seed} {strategy} round {r}: {int(have.sum())} labels {sc} ({model.seconds:.0f} s)")
                if strategy == "random" and r == cfg.rounds:
                    w = train(tcs, pool[have], start_from=parent, inherit=parent.splits, settings=cfg.retrain)
                    ws = score(w.art, reg, cfg)
                    warm.append(
                        {
                            "seed": seed,
                            "labels": int(have.sum()),
                            "parent_labels": int(have.sum()) - cfg.batch,
                            "afresh_seconds": round(model.seconds, 1),
                            "warm_seconds": round(w.seconds, 1),
                            "afresh": sc,
                            "warm": ws,
                        }
                    )
                    log.append(f"seed {seed} warm start: {ws} ({w.seconds:.0f} s against {model.seconds:.0f} s afresh)")
            for k in SCORES:
                per[strategy][k].append(curve[k])
    rounds: dict[str, Any] = {"labels": counts}
    for s in per:
        rounds[s] = {k: _median(per[s][k]) for k in SCORES}
        rounds[s]["per_seed"] = {k: per[s][k] for k in SCORES}
    gain = {k: round(float(np.mean(np.subtract(rounds["suggest"][k][1:], rounds["random"][k][1:]))), 4) for k in SCORES}
    target = rounds["random"]["year_exact"][-1]
    need = labels_to_reach(counts, rounds["suggest"]["year_exact"], target)
    saved = round(1.0 - need / counts[-1], 4) if need is not None else None
    beats = [bool(a > b) for a, b in zip(rounds["suggest"]["year_exact"][1:], rounds["random"]["year_exact"][1:], strict=True)]
    warm_doc = {
        "per_seed": warm,
        "time_ratio": round(float(np.median([w["warm_seconds"] / w["afresh_seconds"] for w in warm])), 3) if warm else None,
        "score_difference": {k: round(float(np.median([w["warm"][k] - w["afresh"][k] for w in warm])), 4) for k in SCORES} if warm else {},
    }
    return {"rounds": rounds, "suggest_gain": gain, "labels_saved": saved, "labels_to_reach_random_final": need, "suggest_beats_random_after_first": beats}, warm_doc


def corrupt(table: pd.DataFrame, share: float, years: list[int], rng: np.random.Generator) -> pd.DataFrame:
    """``share`` of the labels made wrong.

    Half of the chosen conversions are shifted by ±1–2 years (kept inside the
    series); every other chosen label is flipped to another class (a new
    conversion gets a random year).
    """
    out = table.copy()
    n = int(round(share * len(out)))
    pick = rng.choice(len(out), n, replace=False)
    lab = out["label"].to_numpy().astype(object)
    yr = out["onset_year"].to_numpy().copy()
    for i in pick:
        if lab[i] == "conversion" and rng.random() < 0.5:
            shifts = [d for d in (-2, -1, 1, 2) if years[0] <= yr[i] + d <= years[-1]]
            yr[i] += int(rng.choice(shifts))
            continue
        new = rng.choice([n_ for n_ in LABEL_NAMES if n_ != lab[i]])
        lab[i] = new
        yr[i] = int(rng.choice(years)) if new == "conversion" else 0
    out["label"], out["onset_year"] = lab, yr
    return out


def noise_part(cfg: LabelsBenchConfig, tc: TrainConfig, reg: Regions, pool: pd.DataFrame, log: list[str]) -> dict[str, Any]:
    years = list(range(int(pool.loc[pool.label == "conversion", "onset_year"].min()), int(pool.loc[pool.label == "conversion", "onset_year"].max()) + 1))
    res: dict[str, dict[str, list[dict[str, float]]]] = {loss: {str(lv): [] for lv in cfg.noise_levels} for loss in cfg.noise_losses}
    own: dict[str, dict[str, list[dict[str, float]]]] = {loss: {str(lv): [] for lv in cfg.noise_levels} for loss in cfg.noise_losses}
    priors: dict[str, dict[str, list[dict[str, Any]]]] = {loss: {str(lv): [] for lv in cfg.noise_levels} for loss in cfg.noise_losses}
    for seed in cfg.noise_seeds:
        rng = np.random.default_rng(np.random.SeedSequence([seed, 37]))
        base = pool.iloc[rng.choice(len(pool), cfg.noise_labels, replace=False)]
        for lv in cfg.noise_levels:
            noisy = corrupt(base, lv, years, np.random.default_rng(np.random.SeedSequence([seed, 41, int(lv * 100)])))
            for loss in cfg.noise_losses:
                t = train(replace(tc, training=replace(tc.training, seed=seed, loss=loss)), noisy)
                sc, so = score(with_shares(t.art, reg.train_shares), reg, cfg), score(t.art, reg, cfg)
                res[loss][str(lv)].append(sc)
                own[loss][str(lv)].append(so)
                priors[loss][str(lv)].append(prior_groups(t.art))
                log.append(f"noise {lv:.0%} loss {loss} seed {seed}: {sc} with the true shares; {so} with its own prior {priors[loss][str(lv)][-1]}")

    def medians(r: dict[str, dict[str, list[dict[str, float]]]]) -> dict[str, dict[str, dict[str, float]]]:
        return {loss: {lv: {k: round(float(np.median([s[k] for s in v])), 4) for k in SCORES} for lv, v in d.items()} for loss, d in r.items()}

    table, own_table = medians(res), medians(own)
    clean = {loss: table[loss][str(cfg.noise_levels[0])] for loss in table}
    at20 = str(0.2) if str(0.2) in next(iter(table.values())) else None
    loss_at_20 = {loss: round(table[loss][at20]["conversion_f1"] - clean["ce"]["conversion_f1"], 4) for loss in table} if at20 and "ce" in clean else {}
    # Against each loss's own clean run: what the noise costs that loss.
    own_loss_at_20 = {loss: round(table[loss][at20]["conversion_f1"] - clean[loss]["conversion_f1"], 4) for loss in table} if at20 else {}
    return {
        "levels": cfg.noise_levels,
        "labels": cfg.noise_labels,
        "seeds": cfg.noise_seeds,
        "prior": "the training region's true shares",
        "true_shares": {k: round(v, 4) for k, v in reg.train_shares.items()},
        "by_loss": table,
        "conversion_f1_change_at_20pct_vs_clean_ce": loss_at_20,
        "conversion_f1_change_at_20pct_vs_same_loss_clean": own_loss_at_20,
        "by_loss_own_prior": own_table,
        "own_prior": priors,
    }


def surrogate_part(cfg: LabelsBenchConfig, tc: TrainConfig, reg: Regions, pool: pd.DataFrame, log: list[str]) -> dict[str, Any]:
    """The rule's labels plus 0, 100, ... trusted labels, against the most trusted labels alone.

    With no trusted label the rule's labels are the only labels, split into
    training and validation like interpreters' labels; with some, the rule's
    go to the training split only (``surrogate.pixels``), weighing
    ``surrogate.weight`` each.
    """
    out: dict[str, list[dict[str, float]]] = {}
    own: dict[str, list[dict[str, Any]]] = {}
    stacks = open_region(tc.region)

    def record(name: str, t: Trained, seed: int) -> None:
        out.setdefault(name, []).append(score(with_shares(t.art, reg.train_shares), reg, cfg))
        own.setdefault(name, []).append(score(t.art, reg, cfg) | {"prior": prior_groups(t.art)})
        log.append(f"{name} seed {seed}: {out[name][-1]} with the true shares; {own[name][-1]} with its own prior")

    for seed in cfg.surrogate_seeds:
        rng = np.random.default_rng(np.random.SeedSequence([seed, 43]))
        order = rng.permutation(len(pool))
        tcs = replace(tc, training=replace(tc.training, seed=seed))
        base = pool.iloc[order[: max(cfg.surrogate_trusted)]]
        record(f"trusted_{len(base)}_alone", train(tcs, base), seed)
        for n in cfg.surrogate_trusted:
            if n == 0:
                rule = draw_rule_labels(stacks, tc.region.bands, n=cfg.surrogate_pixels, seed=seed)
                rx, ry = zip(*(stacks[[st.name for st in stacks].index(tn)].grid.transform * (c + 0.5, r + 0.5) for tn, r, c in zip(rule["tile"], rule["row"], rule["col"], strict=True)), strict=True)
                # The rule never says old plantation, so the region's mix cannot be estimated per group (bbse): the sample's mix is kept.
                t = train(replace(tcs, calibration=replace(tcs.calibration, prior="sample")), rule.assign(x=rx, y=ry))
            else:
                t = train(replace(tcs, surrogate=replace(tcs.surrogate, pixels=cfg.surrogate_pixels, seed=seed)), base.iloc[:n])
            record(f"rule_plus_{n}_trusted", t, seed)
    doc: dict[str, Any] = {name: {k: round(float(np.median([s[k] for s in v])), 4) for k in SCORES} for name, v in out.items()}
    return doc | {"rule_pixels": cfg.surrogate_pixels, "seeds": cfg.surrogate_seeds, "prior": "the training region's true shares", "own_prior": own}


def new_year_part(cfg: LabelsBenchConfig, tc: TrainConfig, reg: Regions, pool: pd.DataFrame, log: list[str]) -> dict[str, Any]:
    """Withhold the last year, train, extend to it with a fine-tune on grown labels; against training afresh on all years."""
    last = int(pool["onset_year"].max())
    per = []
    for seed in cfg.seeds:
        rng = np.random.default_rng(np.random.SeedSequence([seed, 47]))
        order = rng.permutation(len(pool))
        n0 = cfg.start_labels + (cfg.rounds - 1) * cfg.batch
        then = pool.iloc[order[:n0]].copy()
        # What an interpreter saw before the last year arrived: its conversions and disturbances were still forest.
        later = then["event_year"].to_numpy() >= last
        then.loc[later, "label"] = "stable_forest"
        then.loc[later, "onset_year"] = 0
        now = pool.iloc[order[: n0 + cfg.batch]]
        tcs = replace(tc, training=replace(tc.training, seed=seed))
        old_tc = replace(tcs, region=replace(tcs.region, end_date=f"{last - 1}-12-31"))
        parent = train(old_tc, then)
        ext = train(tcs, now, start_from=parent, inherit=parent.splits, settings=cfg.retrain)
        fresh = train(tcs, now)
        e, f = score(ext.art, reg, cfg), score(fresh.art, reg, cfg)
        per.append(
            {"seed": seed, "extended": e, "afresh": f, "extended_seconds": round(ext.seconds, 1), "afresh_seconds": round(fresh.seconds, 1), "parent_years": [int(parent.art.card.years[0]), last - 1]}
        )
        log.append(f"new year seed {seed}: extended {e} ({ext.seconds:.0f} s), afresh {f} ({fresh.seconds:.0f} s)")
    return {
        "per_seed": per,
        "year_exact_difference": round(float(np.median([p["extended"]["year_exact"] - p["afresh"]["year_exact"] for p in per])), 4),
        "time_ratio": round(float(np.median([p["extended_seconds"] / p["afresh_seconds"] for p in per])), 3),
    }


def check(cfg: LabelsBenchConfig) -> None:
    bad = [p for p in cfg.parts if p not in PARTS]
    if bad:
        raise ConfigError(f"parts: {bad} not among {list(PARTS)}")
    if cfg.start_labels + cfg.rounds * cfg.batch > cfg.pool:
        raise ConfigError(f"pool: {cfg.pool} points cannot hold start_labels + rounds x batch = {cfg.start_labels + cfg.rounds * cfg.batch}")
    if not cfg.seeds:
        raise ConfigError("seeds: give at least one training seed")


def run(cfg: LabelsBenchConfig) -> dict[str, Any]:
    """Run the chosen parts and write ``cfg.out`` (JSON) and ``cfg.plot`` (PNG)."""
    check(cfg)
    tc = train_part(cfg)
    reg = regions(cfg)
    tc = replace(tc, region=reg.train)
    pool = draw_pool(reg.train, cfg.pool, cfg.semi_real.conversion_oversampling, cfg.pool_seed)
    log: list[str] = []
    started = time.perf_counter()
    doc: dict[str, Any] = {
        "region": {"train": reg.train.name, "held_out": reg.eval.name, "pool": cfg.pool, "pool_counts": {k: int(v) for k, v in pool["label"].value_counts().items()}},
        "settings": {
            "members": tc.network.members,
            "distillation": tc.distillation.enabled,
            "max_epochs": tc.training.max_epochs,
            "seeds": cfg.seeds,
            "threads": torch.get_num_threads(),
            "warm_start": asdict(cfg.retrain),
        },
    }
    doc["log"] = log
    doc["parts_done"] = []
    if cfg.merge and Path(cfg.out).is_file():
        doc = merged_start(doc, Path(cfg.out), cfg.parts)
        log = doc["log"]
    for part in PARTS:
        if part not in cfg.parts:
            continue
        if part == "active":
            al, warm = active_learning(cfg, tc, reg, pool, log)
            doc |= al
            doc["warm_start"] = warm
        else:
            doc[part] = {"noise": noise_part, "surrogate": surrogate_part, "new_year": new_year_part}[part](cfg, tc, reg, pool, log)
        doc["seconds"] = round(time.perf_counter() - started, 1)
        # Written after every part (an hour's run is not lost to a late failure); "parts_done" says how far it got.
        doc["parts_done"].append(part)
        write_object(doc, cfg.out)
    figure(doc, Path(cfg.plot))
    return doc


def merged_start(doc: dict[str, Any], earlier_path: Path, redo: list[str]) -> dict[str, Any]:
    """``doc`` seeded with the parts of the result at ``earlier_path`` that this run does not redo.

    Refused unless the earlier run had the same region, pool and training
    settings: parts trained otherwise are not comparable.
    """
    earlier = json.loads(earlier_path.read_text())
    for key in ("region", "settings"):
        if earlier.get(key) != doc[key]:
            raise ConfigError(f"{earlier_path}: merge=true: its {key!r} differs from this run's ({earlier.get(key)!r} against {doc[key]!r}); rerun every part instead")
    keys = {"active": ("rounds", "suggest_gain", "labels_saved", "labels_to_reach_random_final", "suggest_beats_random_after_first", "warm_start")}
    kept = [p for p in earlier.get("parts_done", []) if p not in redo]
    out = dict(doc)
    for part in kept:
        for key in keys.get(part, (part,)):
            if key in earlier:
                out[key] = earlier[key]
    out["parts_done"] = kept
    out["log"] = [line for line in earlier.get("log", []) if not any(line.startswith(prefix) for prefix in _LOG_PREFIXES if _LOG_PART[prefix] in redo)]
    out["merged_from_earlier_run"] = kept
    out["earlier_seconds"] = earlier.get("seconds")
    return out


_LOG_PART = {"seed ": "active", "noise ": "noise", "rule_": "surrogate", "trusted_": "surrogate", "400 trusted": "surrogate", "rule + ": "surrogate", "new year ": "new_year"}
_LOG_PREFIXES = tuple(_LOG_PART)


def figure(doc: dict[str, Any], dest: Path) -> Path:
    """The benchmark at a glance (PNG): both learning curves, the noise curves by loss, and the surrogate, warm-start and new-year bars."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 4, figsize=(17, 3.8))
    colours = {"suggest": "#1b7f6a", "random": "#b5651d", "ce": "#44546a", "gce": "#c0872b", "sce": "#6a3d9a"}
    ax = axes[0]
    if "rounds" in doc:
        r = doc["rounds"]
        for s in ("suggest", "random"):
            ax.plot(r["labels"], r[s]["year_exact"], "-o", color=colours[s], label=f"{s} (median)")
            per = np.asarray(r[s]["per_seed"]["year_exact"])
            ax.fill_between(r["labels"], per.min(0), per.max(0), color=colours[s], alpha=0.15, lw=0)
        ax.set_xlabel("labels")
        ax.set_ylabel("year_exact (held-out region)")
        ax.set_title(f"what to label next ({len(r['suggest']['per_seed']['year_exact'])} seeds; band: range)")
        ax.legend(frameon=False)
    ax = axes[1]
    if "noise" in doc:
        nz = doc["noise"]
        for loss, d in nz["by_loss"].items():
            ax.plot([100 * float(v) for v in d], [d[v]["conversion_f1"] for v in d], "-o", color=colours.get(loss, "k"), label=loss)
        ax.set_xlabel("wrong labels (%)")
        ax.set_ylabel("conversion_f1")
        ax.set_title("labels made wrong, by loss")
        ax.legend(frameon=False)
    ax = axes[2]
    if "surrogate" in doc:
        sg = {k: v for k, v in doc["surrogate"].items() if isinstance(v, dict)}
        ax.barh(list(sg), [v["conversion_f1"] for v in sg.values()], color="#7a9e3a")
        ax.set_xlabel("conversion_f1")
        ax.set_title("rule labels plus trusted labels")
    ax = axes[3]
    bars: dict[str, float] = {}
    if doc.get("warm_start", {}).get("time_ratio") is not None:
        bars["warm start: time / afresh"] = doc["warm_start"]["time_ratio"]
    if "new_year" in doc:
        bars["new year: time / afresh"] = doc["new_year"]["time_ratio"]
    if bars:
        ax.barh(list(bars), list(bars.values()), color="#5a7fa8")
        ax.axvline(0.5, color="k", lw=0.8, ls="--")
        ax.set_xlabel("time ratio (target < 0.5)")
        ax.set_title("retraining from a parent")
    fig.tight_layout()
    dest.parent.mkdir(parents=True, exist_ok=True)
    tmp = dest.with_name(dest.stem + ".partial.png")
    fig.savefig(tmp, dpi=110)
    plt.close(fig)
    tmp.replace(dest)
    return dest


def summary_lines(doc: dict[str, Any]) -> list[str]:
    out = []
    if "rounds" in doc:
        r = doc["rounds"]
        out.append("labels      " + "".join(f"{n:>8}" for n in r["labels"]))
        for s in ("suggest", "random"):
            out.append(f"{s:<12}" + "".join(f"{v:>8.3f}" for v in r[s]["year_exact"]) + "  year_exact")
        out.append(f"suggest_gain {doc['suggest_gain']}, labels_saved {doc['labels_saved']}")
    for key in ("warm_start", "noise", "surrogate", "new_year"):
        if key in doc:
            body = {k: v for k, v in doc[key].items() if k != "per_seed"}
            out.append(f"{key}: {json.dumps(body)}")
    return out
