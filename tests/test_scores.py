"""Wall-to-wall benchmark scores on a handful of pixels with a known answer.

Reference: per-class F1 is checked against ``sklearn.metrics.f1_score(average=None)``.
"""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import f1_score

from plantation.benchmarks.scores import false_conversion_rate, map_scores, per_class_f1
from plantation.model.outcomes import Summary
from plantation.simulation.scenario import EVENTS


def _summary(label, year, lo, hi, p):
    z = np.zeros(len(label), np.float32)
    return Summary(np.array(label), np.array(year), np.array(lo), np.array(hi), np.array(p, np.float32), z, z)


def test_scores_of_six_pixels():
    # truth: 3 conversions (2016, 2017, 2018), a forest, an old plantation, an other
    true_label = np.array([2, 2, 2, 1, 3, 4])
    true_year = np.array([2016, 2017, 2018, 0, 0, 0])
    # map: right year; one year late (interval 2017-2018 covers it? no: truth 2017, interval 2018-2019);
    # missed as forest; forest right; old plantation mapped as conversion; other right
    s = _summary([2, 2, 1, 1, 2, 4], [2016, 2018, 0, 0, 2015, 0], [2015, 2018, 0, 0, 2015, 0], [2016, 2019, 0, 0, 2015, 0], [0.9, 0.8, 0.2, 0.1, 0.6, 0.0])
    sc = map_scores(s, true_label, true_year)
    assert sc["year_exact"] == pytest.approx(1 / 3, abs=1e-4)
    assert sc["year_within1"] == pytest.approx(2 / 3, abs=1e-4)
    # two conversions mapped as conversion, one of them inside its interval; three true conversions in all
    assert sc["interval80_coverage"] == pytest.approx(1 / 2, abs=1e-4)
    assert sc["interval80_coverage_all_conversions"] == pytest.approx(1 / 3, abs=1e-4)
    assert sc["year_mae"] == pytest.approx(0.5)
    # conversion vs not: TP 2, FP 1, FN 1 → F1 = 2·2 / (2·2 + 1 + 1) = 2/3
    assert sc["conversion_f1"] == pytest.approx(2 / 3, abs=1e-4)
    assert sc["macro_f1"] == pytest.approx(f1_score(true_label, s.label, average="macro"), abs=1e-4)
    # ECE bins: 0.9 (y=1), 0.8 (1), 0.2 (1), 0.1 (0), 0.6 (0), 0.0 (0) → each alone in its bin
    # except none share; |1-.9|+|1-.8|+|1-.2|+|0-.1|+|0-.6|+|0-0| = 1.8 → /6
    assert sc["ece"] == pytest.approx(0.3, abs=1e-4)
    assert sc["year_exact_by_onset_year"] == {"2016": 1.0, "2017": 0.0, "2018": 0.0}


def test_per_class_f1_of_six_pixels():
    true_label = np.array([2, 2, 2, 1, 3, 4])
    s = _summary([2, 2, 1, 1, 2, 4], [0] * 6, [0] * 6, [0] * 6, [0.0] * 6)
    f1 = per_class_f1(s, true_label)
    # By hand: conversion TP 2 FP 1 FN 1 → 2/3; forest TP 1 FP 1 → 2/3; old plantation never mapped → 0; other exact → 1.
    assert f1 == pytest.approx({"stable_forest": 2 / 3, "conversion": 2 / 3, "old_plantation": 0.0, "other": 1.0}, abs=1e-4)


@pytest.mark.parametrize("seed", range(5))
def test_per_class_f1_matches_sklearn(seed):
    rng = np.random.default_rng(seed)
    true_label = rng.integers(1, 5, (6, 7))
    pred = np.where(rng.random((6, 7)) < 0.6, true_label, rng.integers(1, 4, (6, 7)))  # label 4 rarely mapped
    s = _summary(pred.ravel(), *([np.zeros(42)] * 3), np.zeros(42))
    ref = f1_score(true_label.ravel(), pred.ravel(), labels=[1, 2, 3, 4], average=None, zero_division=0)  # sklearn reference
    assert list(per_class_f1(s, true_label).values()) == pytest.approx(ref.tolist(), abs=1e-4)


def test_false_conversion_rate_on_a_hand_made_truth():
    years = range(2010, 2016)  # last year 2015
    e = EVENTS
    # (event, event year, mapped as conversion)
    pixels = [
        ("logging", 2015, True),  # 0 years since
        ("logging", 2015, False),
        ("logging", 2014, True),  # 1
        ("logging", 2010, False),  # 5 → 3+
        ("logging", 2011, False),  # 4 → 3+
        ("fire_regrowth", 2013, False),  # 2
        ("cleared_for_crops", 2012, True),  # 3 → 3+
        ("cropland", 0, True),  # no event year
        ("cropland", 0, False),
        ("water", 0, False),
        ("estate_conversion", 2013, True),  # a true conversion: not a look-alike
        ("none", 0, True),
    ]
    event = np.array([e[k] for k, _, _ in pixels]).reshape(3, 4)
    event_year = np.array([y for _, y, _ in pixels]).reshape(3, 4)
    pred = np.array([m for _, _, m in pixels]).reshape(3, 4)
    r = false_conversion_rate(pred, event, event_year, years, EVENTS)
    assert list(r) == ["logging", "fire_regrowth", "cleared_for_crops", "cropland", "grassland", "water"]
    assert r["logging"]["rate"] == 0.4 and r["logging"]["n_pixels"] == 5
    assert r["logging"]["by_years_since"] == {"0": 0.5, "1": 1.0, "2": None, "3+": 0.0}
    assert r["logging"]["n_by_years_since"] == {"0": 2, "1": 1, "2": 0, "3+": 2}
    assert r["fire_regrowth"]["by_years_since"] == {"0": None, "1": None, "2": 0.0, "3+": None}
    assert r["cleared_for_crops"]["rate"] == 1.0 and r["cleared_for_crops"]["by_years_since"]["3+"] == 1.0
    assert r["cropland"] == {"rate": 0.5, "n_pixels": 2, "by_years_since": {}, "n_by_years_since": {}}
    assert r["grassland"]["rate"] is None and r["grassland"]["n_pixels"] == 0
    assert r["water"]["rate"] == 0.0
    with pytest.raises(ValueError, match="unknown event kind"):
        false_conversion_rate(pred, event, event_year, years, EVENTS, kinds=("flood",))
    with pytest.raises(ValueError, match="differ in size"):
        false_conversion_rate(pred[:2], event, event_year, years, EVENTS)
