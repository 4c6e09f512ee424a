"""The README's figure tables, generated from the JSON the jobs write (``plantation readme-figures``).

Each table sits in README.md between two markers::

    <!-- figures:<name> -->
    ...
    <!-- /figures:<name> -->

:func:`run` replaces only the text between a block's markers, and only when
every JSON file the block is built from exists; a block whose JSON is missing
is left as it is. With ``check=True`` it writes nothing and raises if a block
differs from what its JSON gives, so a stale README fails a test or CI.

The blocks and their sources:

* ``demo-assessment``: ``<assess_dir>/assessment.json`` (:mod:`plantation.assessment.assess`);
* ``demo-plots``: ``<assess_dir>/plots.json`` (:mod:`plantation.farmplots.cutoff`);
* ``demo-timing``: ``<train_dir>/metrics.json`` (:mod:`plantation.model.training`)
  and ``<map_dir>/summary.json`` (:class:`plantation.mapping.job.MapSummary`);
* ``read-memory``: ``<results_dir>/read_memory.json`` (:mod:`plantation.benchmarks.reading`);
* ``read-products``: ``<results_dir>/read.json`` (:mod:`plantation.benchmarks.reading`);
* ``mapping-speed``: ``<results_dir>/speed.json`` (:mod:`plantation.benchmarks.speed`);
* ``accuracy-benchmark``: ``<results_dir>/accuracy.json`` (:mod:`plantation.benchmarks.accuracy`);
* ``labels-benchmark``: ``<results_dir>/labels.json`` (:mod:`plantation.benchmarks.labels`).

Every block ends with one line saying where its figures come from and whether
they repeat to the digit on one machine (seeded, deterministic training;
deterministic mapping and sampling; same library versions) or vary between
machines and runs (times, rates, memory).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from decimal import ROUND_HALF_UP, Decimal
from pathlib import Path
from typing import Any

from plantation.errors import InputNotFoundError, PlantationError
from plantation.imagery.config import RegionConfig
from plantation.records import load_object

#: The command that regenerates the blocks, quoted in every block's source line.
COMMAND = "plantation readme-figures"

#: What the source line says of figures that repeat on one machine.
REPRODUCIBLE = (
    "Reproducible to the digit on one machine with the same library versions (seeded, deterministic training; deterministic mapping, sample draw and plot measurement); "
    "another machine or other library versions can give other figures."
)

# The project's targets, as the README states them (they are goals, not measurements, so no job writes them).
#: Accuracy benchmark: the target of each score, in words.
ACCURACY_TARGETS: dict[str, str] = {
    "year_exact": "≥ 0.85",
    "year_within1": "≥ 0.95",
    "conversion_f1": "≥ 0.90",
    "ece": "≤ 0.02",
    "ece_after_cutoff": "≤ 0.02",
    "mean_p_conversion": "true share ± 0.01",
    "forest_plot_after_share": "≤ 0.01",
    "interval80_coverage": "0.78–0.85",
    "per_class_f1.old_plantation": "≥ 0.85",
    "false_conversion_rate.cleared_for_crops.by_years_since.2": "≤ 0.02",
    "false_conversion_rate.cleared_for_crops.by_years_since.3+": "≤ 0.02",
    "false_conversion_rate.fire_regrowth.by_years_since.2": "≤ 0.02",
    "false_conversion_rate.fire_regrowth.by_years_since.3+": "≤ 0.02",
    "train_seconds": "< 600",
}
#: The network's lead over the tuned random forest on a region with real forest texture: year_exact, conversion_f1, macro_f1.
TARGET_LEAD = {"year_exact": 0.06, "conversion_f1": 0.02, "macro_f1": 0.02}
#: year_within1 over the region's observable ceiling.
TARGET_CEILING_SHARE = 0.98
#: Mapping speed: the model's share of the GEMM roofline.
TARGET_ROOFLINE = 0.4
#: Mapping speed: end to end against model only.
TARGET_PIPELINE = 0.7
#: Mapping speed: full convolution against patch by patch.
TARGET_FULLCONV = 10.0
#: Mapping speed: the model at least this share of the trees baseline's speed ("within 3×").
TARGET_VS_TREES = 1 / 3
#: Mapping speed: the model at least as fast as the tuned random forest.
TARGET_VS_FOREST = 1.0
#: Mapping speed: end to end on a 60-date series, px/s.
TARGET_LONG_PX_PER_S = 10_000.0
#: Mapping memory: peak RSS of the largest tile over the smallest one, and its ceiling in MB.
TARGET_RSS_RATIO = 1.2
TARGET_RSS_MB = 2000.0
#: Mapping the toy region, seconds.
TARGET_TOY_MAP_SECONDS = 60.0


@dataclass
class ReadmeConfig:
    """Schema of ``configs/readme_figures.yaml``."""

    region: RegionConfig = field(default_factory=RegionConfig)
    readme: str = "README.md"
    train_dir: str = "outputs/train/selvara_toy_seed0"
    map_dir: str = "outputs/maps/selvara_toy"
    assess_dir: str = "outputs/assess/selvara_toy"
    results_dir: str = "bench/results"
    check: bool = False


# --------------------------------------------------------------------------- formatting


def markdown_table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    """A Markdown pipe table (no trailing newline)."""

    def line(cells: Sequence[str]) -> str:
        # An empty cell is one space wide, as hand-written tables have it.
        return "|" + "|".join(f" {c} " if c else " " for c in cells) + "|"

    return "\n".join([line(header), line(["---"] * len(header)), *(line(r) for r in rows)])


def _fmt(x: float, spec: str) -> str:
    """``x`` formatted with ``spec`` (``.3f``, ``,.1f``, ...), rounded half up from its shortest decimal form.

    The JSON holds rounded decimals (115.85); binary floats would print some of
    them one digit low (115.8), so rounding goes through the decimal the file shows.
    """
    places = int(spec.rsplit(".", 1)[1].rstrip("f"))
    d = Decimal(repr(float(x))).quantize(Decimal(1).scaleb(-places), rounding=ROUND_HALF_UP)
    return format(d, spec)


def _interval(e: dict[str, float], fmt: str) -> str:
    """``estimate (lo–hi)``, each with ``fmt``."""
    return f"{_fmt(e['estimate'], fmt)} ({_fmt(e['lo'], fmt)}–{_fmt(e['hi'], fmt)})"


def _met(ok: bool) -> str:
    return "met" if ok else "missed"


def _seconds(s: float) -> str:
    # Whole seconds once the tenths are noise against run-to-run variation.
    return _fmt(s, ",.0f") if s >= 10 else _fmt(s, ".1f")


def _side(px: Sequence[int]) -> str:
    return f"{px[0]}²" if px[0] == px[1] else f"{px[0]} × {px[1]}"


def _body(table: str, note: str) -> str:
    """What goes between a block's markers: blank lines keep the table and the note apart from the HTML comments."""
    return f"\n\n{table}\n\n{note}\n\n"


