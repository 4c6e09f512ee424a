"""Outcome indexing and the reading of one distribution into class, year and interval."""

from __future__ import annotations

import numpy as np
import pytest

from plantation.errors import LabelError
from plantation.model.outcomes import MASS_GRID, Outcomes, interval_coverage_curve, mass_for_coverage, summarise, year_interval

YEARS = (2015, 2016, 2017, 2018, 2019)


def test_outcome_index_round_trip():
    o = Outcomes(YEARS)
    idx = o.encode(["stable_forest", "old_plantation", "other", "conversion", "conversion"], [0, 0, 0, 2015, 2019])
    assert idx.tolist() == [0, 1, 2, 3, 7]
    assert o.label_code(idx).tolist() == [1, 3, 4, 2, 2]
    assert o.onset_year(idx).tolist() == [0, 0, 0, 2015, 2019]
    with pytest.raises(LabelError, match="onset year 2014 is outside the series 2015-2019"):
        o.index("conversion", 2014)


def test_interval_grows_from_the_mode_to_the_level():
    # mass 0.1, 0.5, 0.25, 0.1, 0.05: mode 1; +0.25 (right) = 0.75; +0.1 (left, tie with right → left) = 0.85
    mode, lo, hi = year_interval(np.array([[0.1, 0.5, 0.25, 0.1, 0.05]]), 0.8)
    assert (mode[0], lo[0], hi[0]) == (1, 0, 2)
    # A point mass gives a one-year interval at any level.
    mode, lo, hi = year_interval(np.array([0.0, 0.0, 1.0, 0.0, 0.0]), 0.95)
    assert (int(mode), int(lo), int(hi)) == (2, 2, 2)


def test_interval_always_contains_the_mode_and_reaches_the_level():
    rng = np.random.default_rng(5)
    w = rng.dirichlet(np.full(9, 0.3), size=500)
    mode, lo, hi = year_interval(w, 0.8)
    assert np.array_equal(mode, w.argmax(1))
    assert ((lo <= mode) & (mode <= hi)).all()
    mass = np.array([w[i, lo[i] : hi[i] + 1].sum() for i in range(len(w))])
    assert (mass >= 0.8 - 1e-9).all()
    # Grown one year at a time: without its last-added end the interval is below the level.
    inner = np.array([min(w[i, lo[i] + 1 : hi[i] + 1].sum(), w[i, lo[i] : hi[i]].sum()) if hi[i] > lo[i] else 0 for i in range(len(w))])
    assert (inner[hi > lo] < 0.8 + 1e-9).all()


def test_summary_of_one_distribution():
    # stable 0.1, old 0.05, other 0.05, conversion years: 0.1 0.5 0.15 0.05 0.0 → p_conv 0.8
    p = np.array([0.1, 0.05, 0.05, 0.1, 0.5, 0.15, 0.05, 0.0])
    s = summarise(p[None], YEARS, cutoff_year=2016, level=0.8)
    assert s.label[0] == 2 and s.year[0] == 2016
    assert s.p_conversion[0] == pytest.approx(0.8)
    assert s.p_after_cutoff[0] == pytest.approx(0.2)  # 2017 + 2018 + 2019
    # Conditional year mass: 0.125, 0.625, 0.1875, 0.0625 → mode 2016, + 2017 = 0.8125
    assert (s.year_low[0], s.year_high[0]) == (2016, 2017)
    # Not conversion: no year, no interval.
    q = np.array([0.7, 0.1, 0.1, 0.02, 0.02, 0.02, 0.02, 0.02])
    t = summarise(q[None], YEARS, cutoff_year=2016)
    assert t.label[0] == 1 and t.year[0] == 0 and t.year_low[0] == 0 and t.p_label[0] == pytest.approx(0.7)


def test_summary_rejects_a_wrong_outcome_count():
    with pytest.raises(ValueError, match="7 outcomes; 8 expected for 5 years"):
        summarise(np.full((1, 7), 1 / 7), YEARS, cutoff_year=2016)


# --------------------------------------------------------------------------- the interval's level, recalibrated


def _draw(n: int, sharpen: float, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """True year distributions spread over three or four years around a random centre, the years drawn from them, and an overconfident model's view of them (p**sharpen, renormalised)."""
    n_years = 9
    shape = np.array([0.1, 0.2, 0.4, 0.2, 0.1])
    true_p = np.zeros((n, n_years))
    centre = rng.integers(2, n_years - 2, n)
    for k in range(-2, 3):
        true_p[np.arange(n), centre + k] = shape[k + 2]
    years = (true_p.cumsum(1) < rng.random(n)[:, None]).sum(1)
    model = true_p**sharpen
    return model / model.sum(1, keepdims=True), years


def test_recalibrated_interval_holds_its_level_on_new_data_where_the_raw_one_does_not():
    """Kuleshov et al. (2018): measure coverage against the level asked for on held-out data, then ask for the level that covers as wanted.

    An overconfident model (its year probabilities sharpened) gives 80%
    intervals that hold far fewer than 80% of true years; with the mass
    chosen on one draw, the intervals hold 80% on another (within whole-year
    steps: with true masses 0.4, 0.6, 0.8, 0.9, 1.0 the 80% step exists).
    """
    rng = np.random.default_rng(0)
    cal_p, cal_y = _draw(4000, 3.0, rng)
    new_p, new_y = _draw(4000, 3.0, rng)

    def coverage(p, y, mass):
        _, lo, hi = year_interval(p, mass)
        return float(((lo <= y) & (y <= hi)).mean())

    assert coverage(new_p, new_y, 0.8) < 0.65
    curve = interval_coverage_curve(cal_p, cal_y)
    assert len(curve) == len(MASS_GRID) and all(a <= b + 1e-12 for a, b in zip(curve, curve[1:], strict=False))
    mass = mass_for_coverage(MASS_GRID, curve, 0.8)
    assert mass > 0.8
    assert coverage(new_p, new_y, mass) == pytest.approx(0.8, abs=0.03)


def test_mass_for_coverage_picks_the_nearest_and_falls_back_to_the_level():
    masses = [0.5, 0.6, 0.7, 0.8, 0.9]
    assert mass_for_coverage(masses, [0.6, 0.7, 0.78, 0.9, 0.95], 0.8) == 0.7
    # A flat step: every mass from 0.5 to 0.8 covers 0.9; the one nearest the level is kept.
    assert mass_for_coverage(masses, [0.9, 0.9, 0.9, 0.9, 0.97], 0.8) == 0.8
    assert mass_for_coverage([], [], 0.8) == 0.8
    assert interval_coverage_curve(np.zeros((0, 4)), np.zeros(0)) == []
    with pytest.raises(ValueError, match="one true year per row"):
        interval_coverage_curve(np.ones((3, 4)), np.zeros(2))
