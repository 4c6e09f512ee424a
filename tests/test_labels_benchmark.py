"""The labels benchmark's own arithmetic on tiny inputs: labels needed to reach a score, labels made wrong, the config's checks and the plot."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from plantation.benchmarks.labels import LabelsBenchConfig, check, corrupt, figure, labels_to_reach, summary_lines
from plantation.errors import ConfigError
from plantation.retraining.retrain import RetrainSettings, fine_tune


def test_labels_to_reach_interpolates_between_rounds():
    counts = [400, 600, 800, 1000, 1200]
    # Reached half-way between 600 (0.60) and 800 (0.70).
    assert labels_to_reach(counts, [0.5, 0.6, 0.7, 0.75, 0.8], 0.65) == pytest.approx(700.0)
    assert labels_to_reach(counts, [0.7, 0.8, 0.8, 0.8, 0.8], 0.65) == 400.0
    assert labels_to_reach(counts, [0.5, 0.55, 0.6, 0.6, 0.6], 0.65) is None


def _table(n: int = 400) -> pd.DataFrame:
    rng = np.random.default_rng(0)
    labels = rng.choice(["stable_forest", "conversion", "old_plantation", "other"], n)
    years = np.where(labels == "conversion", rng.integers(2016, 2024, n), 0)
    return pd.DataFrame({"label": labels, "onset_year": years})


@pytest.mark.parametrize("share", [0.0, 0.1, 0.3])
def test_corrupt_changes_exactly_the_share_asked_within_the_series(share):
    table = _table()
    years = list(range(2015, 2025))
    out = corrupt(table, share, years, np.random.default_rng(1))
    changed = (out["label"].to_numpy() != table["label"].to_numpy()) | (out["onset_year"].to_numpy() != table["onset_year"].to_numpy())
    # A flip to another class always changes the label; a year shift always moves the year (±1–2, kept in the series).
    assert changed.sum() == round(share * len(table))
    conv = out["label"] == "conversion"
    assert out.loc[conv, "onset_year"].between(years[0], years[-1]).all()
    assert (out.loc[~conv, "onset_year"] == 0).all()
    shifted = changed & (out["label"].to_numpy() == table["label"].to_numpy())
    assert np.isin(np.abs(out["onset_year"].to_numpy()[shifted] - table["onset_year"].to_numpy()[shifted]), [1, 2]).all()
    if share:
        assert shifted.any() and (changed & ~shifted).any()


def test_check_refuses_a_pool_too_small_and_an_unknown_part():
    with pytest.raises(ConfigError, match="pool"):
        check(LabelsBenchConfig(pool=500, start_labels=400, batch=200, rounds=4))
    with pytest.raises(ConfigError, match="parts"):
        check(LabelsBenchConfig(parts=["active", "noisy"]))


def test_warm_starts_fine_tune_with_the_retrain_settings():
    cfg = LabelsBenchConfig()
    tc = fine_tune(cfg, RetrainSettings(max_epochs=7, patience=2, lr=5e-4))
    assert (tc.training.max_epochs, tc.training.patience, tc.training.lr) == (7, 2, 5e-4)
    assert cfg.training.max_epochs != 7  # the benchmark's afresh models keep theirs


def test_summary_and_plot_from_a_result(tmp_path):
    doc = {
        "rounds": {
            "labels": [400, 600],
            "suggest": {"year_exact": [0.5, 0.6], "conversion_f1": [0.7, 0.8], "per_seed": {"year_exact": [[0.5, 0.6], [0.5, 0.62]]}},
            "random": {"year_exact": [0.5, 0.55], "conversion_f1": [0.7, 0.75], "per_seed": {"year_exact": [[0.5, 0.55], [0.5, 0.56]]}},
        },
        "suggest_gain": {"year_exact": 0.05},
        "labels_saved": 0.2,
        "warm_start": {"time_ratio": 0.4, "per_seed": []},
        "noise": {"by_loss": {"ce": {"0.0": {"conversion_f1": 0.8}, "0.2": {"conversion_f1": 0.7}}}},
    }
    lines = summary_lines(doc)
    assert any("labels_saved 0.2" in line for line in lines)
    out = figure(doc, tmp_path / "labels.png")
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def _earlier(settings: dict) -> dict:
    return {
        "region": {"train": "a", "held_out": "b"},
        "settings": settings,
        "parts_done": ["active", "noise", "new_year"],
        "rounds": {"labels": [400]},
        "suggest_gain": {"year_exact": 0.01},
        "warm_start": {"time_ratio": 0.4},
        "noise": {"by_loss": {}},
        "new_year": {"time_ratio": 0.45},
        "seconds": 100.0,
        "log": ["seed 0: 400 labels {}", "noise 0% loss ce seed 0: {}", "new year seed 0: extended {}"],
    }


def test_a_merged_run_keeps_the_parts_it_does_not_redo_and_refuses_other_settings(tmp_path):
    import json

    from plantation.benchmarks.labels import merged_start

    path = tmp_path / "labels.json"
    path.write_text(json.dumps(_earlier({"members": 2})))
    doc = {"region": {"train": "a", "held_out": "b"}, "settings": {"members": 2}, "log": [], "parts_done": []}
    out = merged_start(doc, path, ["noise"])
    assert out["parts_done"] == ["active", "new_year"] and out["merged_from_earlier_run"] == ["active", "new_year"]
    assert out["warm_start"] == {"time_ratio": 0.4} and out["new_year"] == {"time_ratio": 0.45} and "noise" not in out
    # The redone part's log lines go; the kept parts' stay.
    assert out["log"] == ["seed 0: 400 labels {}", "new year seed 0: extended {}"]
    assert out["earlier_seconds"] == 100.0
    with pytest.raises(ConfigError, match="settings"):
        merged_start({**doc, "settings": {"members": 3}}, path, ["noise"])


def test_scoring_with_known_shares_moves_the_models_prior_and_nothing_else():
    from plantation.benchmarks.labels import prior_groups, with_shares
    from plantation.model.artefact import Artefact
    from tests.test_artefact import _card

    card = _card()  # train prior: stable, old, other, two conversion years
    card.calibration.temperature, card.calibration.prior_source, card.calibration.target_prior = 1.3, "bbse", [0.9, 0.05, 0.05, 0.0, 0.0]
    art = Artefact(card, [], None)
    shares = {"stable_forest": 0.7, "conversion": 0.1, "old_plantation": 0.05, "other": 0.15}
    moved = with_shares(art, shares)
    assert prior_groups(moved) == {"source": "shares", "conversion": 0.1}
    assert moved.card.calibration.prior_groups() == pytest.approx(shares, abs=1e-5)
    assert moved.card.calibration.temperature == 1.3 and art.card.calibration.prior_source == "bbse"