# --------------------------------------------------------------------------- the blocks


def demo_assessment_block(doc: dict[str, Any], *, source: str) -> str:
    """Overall accuracy, converted area, area after the cutoff and timing accuracy of the demo chain's assessment.

    Args:
        doc: ``assessment.json`` as :func:`plantation.assessment.assess.run` writes it.
        source: its path as the README shows it.
    """
    pct = round(doc["confidence"] * 100)
    conv = doc["area_ha"]["conversion"]
    after = doc["after_cutoff"]
    timing = doc["timing"]
    exact, within = timing.get("exact"), timing.get("within1")
    rows = [
        ["overall accuracy", _interval(doc["overall"], ".3f"), ""],
        ["converted area, ha", _interval(conv, ",.1f"), f"{_fmt(conv['mapped_ha'], ',.1f')}"],
        [f"converted after {after['cutoff_year']}, ha", _interval(after, ",.1f"), f"{_fmt(after['mapped_ha'], ',.1f')}"],
        ["onset year exact / within one year", f"{_fmt(exact['estimate'], '.3f')} / {_fmt(within['estimate'], '.3f')}" if exact and within else "n/a", ""],
    ]
    table = markdown_table(["figure", f"estimate ({pct}% interval)", "the map's pixel count"], rows)
    reference = "reference filled from the simulator's truth" if doc.get("simulated_reference") else "reference from interpreters"
    note = f"Generated by `{COMMAND}` from `{source}` ({doc['sample']['n']:,} points, {reference}). {REPRODUCIBLE}"
    return _body(table, note)


def demo_plots_block(doc: dict[str, Any], *, source: str) -> str:
    """Verdict counts of the demo chain's farm-plot check.

    Args:
        doc: ``plots.json`` as :func:`plantation.farmplots.cutoff.run` writes it.
        source: its path as the README shows it.
    """
    counts = doc["counts"]
    rows = [[f"`{k}`", str(counts.get(k, 0))] for k in ("strong_evidence", "review", "low_evidence")]
    rows.append(["not measured (a problem with the plot)", str(counts.get("problem", 0))])
    table = markdown_table(["verdict", "plots"], rows)
    n = len(doc["plots"])
    note = f"Generated by `{COMMAND}` from `{source}` ({n} plots, converted after {doc['cutoff']['date']}). {REPRODUCIBLE}"
    return _body(table, note)


#: Plot categories of ``benchmark-plots``, in table order, and the verdict columns.
_PLOT_CATEGORIES = ("untouched", "other_disturbance", "converted_before_only", "minor_after", "converted_after")
_VERDICTS = ("low_evidence", "review", "strong_evidence")


def demo_plots_truth_block(doc: dict[str, Any], *, source: str) -> str:
    """The demo farm plots' verdicts by their true category, and the two targets, from ``benchmark-plots``.

    Args:
        doc: ``farmplots.json`` as :func:`plantation.benchmarks.plotcheck.run` writes it.
        source: its path as the README shows it.
    """
    counts = doc["counts"]
    rows = [[f"`{c}`", *[str(counts.get(c, {}).get(v, 0)) for v in _VERDICTS]] for c in _PLOT_CATEGORIES if sum(counts.get(c, {}).values())]
    table = markdown_table(["true category", *[f"`{v}`" for v in _VERDICTS]], rows)
    untouched, missed = doc.get("untouched_above_low_evidence") or [], doc.get("converted_after_at_low_evidence") or []
    said = [
        "no untouched plot above `low_evidence`: " + ("met" if not untouched else f"missed ({', '.join(untouched)})"),
        "no plot converted after the cutoff at `low_evidence`: " + ("met" if not missed else f"missed ({', '.join(missed)})"),
    ]
    note = f"Generated by `{COMMAND}` from `{source}` (`plantation benchmark-plots`; converted after {doc['cutoff_year']}). Targets: {'; '.join(said)}. {REPRODUCIBLE}"
    return _body(table, note)


def demo_timing_block(metrics: dict[str, Any], summary: dict[str, Any], *, metrics_source: str, summary_source: str) -> str:
    """Training and mapping times of the demo chain.

    Args:
        metrics: the training run's ``metrics.json`` (:func:`plantation.model.training.run`).
        summary: the map's ``summary.json`` (:class:`plantation.mapping.job.MapSummary`).
        metrics_source, summary_source: their paths as the README shows them.
    """
    epochs = metrics["epochs"]
    train_row = [f"training the demo model ({len(epochs)} members, {'/'.join(str(e) for e in epochs)} epochs)", f"{_seconds(metrics['train_seconds'])} s", ""]
    rows = [train_row]
    dist = metrics.get("distillation")
    if dist:
        rows.append([f"distilling it into one network ({dist['epochs']} epochs)", f"{_seconds(dist['seconds'])} s", ""])
    seconds, now, total = summary["seconds"], summary.get("mapped_now_pixels", 0), summary["pixels"]
    label = f"mapping the toy region (`plantation map`, {total:,} px)"
    if now == total and seconds > 0:
        target = f"< {TARGET_TOY_MAP_SECONDS:.0f} s: {_met(seconds < TARGET_TOY_MAP_SECONDS)}"
        map_row = [label, f"{_seconds(seconds)} s in the job ({_fmt(now / seconds, ',.0f')} px/s; interpreter start-up not counted)", target]
    elif now > 0 and seconds > 0:
        map_row = [label, f"{_seconds(seconds)} s for {now:,} px (the other tiles were already mapped)", ""]
    else:
        map_row = [label, "not timed: every tile was already mapped (`resume=false` maps them again)", ""]
    table = markdown_table(["figure", "value", "target"], [*rows, map_row])
    runs = "one run each of `plantation train` and `plantation map` (the files do not record the machine)"
    note = f"Generated by `{COMMAND}` from `{metrics_source}` and `{summary_source}`, {runs}: times vary between machines and runs."
    return _body(table, note)


