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
