"""Baselines on series with a known answer."""

from __future__ import annotations

import numpy as np
import pytest

from plantation.benchmarks.baselines import AnnualForest, AnnualTrees, BreakRule, annual_features, annual_medians, annual_summaries, largest_drop
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


# --------------------------------------------------------------------------- #
# AnnualForest: random forest on annual medians and minima, tuned and
# temperature-scaled on the validation split.
# --------------------------------------------------------------------------- #

N_YEARS = 8
DATES_PER_YEAR = 3
DATE_YEAR = np.repeat(np.arange(N_YEARS), DATES_PER_YEAR)
SMALL_GRID = {"n_estimators": (15, 40), "max_depth": (3, None), "max_features": ("sqrt", 0.5)}


def _pixels(n: int, rng: np.random.Generator, conversion_years: tuple[int, ...] = (1, 2, 3, 4, 5)) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(x (n, dates, channels), valid (n, dates), outcome (n,)): stable forest, other land, or conversion in year k.

    A conversion is a drop of NBR (and with it NDVI and NDMI, a rise of red and
    SWIR1) to bare soil on year k's first date, then a young plantation's
    level; noise and clouds (30 % of dates, the clearing date too) make the
    year uncertain for some pixels.
    """
    t = len(DATE_YEAR)
    kinds = rng.integers(0, 2 + len(conversion_years), n)  # 0 forest, 1 other, then a conversion year each
    nbr = np.full((n, t), 0.6)
    nbr[kinds == 1] = 0.1
    outcome = np.where(kinds == 0, 0, 2)
    for j, k in enumerate(conversion_years):
        m = kinds == 2 + j
        first = k * DATES_PER_YEAR
        nbr[m, first] = 0.0  # the clearing
        nbr[m, first + 1 :] = 0.35  # young plantation
        outcome[m] = 3 + k
    nbr = nbr + rng.normal(0, 0.08, (n, t))
    x = rng.normal(0.05, 0.01, (n, t, len(CHANNELS)))
    x[:, :, CHANNELS.index("NBR")] = nbr
    x[:, :, CHANNELS.index("NDVI")] = 0.3 + 0.8 * nbr + rng.normal(0, 0.08, (n, t))
    x[:, :, CHANNELS.index("NDMI")] = -0.1 + 0.6 * nbr + rng.normal(0, 0.08, (n, t))
    x[:, :, CHANNELS.index("swir1")] = 0.3 - 0.3 * nbr
    x[:, :, CHANNELS.index("red")] = 0.12 - 0.1 * nbr
    valid = rng.random((n, t)) > 0.3
    return x.astype(np.float32), valid, outcome


def _forest_data(seed: int, **kw):
    rng = np.random.default_rng(seed)
    parts = [_pixels(n, rng, **kw) for n in (400, 200, 300)]
    feats = [AnnualForest.features(x, v, DATE_YEAR, N_YEARS, CHANNELS) for x, v, _ in parts]
    return feats, [o for _, _, o in parts]


def test_annual_features_minima_extend_the_median_columns():
    rng = np.random.default_rng(0)
    x, valid, _ = _pixels(5, rng)
    base = annual_features(x, valid, DATE_YEAR, N_YEARS, CHANNELS)
    both = annual_features(x, valid, DATE_YEAR, N_YEARS, CHANNELS, minima=True)
    n_base = 5 * N_YEARS + N_YEARS + 2 * (N_YEARS - 1)  # medians, clear counts, ΔNBR, ΔNDVI
    assert base.shape == (5, n_base) and both.shape == (5, n_base + 5 * N_YEARS + 2 * (N_YEARS - 1))
    np.testing.assert_array_equal(both[:, :n_base], base)  # AnnualTrees' columns unchanged
    # First minimum column: NDVI of year 0, by hand.
    ndvi = np.where(valid[:, :DATES_PER_YEAR], x[:, :DATES_PER_YEAR, CHANNELS.index("NDVI")], np.inf).min(1)
    ndvi[np.isinf(ndvi)] = np.nan  # a year with no clear view
    np.testing.assert_allclose(both[:, n_base], ndvi, rtol=1e-6)
    with pytest.raises(ValueError, match="unknown annual statistic"):
        annual_summaries(x, valid, DATE_YEAR, N_YEARS, ("mean",))


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_forest_separates_and_dates_conversions(seed):
    (f_tr, f_va, f_te), (t_tr, t_va, t_te) = _forest_data(seed)
    forest = AnnualForest(**SMALL_GRID, seed=seed).fit(f_tr, t_tr, 3 + N_YEARS, val=(f_va, t_va))
    pred = forest.predict_proba(f_te).argmax(1)
    conv = t_te >= 3
    assert (pred[~conv] == t_te[~conv]).mean() > 0.95  # stable forest and other land stay unconverted
    assert (pred[conv] == t_te[conv]).mean() > 0.85  # conversions found, in the right year
    # The temperature can only lower the validation loss (T = 1 is among its choices).
    assert forest.temperature_ is not None and forest.val_nll_["calibrated"] <= forest.val_nll_["raw"] + 1e-6


def test_forest_probabilities_cover_unseen_outcomes():
    (f_tr, f_va, f_te), (t_tr, t_va, _) = _forest_data(3, conversion_years=(2, 4))
    # Validation also holds an outcome never seen in training (conversion in year 6).
    t_va = t_va.copy()
    t_va[:5] = 3 + 6
    forest = AnnualForest(**SMALL_GRID).fit(f_tr, t_tr, 3 + N_YEARS, val=(f_va, t_va))
    p = forest.predict_proba(f_te)
    unseen = [1, 3, 4, 6, 8, 9, 10]  # old plantation and conversions outside years 2 and 4
    assert p.shape == (len(f_te), 3 + N_YEARS)
    np.testing.assert_allclose(p.sum(1), 1.0, atol=1e-9)
    assert (p[:, unseen] == 0).all() and (p[:, [0, 2, 5, 7]] > 0).all()
    assert forest.val_nll_["n_unseen"] == 5 and forest.val_nll_["n"] == len(t_va) - 5
    with pytest.raises(RuntimeError, match="not fitted"):
        AnnualForest().predict_proba(f_te)


def test_forest_tunes_on_the_validation_split(monkeypatch):
    import plantation.model.calibration as calibration

    (f_tr, f_va, _), (t_tr, t_va, _) = _forest_data(4)
    seen_sizes = []
    real = calibration.fit_temperature

    def spy(logits, targets, *a, **k):
        seen_sizes.append(len(targets))
        return real(logits, targets, *a, **k)

    monkeypatch.setattr(calibration, "fit_temperature", spy)
    forest = AnnualForest(**SMALL_GRID).fit(f_tr, t_tr, 3 + N_YEARS, val=(f_va, t_va))
    n_grid = 2 * 2 * 2
    # One temperature per grid point plus the final one, each on the validation split only.
    assert seen_sizes == [len(t_va)] * (n_grid + 1)
    assert len(forest.grid_) == n_grid
    best = min(forest.grid_, key=lambda g: g["val_nll"])
    assert forest.params_ == {k: best[k] for k in ("n_estimators", "max_depth", "max_features")}
    assert forest.params_["n_estimators"] in SMALL_GRID["n_estimators"] and forest.params_["max_depth"] in SMALL_GRID["max_depth"]
    # The refit is the tuned forest (same seed): the same validation loss, and a second fit gives the same probabilities.
    assert forest.val_nll_["calibrated"] == pytest.approx(best["val_nll"], rel=1e-6)
    again = AnnualForest(**SMALL_GRID).fit(f_tr, t_tr, 3 + N_YEARS, val=(f_va, t_va))
    np.testing.assert_array_equal(again.predict_proba(f_va), forest.predict_proba(f_va))


def test_forest_depth_follows_the_validation_split():
    # XOR of two features: a depth-1 forest cannot learn it, an unlimited one can;
    # the grid must prefer the deep forest on validation data that follow the same rule.
    rng = np.random.default_rng(5)

    def xor(n):
        f = rng.normal(0, 1, (n, 2)).astype(np.float32)
        return f, ((f[:, 0] > 0) ^ (f[:, 1] > 0)).astype(np.int64)

    (f_tr, t_tr), (f_va, t_va) = xor(400), xor(200)
    forest = AnnualForest(n_estimators=(30,), max_depth=(1, None), max_features=(1.0,)).fit(f_tr, t_tr, 2, val=(f_va, t_va))
    assert forest.params_["max_depth"] is None
    stump = next(g for g in forest.grid_ if g["max_depth"] == 1)
    assert stump["val_nll"] > forest.val_nll_["calibrated"] + 0.2


def test_forest_rejects_bad_inputs():
    f = np.zeros((4, 2), np.float32)
    with pytest.raises(ValueError, match="outside"):
        AnnualForest().fit(f, np.array([0, 1, 2, 5]), 3, val=(f, np.array([0, 1, 2, 0])))
    with pytest.raises(ValueError, match="no validation sample"):
        AnnualForest().fit(f, np.array([0, 0, 1, 1]), 3, val=(f[:1], np.array([2])))
    with pytest.raises(ValueError, match="grid is empty"):
        AnnualForest(max_depth=()).fit(f, np.array([0, 0, 1, 1]), 3, val=(f, np.array([0, 0, 1, 1])))