def read_memory_block(doc: dict[str, Any], *, source: str) -> str:
    """Peak memory and speed of reading a large stack window by window.

    Args:
        doc: ``read_memory.json`` as :func:`plantation.benchmarks.reading.run` writes it.
        source: its path as the README shows it.
    """
    w = doc["window"]
    peak, target = doc["peak_rss_mb"], doc["target_peak_rss_mb"]
    sim_s, sim_peak = doc.get("simulate_seconds"), doc.get("simulate_peak_rss_mb")
    if sim_s is not None:
        sim = f"{_seconds(sim_s)} s" + (f", peak {_fmt(sim_peak / 1024, '.1f')} GB" if sim_peak is not None else "")
    else:
        sim = "not measured: this run reused a region simulated earlier"
    rows = [
        [f"peak RSS reading {_side(doc['tile_px'])} px × {doc['dates']} dates × {doc['bands']} bands (+QA) in {w}² windows", f"{_fmt(peak, ',.0f')} MB (target < {target:,}: {_met(peak < target)})"],
        ["the same stack held whole as float32", f"{_fmt(doc['full_tile_float32_mb'], ',.0f')} MB (peak is {_fmt(doc['peak_over_full_tile_ratio'], '.3f')} of it)"],
        [
            f"one {w}² window as float32",
            f"{_fmt(doc['window_float32_mb'], ',.0f')} MB (peak is {_fmt(doc['peak_over_window_ratio'], '.1f')}× it: dask assembly, NaN masking, GDAL's {doc['gdal_cache_mb']} MB block cache)",
        ],
        ["reading speed", f"{_fmt(doc['px_dates_per_s'] / 1e6, '.1f')} M pixel-dates/s"],
        ["simulating the region (first run only)", sim],
    ]
    table = markdown_table(["figure", "value"], rows)
    note = f"Generated by `{COMMAND}` from `{source}`, one run on {doc['cpu_count']} cores: peak RSS and reading speed vary between machines and runs."
    return _body(table, note)


def read_products_block(doc: dict[str, Any], *, source: str) -> str:
    """Delivered product folders read against pre-stacked GeoTIFFs of the same pixels.

    Args:
        doc: ``read.json`` as :func:`plantation.benchmarks.reading.run` writes it.
        source: its path as the README shows it.
    """
    ratio = doc["products_vs_stacked"]
    repeats = ", ".join(_fmt(v, ".2f") for v in doc["products_vs_stacked_per_repeat"])
    rows = [
        ["pre-stacked GeoTIFFs (one multi-band file per date)", f"{_fmt(doc['stacked_px_dates_per_s'] / 1e6, '.2f')} M", f"{_fmt(doc['peak_rss_mb']['stacked'], ',.0f')} MB"],
        ["Landsat Collection 2 Level-2 scene folders (`format: products`)", f"{_fmt(doc['products_px_dates_per_s'] / 1e6, '.2f')} M", f"{_fmt(doc['peak_rss_mb']['products'], ',.0f')} MB"],
        ["products ÷ stacked", f"{_fmt(ratio, '.2f')} (repeats {repeats}; target ≥ {doc['target_products_vs_stacked']}: {_met(ratio >= doc['target_products_vs_stacked'])})", ""],
        ["identical arrays", "yes" if doc["identical"] else "no", ""],
    ]
    table = markdown_table([f"{_side(doc['tile_px'])} px × {doc['dates']} dates × {doc['bands']} bands, {doc['window']}² windows", "pixel-dates/s", "peak RSS"], rows)
    note = (
        f"Generated by `{COMMAND}` from `{source}`: medians of {doc['repeats']} repeats in fresh processes, alternating which reader goes first, on {doc['cpu_count']} cores; "
        "speeds and memory vary between machines and runs, the ratio less."
    )
    return _body(table, note)


