"""Baselines on series with a known answer."""

from __future__ import annotations

import numpy as np
import pytest

from plantation.benchmarks.baselines import AnnualTrees, BreakRule, annual_features, annual_medians, largest_drop
from plantation.model.outcomes import Outcomes

CHANNELS = ("blue", "green", "red", "nir", "swir1", "swir2", "NDVI", "EVI", "NBR", "NDMI")


def test_annual_medians_ignore_invalid_dates():
    x = np.array([[[1.0], [3.0], [100.0], [5.0]]])  # (1 pixel, 4 dates, 1 channel)
    valid = np.array([[True, True, False, False]])
    med, count = annual_medians(x, valid, np.array([0, 0, 1, 1]), 2)
    assert med[0, 0, 0] == 2.0 and np.isnan(med[0, 1, 0])
    assert count.tolist() == [[2, 0]]


def test_largest_drop_finds_the_step():
    y = np.array([[0.6] * 5 + [0.1] * 2 + [0.35] * 5, [0.6] * 12])
    year, drop, after = largest_drop(y, 0.005)
    assert year.tolist() == [5, -1]
    assert drop[0] == pytest.approx(0.5) and after[0] == pytest.approx(0.35)


def _series(kind: str, year: int, rng: np.random.Generator) -> np.ndarray:
    nbr = np.full(8, 0.6)
    if kind == "conversion":
        nbr[year:] = 0.05
        nbr[year + 2 :] = 0.35
    elif kind == "other":
        nbr[:] = 0.1
    elif kind == "old":
        nbr[:] = 0.4
    return nbr + rng.normal(0, 0.02, 8)


def test_break_rule_learns_conversion_years():
    rng = np.random.default_rng(0)
    kinds = ["forest", "old", "other"] + ["conversion"] * 5
    outcomes = Outcomes(tuple(range(2010, 2018)))
    nbr, target = [], []
    for _ in range(40):
        for i, k in enumerate(kinds):
            yr = i - 2 if k == "conversion" else 0  # conversions in years 1..5
            nbr.append(_series(k, yr, rng))
            target.append({"forest": 0, "old": 1, "other": 2}.get(k, 3 + yr))
    nbr_a = np.array(nbr)
    static = np.stack([nbr_a.mean(1), nbr_a.mean(1), -nbr_a.mean(1)], 1)
    rule = BreakRule().fit(nbr_a, static, np.array(target))
    pred = rule.predict(nbr_a, static)
    assert (pred == np.array(target)).mean() > 0.95
    p = rule.predict_proba(nbr_a[:3], static[:3], outcomes)
    assert p.sum(1).tolist() == [1.0, 1.0, 1.0]
    with pytest.raises(RuntimeError, match="not fitted"):
        BreakRule().predict(nbr_a, static)


def test_trees_fit_and_return_every_outcome():
    rng = np.random.default_rng(1)
    n, t = 300, 8
    x = rng.normal(0.3, 0.05, (n, t, len(CHANNELS))).astype(np.float32)
    target = rng.integers(0, 3, n)
    x[target == 2, :, CHANNELS.index("NBR")] -= 0.3  # "other" is darker in NBR
    valid = rng.random((n, t)) > 0.2
    f = annual_features(x, valid, np.repeat(np.arange(4), 2), 4, CHANNELS)
    trees = AnnualTrees(max_iter=50).fit(f, target, n_outcomes=7)
    p = trees.predict_proba(f)
    assert p.shape == (n, 7) and np.allclose(p.sum(1), 1) and (p[:, 3:] == 0).all()
    assert (p.argmax(1)[target == 2] == 2).mean() > 0.9