def mapping_speed_block(doc: dict[str, Any], *, source: str) -> str:
    """Mapping speed and memory, each figure against its target where it has one.

    Args:
        doc: ``speed.json`` as :func:`plantation.benchmarks.speed.run` writes it.
        source: its path as the README shows it.
    """
    sizes = sorted(int(k.rsplit("_", 1)[1]) for k in doc if k.startswith("peak_rss_mb_"))
    rss = doc["rss_run"]
    rows = [
        ["float32 GEMM on the same threads (roofline)", f"{_fmt(doc['gemm_gflops'], '.1f')} GFLOP/s", ""],
        [
            f"model on a {doc['window']}² window ({_fmt(doc['model_flops_per_px_date'] / 1e3, '.1f')} kFLOP per pixel-date, counted)",
            f"{_fmt(doc['model_gflops'], '.1f')} GFLOP/s: **{_fmt(doc['roofline_ratio'], '.2f')}** of the roofline",
            f"≥ {TARGET_ROOFLINE:g}: {_met(doc['roofline_ratio'] >= TARGET_ROOFLINE)}",
        ],
        ["model only, pre-read windows", f"{_fmt(doc['model_only_px_per_s'], ',.0f')} px/s", ""],
        [
            "end to end, GeoTIFF in → COG out",
            f"{_fmt(doc['end_to_end_px_per_s'], ',.0f')} px/s: **{_fmt(doc['pipeline_ratio'], '.2f')}** of model only",
            f"≥ {TARGET_PIPELINE:g}: {_met(doc['pipeline_ratio'] >= TARGET_PIPELINE)}",
        ],
        [
            "naive patch by patch",
            f"{_fmt(doc['patchwise_px_per_s'], ',.0f')} px/s: full convolution is **{_fmt(doc['fullconv_speedup'], '.1f')}×** faster",
            f"≥ {TARGET_FULLCONV:g}×: {_met(doc['fullconv_speedup'] >= TARGET_FULLCONV)}",
        ],
        [
            "trees baseline, same tile (read, annual features, predict)",
            f"{_fmt(doc['trees_px_per_s'], ',.0f')} px/s: the model runs at **{_fmt(doc['model_vs_trees'], '.2f')}×** its speed",
            f"within {1 / TARGET_VS_TREES:g}×: {_met(doc['model_vs_trees'] >= TARGET_VS_TREES)}",
        ],
    ]
    if "ensemble_end_to_end_px_per_s" in doc:
        rows.append(["the same with every ensemble member instead of the distilled network", f"{_fmt(doc['ensemble_end_to_end_px_per_s'], ',.0f')} px/s", ""])
    if "end_to_end_px_per_s_long" in doc:
        rows.append(
            [
                f"end to end on a {doc['long_dates']}-date series (default network size, distilled / every member)",
                f"{_fmt(doc['end_to_end_px_per_s_long'], ',.0f')} / {_fmt(doc['ensemble_end_to_end_px_per_s_long'], ',.0f')} px/s",
                f"≥ {TARGET_LONG_PX_PER_S:,.0f} px/s: {_met(doc['end_to_end_px_per_s_long'] >= TARGET_LONG_PX_PER_S)}",
            ]
        )
    if "forest_px_per_s" in doc:
        if "predict_px_per_s" in doc:
            rows.append(["the model's probabilities of the tile from its files (read, features, network), nothing written", f"{_fmt(doc['predict_px_per_s'], ',.0f')} px/s", ""])
            label = "the model's probabilities against it (like for like)"
        else:
            label = "the model end to end against it"
        rows.append(
            [
                "tuned random forest, same tile (read, yearly medians and minima, predict)",
                f"{_fmt(doc['forest_px_per_s'], ',.0f')} px/s; {label}: **{_fmt(doc['model_vs_forest'], '.2f')}×**",
                f"≥ {TARGET_VS_FOREST:g}×: {_met(doc['model_vs_forest'] >= TARGET_VS_FOREST)}",
            ]
        )
        if "end_to_end_vs_forest" in doc:
            rows.append(["the model end to end (COG written) against the forest's probabilities", f"**{_fmt(doc['end_to_end_vs_forest'], '.2f')}×**", ""])
    if len(sizes) > 1 and "rss_ratio" in doc:
        peaks = [doc[f"peak_rss_mb_{s}"] for s in sizes]
        ratio_ok, mb_ok = doc["rss_ratio"] <= TARGET_RSS_RATIO, max(peaks) < TARGET_RSS_MB
        verdict = "met" if ratio_ok and mb_ok else "both missed" if not (ratio_ok or mb_ok) else ("ratio missed" if mb_ok else "memory missed")
        members = f"{rss['members']} member" + ("s" if rss["members"] != 1 else "")
        rows.append(
            [
                f"peak RSS mapping a {' / '.join(f'{s}²' for s in sizes)} simulated tile ({rss['dates']} dates, {members}, GDAL cache {rss['gdal_cache_mb']} MB)",
                f"{' / '.join(_fmt(p, ',.0f') for p in peaks)} MB: **{_fmt(doc['rss_ratio'], '.2f')}×**",
                f"≤ {TARGET_RSS_RATIO:g}× and < {TARGET_RSS_MB:,.0f} MB: {verdict}",
            ]
        )
    table = markdown_table(["figure", "value", "target"], rows)
    dated = f", dated {doc['date']}" if doc.get("date") else ""
    note = (
        f"Generated by `{COMMAND}` from `{source}`{dated}, one run on {doc['threads']} torch threads: GFLOP/s, px/s and peak RSS vary between machines and runs; "
        "the FLOPs per pixel-date are fixed by the network. "
        f"The model maps with {'its distilled network' if doc.get('networks') == 'distilled' else 'every ensemble member'}."
    )
    return _body(table, note)


#: Accuracy benchmark rows: key, label, decimals, and whether higher is better (None: no best, nothing bold).
_ACCURACY_ROWS: tuple[tuple[str, str, int, bool | None], ...] = (
    ("year_exact", "`year_exact` (true conversions mapped to the right year)", 3, True),
    ("year_within1", "`year_within1`", 3, True),
    ("conversion_f1", "`conversion_f1` (conversion vs. not)", 3, True),
    ("macro_f1", "`macro_f1` (four labels)", 3, True),
    ("year_mae", "`year_mae` (years, conversions mapped as such)", 2, False),
    ("ece", "`ece` of p_conversion (10 bins)", 3, False),
    ("ece_after_cutoff", "`ece_after_cutoff` (of p_after_cutoff)", 3, False),
    ("mean_p_conversion", "`mean_p_conversion`", 3, None),
    ("forest_plot_after_share", "`forest_plot_after_share` (untouched forest plots)", 3, False),
    ("interval80_coverage", "`interval80_coverage` (conversions mapped as such)", 3, None),
    ("per_class_f1.old_plantation", "F1 of old plantation", 3, True),
    ("false_conversion_rate.cleared_for_crops.by_years_since.2", "cleared for crops or pasture, mapped as conversion: 2 years of imagery after", 3, False),
    ("false_conversion_rate.cleared_for_crops.by_years_since.3+", "same, 3 or more years after", 3, False),
    ("false_conversion_rate.fire_regrowth.by_years_since.2", "burnt and regrowing forest, mapped as conversion: 2 years after", 3, False),
    ("false_conversion_rate.fire_regrowth.by_years_since.3+", "same, 3 or more years after", 3, False),
    ("before_recalibration.ece", "before the assessment's recalibration: `ece`", 3, None),
    ("before_recalibration.ece_after_cutoff", "same: `ece_after_cutoff`", 3, None),
    ("before_recalibration.mean_p_conversion", "same: `mean_p_conversion`", 3, None),
    ("before_recalibration.forest_plot_after_share", "same: `forest_plot_after_share`", 3, None),
    ("sample_prior.ece", "with the sample's class mix (no correction): `ece`", 3, None),
    ("sample_prior.forest_plot_after_share", "same: `forest_plot_after_share`", 3, None),
)


def _lookup(res: dict[str, Any], key: str) -> Any:
    """A figure of a method's results; ``a.b`` reads ``res["a"]["b"]`` (None where absent)."""
    v: Any = res
    for part in key.split("."):
        v = v.get(part) if isinstance(v, dict) else None
    return v


#: The methods of the accuracy benchmark, in column order.
METHODS = ("model", "random_forest", "trees", "breakpoint")


def _with_ensemble(res: dict[str, dict[str, Any]]) -> dict[str, dict[str, Any]]:
    """The methods, plus the model's full ensemble as a column of its own when the model mapped with its distilled network."""
    ens = (res.get("model") or {}).get("ensemble")
    if not ens:
        return res
    runs = [r.get("ensemble") or {} for r in res["model"].get("by_seed", [])]
    spread = {}
    for k, v in ens.items():
        vals = [r.get(k) for r in runs]
        if isinstance(v, int | float) and vals and all(isinstance(x, int | float) for x in vals):
            spread[k] = [min(vals), max(vals)]
    return {**res, "ensemble": {**ens, "spread": spread, "train_seconds": res["model"]["train_seconds"]}}


def _accuracy_table(res: dict[str, dict[str, Any]], ceiling: float | None = None, *, realistic: bool = False) -> str:
    """One region's methods side by side, the best of each score in bold; a figure that varied over seeds shows its range.

    With the model's full ensemble (``model.ensemble``), it gets a column
    beside the model's, which is then its distilled network. The last rows
    give the model's lead over the random forest and, with ``ceiling``, its
    ``year_within1`` over the region's observable ceiling, with their
    targets where the region has real forest texture (``realistic``).
    """
    res = _with_ensemble(res)
    methods = [m for m in ("model", "ensemble", *METHODS[1:]) if m in res]
    rows = []
    for key, label, nd, higher in _ACCURACY_ROWS:
        vals = {m: _lookup(res[m], key) for m in methods}
        known = [v for v in vals.values() if v is not None]
        best = None if higher is None or not known else (max(known) if higher else min(known))
        cells = []
        for m in methods:
            v = vals[m]
            if v is None:
                cells.append("—")
                continue
            text = _fmt(v, f".{nd}f")
            # A method whose outputs are only 0 or 1 says so beside its ECE.
            if key == "ece" and res[m].get("ece_note"):
                text += " (0/1 rule)"
            cell = f"**{text}**" if best is not None and round(v, nd) == round(best, nd) else text
            lo_hi = (res[m].get("spread") or {}).get(key)
            if lo_hi and round(lo_hi[0], nd) != round(lo_hi[1], nd):
                cell += f" ({_fmt(lo_hi[0], f'.{nd}f')}–{_fmt(lo_hi[1], f'.{nd}f')})"
            cells.append(cell)
        rows.append([label, *cells, ACCURACY_TARGETS.get(key, "")])
    rows.append(["training time (s)", *[_seconds(res[m]["train_seconds"]) for m in methods], ACCURACY_TARGETS["train_seconds"]])
    seen = []
    for m in methods:
        s = res[m].get("on_conversions_seen_cleared") or {}
        seen.append(f"{_fmt(s['year_exact'], '.3f')} / {_fmt(s['year_within1'], '.3f')}" if s.get("year_exact") is not None and s.get("year_within1") is not None else "—")
    rows.append(["same, on conversions seen clear after clearing: `year_exact` / `year_within1`", *seen, ""])
    if "random_forest" in res:
        lead = {k: res["model"][k] - res["random_forest"][k] for k in TARGET_LEAD}
        cells = ["/".join(f"{lead[k]:+.3f}" for k in TARGET_LEAD)] + [""] * (len(methods) - 1)
        ok = all(lead[k] >= t for k, t in TARGET_LEAD.items())
        target = f"≥ {' / '.join(f'{t:+.2f}' for t in TARGET_LEAD.values())}: {_met(ok)}" if realistic else ""
        rows.append(["lead over the random forest: `year_exact` / `conversion_f1` / `macro_f1`", *cells, target])
    if ceiling:
        share = [f"{res[m]['year_within1'] / ceiling:.3f}" for m in methods]
        target = f"≥ {TARGET_CEILING_SHARE:g}: {_met(res['model']['year_within1'] / ceiling >= TARGET_CEILING_SHARE)}" if realistic else ""
        rows.append(["`year_within1` over the observable ceiling", *share, target])
    header = ["metric", *[("model (distilled)" if m == "model" and "ensemble" in res else "model (ensemble)" if m == "ensemble" else m) for m in methods], "target"]
    return markdown_table(header, rows)


def accuracy_block(doc: dict[str, Any], *, source: str) -> str:
    """The methods' scores on each held-out region, the best of each score in bold.

    Reads both shapes :func:`plantation.benchmarks.accuracy.run` has written:
    one region with ``methods`` at the top (one run), and ``regions`` with
    per-region ``methods`` whose figures are medians over ``seeds`` (their
    range over seeds in brackets).

    Args:
        doc: ``accuracy.json``.
        source: its path as the README shows it.
    """
    if "regions" not in doc:
        table = _accuracy_table(doc["methods"])
        runs = f"one run on {doc['threads']} threads"
    else:
        parts = []
        for name, region in doc["regions"].items():
            facts = region.get("eval_region", {})
            head = f"**{name}** (true conversion share {_fmt(facts.get('true_conversion_share'), '.3f')}, observable ceiling {_fmt(region.get('observable_ceiling'), '.3f')}):"
            parts.append(f"{head}\n\n{_accuracy_table(region['methods'], region.get('observable_ceiling'), realistic=name == 'semi_real')}")
        table = "\n\n".join(parts)
        runs = f"medians over training seeds {doc['seeds']} (range over seeds in brackets), on {doc['threads']} threads"
    note = (
        f"Generated by `{COMMAND}` from `{source}`, {runs}. "
        "The scores are reproducible to the digit on one machine with the same library versions (seeded, deterministic training; seeded trees; a seeded held-out region); "
        "training times vary between machines and runs."
    )
    return _body(table, note)


#: Labels benchmark: the issue's targets, in words.
LABELS_TARGETS: dict[str, str] = {
    "beats": "suggested labels ahead of random at every round after the first",
    "saved": "random's final `year_exact` reached with ≥ 30% fewer labels",
    "noise": "at 20% wrong labels, the best loss within 0.03 `conversion_f1` of clean labels",
    "surrogate": "rule labels + 100 trusted ahead of 400 trusted alone on `conversion_f1`",
    "warm": "a warm start in under half the time of training afresh, scores equal (within 0.01) or better",
    "new_year": "the new-year extension within 0.02 `year_exact` of training afresh, in under half its time",
}


def _range(per_seed: Sequence[Sequence[float]], i: int) -> str:
    vals = [run[i] for run in per_seed]
    return f"({_fmt(min(vals), '.3f')}–{_fmt(max(vals), '.3f')})"


def labels_block(doc: dict[str, Any], *, source: str) -> str:
    """The labels benchmark: learning curves, the targets, labels made wrong, and rule labels.

    Args:
        doc: ``labels.json`` as :func:`plantation.benchmarks.labels.run` writes it (every part done).
        source: its path as the README shows it.
    """
    r = doc["rounds"]
    curve_rows = []
    for i, n in enumerate(r["labels"]):
        row = [str(n)]
        for s in ("suggest", "random"):
            for k in ("year_exact", "conversion_f1"):
                row.append(f"{_fmt(r[s][k][i], '.3f')} {_range(r[s]['per_seed'][k], i)}")
        curve_rows.append(row)
    curves = markdown_table(["labels", "suggested: `year_exact`", "suggested: `conversion_f1`", "random: `year_exact`", "random: `conversion_f1`"], curve_rows)

    nz = doc["noise"]
    levels = [str(v) for v in nz["levels"]]
    losses = list(nz["by_loss"])
    clean = nz["by_loss"]["ce"][levels[0]]["conversion_f1"]
    at20 = nz["conversion_f1_change_at_20pct_vs_clean_ce"]
    best = max(at20, key=lambda k: at20[k])
    noise_rows = []
    for lv in levels:
        row = [f"{_fmt(100 * float(lv), '.0f')}%"]
        row += [_fmt(nz["by_loss"][loss][lv]["conversion_f1"], ".3f") for loss in losses]
        row += [
            f"{_fmt(nz['by_loss_own_prior'][loss][lv]['conversion_f1'], '.3f')} ({_fmt(nz['own_prior'][loss][lv][0]['conversion'], '.3f')}, {nz['own_prior'][loss][lv][0]['source']})"
            for loss in losses
        ]
        noise_rows.append(row)
    noise = markdown_table(
        ["wrong labels", *(f"{loss}: true shares" for loss in losses), *(f"{loss}: own prior (its conversion share, source)" for loss in losses)],
        noise_rows,
    )

    sg = doc["surrogate"]
    names = [k for k, v in sg.items() if isinstance(v, dict) and "conversion_f1" in v]
    sur_rows = [[k.replace("_", " "), _fmt(sg[k]["conversion_f1"], ".3f"), _fmt(sg[k]["year_exact"], ".3f"), _fmt(sg["own_prior"][k][0]["conversion_f1"], ".3f")] for k in names]
    surrogate = markdown_table(["labels", "`conversion_f1`", "`year_exact`", "`conversion_f1`, own prior"], sur_rows)
    trusted = next(k for k in names if k.startswith("trusted_"))
    plus100 = sg.get("rule_plus_100_trusted")

    ws, ny = doc["warm_start"], doc["new_year"]
    warm_ok = ws["time_ratio"] < 0.5 and min(ws["score_difference"].values()) >= -0.01
    beats = doc["suggest_beats_random_after_first"]
    target_rows = [
        [LABELS_TARGETS["beats"], ", ".join(f"{n} labels: {'yes' if b else 'no'}" for n, b in zip(r["labels"][1:], beats, strict=True)), _met(all(beats))],
        [LABELS_TARGETS["saved"], f"{_fmt(100 * doc['labels_saved'], '.0f')}% fewer ({_fmt(doc['labels_to_reach_random_final'], ',.0f')} of {r['labels'][-1]})", _met(doc["labels_saved"] >= 0.30)],
        [LABELS_TARGETS["noise"], f"{best}: {_fmt(at20[best], '+.3f')} (clean `ce` {_fmt(clean, '.3f')})", _met(at20[best] >= -0.03)],
        [
            LABELS_TARGETS["surrogate"],
            f"{_fmt(plus100['conversion_f1'], '.3f')} against {_fmt(sg[trusted]['conversion_f1'], '.3f')}" if plus100 else "not run",
            _met(bool(plus100) and plus100["conversion_f1"] > sg[trusted]["conversion_f1"]),
        ],
        [
            LABELS_TARGETS["warm"],
            f"time × {_fmt(ws['time_ratio'], '.2f')}; `year_exact` {_fmt(ws['score_difference']['year_exact'], '+.3f')}, `conversion_f1` {_fmt(ws['score_difference']['conversion_f1'], '+.3f')}",
            _met(warm_ok),
        ],
        [
            LABELS_TARGETS["new_year"],
            f"`year_exact` {_fmt(ny['year_exact_difference'], '+.3f')}, time × {_fmt(ny['time_ratio'], '.2f')}",
            _met(abs(ny["year_exact_difference"]) <= 0.02 and ny["time_ratio"] < 0.5),
        ],
    ]
    targets = markdown_table(["target", "measured", ""], target_rows)
    st = doc["settings"]
    table = (
        f"{targets}\n\n**What to label next** (held-out region scored wall to wall; medians over seeds {st['seeds']}, range in brackets):\n\n{curves}"
        f"\n\n**Labels made wrong** ({nz['labels']} labels, seed {nz['seeds']}; `conversion_f1` with the training region's true class shares, "
        f"then with the prior each model chose for itself):\n\n{noise}"
        f"\n\n**Rule labels** ({sg['rule_pixels']:,} pixels labelled by the index-drop rule, seed {sg['seeds']}; true class shares, then each model's own prior):\n\n{surrogate}"
    )
    note = (
        f"Generated by `{COMMAND}` from `{source}`: {st['members']} members per model, at most {st['max_epochs']} epochs, on {st['threads']} threads. "
        "Scores are reproducible to the digit on one machine with the same library versions; times vary between machines and runs."
    )
    return _body(table, note)


#: Ablation rows: key of a method's results, label, decimals.
_ABLATION_ROWS: tuple[tuple[str, str, int], ...] = (
    ("year_exact", "`year_exact`", 3),
    ("year_within1", "`year_within1`", 3),
    ("conversion_f1", "`conversion_f1`", 3),
    ("macro_f1", "`macro_f1`", 3),
    ("per_class_f1.old_plantation", "F1 of old plantation", 3),
    ("false_conversion_rate.cleared_for_crops.by_years_since.3+", "cleared for crops or pasture taken for conversion, 3+ years after", 3),
    ("ece", "`ece`", 3),
)


#: The faults benchmark's floor of named cases (issue target: at least 30).
TARGET_FAULT_CASES = 30
#: What each kind of fault case is, as the README says it.
FAULT_KINDS = {"kill": "killed and rerun", "bad_input": "bad data and broken files", "model_file": "untrusted model files", "resource": "resource bounds"}


def faults_block(doc: dict[str, Any], *, source: str) -> str:
    """The faults benchmark: the counts against their targets, then every case by kind, held or not.

    Args:
        doc: ``faults.json`` as :func:`plantation.benchmarks.faults.run` writes it.
        source: its path as the README shows it.
    """
    n, held = doc["cases_tried"], doc["cases_held"]
    delta, peak, budget = doc["resume_metric_delta"], doc["peak_rss_mb"], doc["memory_budget_mb"]
    rows = [
        ["named cases held", f"{held} of {n} (target: at least {TARGET_FAULT_CASES}, all held: {_met(n >= TARGET_FAULT_CASES and held == n)})"],
        ["kills survived (`kills_survived` / `kills_tried`)", f"{doc['kills_survived']} of {doc['kills_tried']}"],
        ["bad inputs refused or masked as documented", f"{doc['bad_inputs_refused']} of {doc['bad_inputs_tried']}"],
        ["outputs corrupt", f"{doc['outputs_corrupt']} (target 0: {_met(doc['outputs_corrupt'] == 0)})"],
        ["tracebacks shown for user errors", f"{doc['user_error_tracebacks']} (target 0: {_met(doc['user_error_tracebacks'] == 0)})"],
        ["planted pickles run", f"{doc['pickles_executed']} (target 0: {_met(doc['pickles_executed'] == 0)})"],
        ["`resume_metric_delta` (resumed training against uninterrupted, same seed)", "not measured" if delta is None else f"{delta:g} (tolerance 0.0 on one process)"],
        ["largest peak RSS of a case", "not measured" if peak is None else f"{_fmt(peak, ',.0f')} MB (budget {budget:,} MB: {_met(peak <= budget)})"],
    ]
    # How each budget was met: what it lowered, and the same run's peak without it.
    for name, what, knob in (
        ("map_memory_budget", "mapping, a budget below the unbounded peak", "window {window}, pixel_batch {pixel_batch}"),
        ("train_memory_budget", "training asking for an inference batch of {asked_inference_batch:,}", "inference batch {inference_batch}"),
    ):
        case = next((c for c in doc["cases"] if c["name"] == name), None)
        d = (case or {}).get("detail") or {}
        if case is None or d.get("peak_rss_mb") is None or d.get("peak_rss_without_budget_mb") is None:
            continue
        fields = {**d, **(d.get("plan") or {})}
        rows.append(
            [
                f"{what.format(**fields)}: peak RSS with the budget (without)",
                f"{_fmt(d['peak_rss_mb'], ',.0f')} MB against {d['budget_mb']:,} MB ({_fmt(d['peak_rss_without_budget_mb'], ',.0f')} MB), {knob.format(**fields)}: {_met(case['held'])}",
            ]
        )
    cases_rows = []
    for kind, what in FAULT_KINDS.items():
        of = [c for c in doc["cases"] if c["kind"] == kind]
        if of:
            names = ", ".join(f"`{c['name']}`" + ("" if c["held"] else " (**did not hold**)") for c in of)
            cases_rows.append([what, str(len(of)), names])
    table = markdown_table(["figure", "value"], rows) + "\n\n" + markdown_table(["cases", "n", "names (each case's message is in the JSON)"], cases_rows)
    note = (
        f"Generated by `{COMMAND}` from `{source}`: every case in a fresh process on a copy of the demo region, on 2 cores; "
        "a case's peak RSS is its whole process tree's, except the two-process DDP training's, judged per process (each holds its own samples, as on separate machines)."
    )
    return _body(table, note)


def _ablation_column(doc: dict[str, Any], region: str, variant: str) -> dict[str, Any] | None:
    """One variant's results on one region: ``model``, ``ensemble`` (the model's full ensemble) or ``model_dated`` (an earlier design's run)."""
    methods = (doc.get("regions", {}).get(region) or {}).get("methods") or {}
    if variant == "ensemble":
        return _with_ensemble(methods).get("ensemble") if methods.get("model", {}).get("ensemble") else None
    return methods.get("model")


def ablation_block(docs: Sequence[dict[str, Any]], *, sources: Sequence[str]) -> str:
    """The network's designs side by side on each benchmark region, median over seeds with the range in brackets.

    Args:
        docs: accuracy benchmark reports of, in order: the design with one
            recurrent step per date, the yearly design without feature
            ranges, and the current design (its ensemble and its distilled
            network).
        sources: their paths as the README shows them.
    """
    columns = [
        ("one GRU step per date (earlier design)", 0, "model"),
        ("per year, no feature ranges", 1, "model"),
        ("per year (default), ensemble", 2, "ensemble"),
        ("per year (default), distilled", 2, "model"),
    ]
    parts = []
    for region in docs[-1].get("regions", {}):
        found = [(label, _ablation_column(docs[i], region, v)) for label, i, v in columns]
        found = [(label, col) for label, col in found if col]
        rows = []
        for key, label, nd in _ABLATION_ROWS:
            cells = []
            for _, col in found:
                v = _lookup(col, key)
                lo_hi = (col.get("spread") or {}).get(key)
                cell = "—" if v is None else _fmt(v, f".{nd}f")
                if v is not None and lo_hi and round(lo_hi[0], nd) != round(lo_hi[1], nd):
                    cell += f" ({_fmt(lo_hi[0], f'.{nd}f')}–{_fmt(lo_hi[1], f'.{nd}f')})"
                cells.append(cell)
            rows.append([label, *cells])
        rows.append(["seconds to map the held-out region", *[_seconds(col["map_seconds"]) for _, col in found]])
        parts.append(f"**{region}**:\n\n" + markdown_table(["metric", *[label for label, _ in found]], rows))
    seeds = docs[-1].get("seeds")
    files = ", ".join(f"`{s}`" for s in sources)
    note = f"Generated by `{COMMAND}` from {files}, each design's own benchmark run: medians over training seeds {seeds} (range over seeds in brackets, where a figure has one)."
    return _body("\n\n".join(parts), note)


# --------------------------------------------------------------------------- markers


def markers(name: str) -> tuple[str, str]:
    """The opening and closing marker of block ``name``."""
    return f"<!-- figures:{name} -->", f"<!-- /figures:{name} -->"


def block_span(text: str, name: str, *, where: str = "README") -> tuple[int, int] | None:
    """Start and end (character offsets) of the text between block ``name``'s markers; None when neither marker is there.

    Raises:
        PlantationError: a marker is missing its partner, appears twice, or
            the closing one comes first.
    """
    opening, closing = markers(name)
    n_open, n_close = text.count(opening), text.count(closing)
    if n_open == 0 and n_close == 0:
        return None
    if n_open != 1 or n_close != 1:
        raise PlantationError(f"{where}: block {name!r} has {n_open} opening and {n_close} closing marker(s); it needs one {opening} followed by one {closing}")
    start = text.index(opening) + len(opening)
    end = text.index(closing)
    if end < start:
        raise PlantationError(f"{where}: block {name!r} closes ({closing}) before it opens ({opening}); put the closing marker after the table")
    return start, end


def replace_block(text: str, name: str, body: str, *, where: str = "README") -> str:
    """``text`` with the text between block ``name``'s markers replaced by ``body``; everything else is kept as it is.

    Raises:
        PlantationError: the block's markers are not in ``text``, or are malformed.
    """
    span = block_span(text, name, where=where)
    if span is None:
        raise PlantationError(f"{where}: no block {name!r}; mark its table with {markers(name)[0]} and {markers(name)[1]}")
    start, end = span
    return text[:start] + body + text[end:]


# --------------------------------------------------------------------------- the job

#: Overrides of the ablation run without the yearly feature ranges.
NO_RANGES = "network.amplitude=false distillation.enabled=false out=bench/results/ablation/year_steps_no_ranges.json"


@dataclass(frozen=True)
class Block:
    """One generated block: its name, its JSON files, and how they become its body."""

    name: str
    #: The JSON files, with the command that writes each (for the "missing" message).
    sources: tuple[tuple[Path, str], ...]
    build: Callable[[list[dict[str, Any]]], str]


def _load(path: Path, writer: str) -> dict[str, Any]:
    return load_object(path, what="an object", again=f"write it again with `{writer}`")


def blocks(cfg: ReadmeConfig) -> list[Block]:
    """The README's generated blocks, in the order they appear in it."""
    train, maps, assess, results = (Path(p) for p in (cfg.train_dir, cfg.map_dir, cfg.assess_dir, cfg.results_dir))
    assessment, plots = assess / "assessment.json", assess / "plots.json"
    metrics, summary = train / "metrics.json", maps / "summary.json"
    read, speed, accuracy, plot_truth = results / "read_memory.json", results / "speed.json", results / "accuracy.json", results / "farmplots.json"
    per_date, no_ranges = results / "ablation" / "per_date.json", results / "ablation" / "year_steps_no_ranges.json"
    labels = results / "labels.json"
    faults = results / "faults.json"
    read_products = results / "read.json"
    return [
        Block("demo-assessment", ((assessment, "plantation assess"),), lambda d: demo_assessment_block(d[0], source=assessment.as_posix())),
        Block("demo-plots", ((plots, "plantation farmplots"),), lambda d: demo_plots_block(d[0], source=plots.as_posix())),
        Block("demo-plots-truth", ((plot_truth, "plantation benchmark-plots"),), lambda d: demo_plots_truth_block(d[0], source=plot_truth.as_posix())),
        Block("read-memory", ((read, "plantation benchmark-read"),), lambda d: read_memory_block(d[0], source=read.as_posix())),
        Block("read-products", ((read_products, "plantation benchmark-read memory=false"),), lambda d: read_products_block(d[0], source=read_products.as_posix())),
        Block("mapping-speed", ((speed, "plantation benchmark-speed"),), lambda d: mapping_speed_block(d[0], source=speed.as_posix())),
        Block(
            "demo-timing",
            ((metrics, "plantation train"), (summary, "plantation map")),
            lambda d: demo_timing_block(d[0], d[1], metrics_source=metrics.as_posix(), summary_source=summary.as_posix()),
        ),
        Block("accuracy-benchmark", ((accuracy, "plantation benchmark-accuracy"),), lambda d: accuracy_block(d[0], source=accuracy.as_posix())),
        Block(
            "network-ablation",
            ((per_date, "git checkout 1900564 && plantation benchmark-accuracy"), (no_ranges, f"plantation benchmark-accuracy {NO_RANGES}"), (accuracy, "plantation benchmark-accuracy")),
            lambda d: ablation_block(d, sources=[p.as_posix() for p in (per_date, no_ranges, accuracy)]),
        ),
        Block("labels-benchmark", ((labels, "plantation benchmark-labels"),), lambda d: labels_block(d[0], source=labels.as_posix())),
        Block("faults-benchmark", ((faults, "plantation benchmark-faults"),), lambda d: faults_block(d[0], source=faults.as_posix())),
    ]


def _write_atomic(path: Path, data: bytes) -> None:
    tmp = path.with_name(path.name + ".partial")
    tmp.write_bytes(data)
    os.replace(tmp, path)


def run(cfg: ReadmeConfig) -> list[str]:
    """Regenerate (or, with ``cfg.check``, verify) every block of the README whose JSON exists.

    Returns:
        One line per block: updated, unchanged, up to date, or left as it is
        and why.

    Raises:
        InputNotFoundError: the README does not exist.
        PlantationError: a JSON file is unreadable or lacks a figure, a
            block's markers are missing or malformed, or (``check``) a block
            differs from what its JSON gives; one line naming the block.
    """
    readme = Path(cfg.readme)
    if not readme.is_file():
        raise InputNotFoundError(f"{readme.absolute()}: README not found; set readme= to the file holding the figure blocks")
    # Bytes in, bytes out: line endings and every character outside the markers stay as they were.
    text = readme.read_bytes().decode("utf-8")
    where = readme.as_posix()
    lines: list[str] = []
    stale: list[str] = []
    new = text
    for b in blocks(cfg):
        span = block_span(new, b.name, where=where)
        if span is None:
            raise PlantationError(f"{where}: no block {b.name!r}; mark its table with {markers(b.name)[0]} and {markers(b.name)[1]}")
        missing = [(p, w) for p, w in b.sources if not p.is_file()]
        if missing:
            lines.append(f"figures:{b.name}: left as it is, {', '.join(p.as_posix() for p, _ in missing)} not found (written by `{'`, `'.join(w for _, w in missing)}`)")
            continue
        docs = [_load(p, w) for p, w in b.sources]
        try:
            body = b.build(docs)
        except (KeyError, TypeError, IndexError, ValueError, AttributeError) as exc:
            files = ", ".join(p.as_posix() for p, _ in b.sources)
            raise PlantationError(f"figures:{b.name}: {files} lacks a figure the block needs ({type(exc).__name__}: {exc}); write it again with `{b.sources[0][1]}`") from None
        start, end = span
        if new[start:end] == body:
            lines.append(f"figures:{b.name}: {'up to date' if cfg.check else 'unchanged'}")
            continue
        if cfg.check:
            stale.append(b.name)
            continue
        new = new[:start] + body + new[end:]
        lines.append(f"figures:{b.name}: updated from {', '.join(p.as_posix() for p, _ in b.sources)}")
    if stale:
        raise PlantationError(f"{where}: figures block(s) {', '.join(stale)} differ from their JSON; run `{COMMAND}` to regenerate them")
    if not cfg.check and new != text:
        _write_atomic(readme, new.encode("utf-8"))
    return lines
