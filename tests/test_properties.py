"""Properties that must hold for any input, tried on many generated ones (hypothesis).

What each block holds, and against what:

* Readers' scaling and masking: whatever a file stores (finite, NaN, ±inf,
  huge, the type's largest value), a value that comes out unmasked is finite
  and inside ``PLAUSIBLE_REFLECTANCE``; the lazy arrays and the windowed
  reads agree.
* Design-based estimators (Olofsson et al. 2014; Stehman 2014): area shares
  sum to 1, proportions and accuracies lie in 0–1, standard errors are ≥ 0,
  and nothing depends on the order of the strata or of the points; the
  published example of Olofsson et al. (2014, section 5,
  ``../shared/reference/olofsson2014_example.json``) comes out the same
  whatever order its classes are listed in.
* Wilson intervals (Wilson 1927): inside 0–1, around the estimate, narrower
  with more points, and equal to scipy's ``binomtest(...).proportion_ci(
  method="wilson")`` for a count out of n.
* Prior correction (Saerens et al. 2002; Lipton et al. 2018): probabilities
  stay normalised, equal priors leave them unchanged, and black-box shift
  estimation with a classifier that confuses nothing recovers the shares.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest
import rasterio
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from scipy.stats import binomtest

from plantation.assessment.estimators import Strata, accuracy, stratified_mean, stratified_ratio
from plantation.imagery.config import MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.region import PLAUSIBLE_REFLECTANCE, open_tile, unusable
from plantation.model.calibration import adjust_priors, bbse_prior, population_prior, reweight
from plantation.report.intervals import wald_problem, wilson, wilson_bounds
from tests.conftest import CRS, TRANSFORM

FEW = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
FILES = settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
LOW, HIGH = PLAUSIBLE_REFLECTANCE

# ---------------------------------------------------------------- readers

#: Stored floats of every kind a broken product holds.
stored_floats = st.one_of(st.floats(allow_nan=True, allow_infinity=True, width=32), st.sampled_from([np.nan, np.inf, -np.inf, 0.0, 1e30, -1e30]))


@FEW
@given(
    raw=hnp.arrays(np.float32, (3, 4, 5), elements=stored_floats),
    scale=st.floats(1e-5, 2.0),
    offset=st.floats(-0.5, 0.5),
)
def test_float_values_come_out_finite_and_in_range_or_masked(raw, scale, offset):
    with np.errstate(all="ignore"):
        refl = raw * np.float32(scale) + np.float32(offset)
    bad = unusable(raw, refl, axis=0)
    kept = refl[:, ~bad]
    assert np.isfinite(kept).all() and (kept >= LOW).all() and (kept <= HIGH).all()
    # Masking is per pixel: a pixel is kept exactly when every band passes.
    every = np.isfinite(refl) & (refl >= LOW) & (refl <= HIGH)
    np.testing.assert_array_equal(~bad, every.all(0) & ~(raw == 0).all(0))


@FEW
@given(dtype=st.sampled_from([np.int16, np.uint16, np.uint8]), data=st.data())
def test_integer_values_at_the_types_largest_are_masked_whatever_the_scale(dtype, data):
    info = np.iinfo(dtype)
    raw = data.draw(hnp.arrays(dtype, (2, 3, 3), elements=st.integers(int(info.min), int(info.max))))
    scale = data.draw(st.floats(1e-6, 1e-3))
    refl = raw.astype(np.float32) * np.float32(scale)
    bad = unusable(raw, refl, axis=0)
    assert bad[(raw == info.max).any(0)].all()
    kept = refl[:, ~bad]
    assert (kept >= LOW).all() and (kept <= HIGH).all() and not (raw[:, ~bad] == info.max).any()


@FILES
@given(values=hnp.arrays(np.float32, (2, 2, 3, 3), elements=st.one_of(st.floats(-0.25, 1.75, width=32), st.sampled_from([np.nan, np.inf, -np.inf, 40.0]))))
def test_files_of_any_float_values_read_the_same_both_ways_and_never_out_of_range(tmp_path_factory, values):
    folder = tmp_path_factory.mktemp("float")
    for k, d in enumerate(["2020-01-01", "2020-07-01"]):
        with rasterio.open(folder / f"s_{d}.tif", "w", driver="GTiff", width=3, height=3, count=2, dtype="float32", transform=TRANSFORM, crs=CRS) as dst:
            dst.write(values[k])
    region = RegionConfig(name="p", tiles=[TileConfig(name="t", path=str(folder))], bands=["red", "nir"], nodata=None, mask=MaskConfig(band=None), scaling=[ScalingRule()], chunk=2)
    stack = open_tile(region.tiles[0], region)
    refl, valid = stack.read(0, 0, 3, 3)
    np.testing.assert_array_equal(valid, stack.valid.values)
    np.testing.assert_array_equal(refl, stack.reflectance.values)
    kept = refl.transpose(1, 0, 2, 3)[:, valid]
    assert np.isfinite(kept).all() and (kept >= LOW).all() and (kept <= HIGH).all()
    assert np.isnan(refl.transpose(1, 0, 2, 3)[:, ~valid]).all()
    # Nothing in range is lost: a pixel-date with every band plausible and not all zero stays.
    plausible = (np.isfinite(values) & (values >= LOW) & (values <= HIGH)).all(1) & ~(values == 0).all(1)
    np.testing.assert_array_equal(valid, plausible)


# ------------------------------------------------------------- estimators

CLASSES = ["a", "b", "c"]


@st.composite
def samples(draw):
    """A stratified sample: H strata with weights, ≥ 2 points each, map and reference classes per point."""
    h = draw(st.integers(2, 4))
    raw_w = draw(st.lists(st.floats(0.01, 1.0), min_size=h, max_size=h))
    w = np.array(raw_w) / sum(raw_w)
    n = draw(st.lists(st.integers(2, 12), min_size=h, max_size=h))
    code = np.repeat(np.arange(h), n)
    mc = np.array(draw(st.lists(st.sampled_from(CLASSES), min_size=len(code), max_size=len(code))), dtype=object)
    rc = np.array(draw(st.lists(st.sampled_from(CLASSES), min_size=len(code), max_size=len(code))), dtype=object)
    return code, w, mc, rc


def _flat(acc) -> list[float]:
    vals = [acc.overall.estimate, acc.overall.se, *acc.proportions.ravel()]
    for d in (acc.users, acc.producers, acc.area_share):
        for k in sorted(d):
            e = d[k]
            vals += [np.nan, np.nan] if e is None else [e.estimate, e.se]
    return vals


@FEW
@given(samples())
def test_accuracy_and_areas_are_proportions_that_add_up(sample):
    code, w, mc, rc = sample
    acc = accuracy(mc, rc, Strata(code, w), map_classes=CLASSES, ref_classes=CLASSES)
    assert acc.proportions.sum() == pytest.approx(1.0)
    assert (acc.proportions >= -1e-12).all() and (acc.proportions <= 1 + 1e-12).all()
    assert sum(e.estimate for e in acc.area_share.values()) == pytest.approx(1.0)
    for e in [acc.overall, *acc.area_share.values(), *(x for x in acc.users.values() if x), *(x for x in acc.producers.values() if x)]:
        assert -1e-12 <= e.estimate <= 1 + 1e-12 and e.se >= 0 and e.lo <= e.estimate <= e.hi
    # Overall accuracy is the matrix's diagonal.
    assert acc.overall.estimate == pytest.approx(np.trace(acc.proportions))


@FEW
@given(samples(), st.randoms(use_true_random=False))
def test_estimates_do_not_depend_on_the_order_of_strata_or_points(sample, rnd):
    code, w, mc, rc = sample
    ref = _flat(accuracy(mc, rc, Strata(code, w), map_classes=CLASSES, ref_classes=CLASSES))
    perm = list(range(len(w)))
    rnd.shuffle(perm)
    new_code = np.argsort(perm)[code]  # stratum h is now number inv[h], with its weight
    new_w = w[perm]
    order = list(range(len(code)))
    rnd.shuffle(order)
    got = _flat(accuracy(mc[order], rc[order], Strata(new_code[order], new_w), map_classes=CLASSES, ref_classes=CLASSES))
    np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-12)


@FEW
@given(samples(), st.floats(-5, 5))
def test_a_constant_has_no_variance_and_a_ratio_of_indicators_is_a_proportion(sample, c):
    code, w, mc, rc = sample
    s = Strata(code, w)
    e = stratified_mean(np.full(len(code), c), s)
    assert e.estimate == pytest.approx(c) and e.se == pytest.approx(0.0, abs=1e-12)
    y, x = (mc == rc) & (mc == "a"), mc == "a"
    r = stratified_ratio(y.astype(float), x.astype(float), s)
    if x.any():
        assert r is not None and -1e-12 <= r.estimate <= 1 + 1e-12 and r.se >= 0
    else:
        assert r is None


SHARED = Path(os.environ.get("PLANTATION_SHARED", Path(__file__).resolve().parents[2] / "shared"))
OLOFSSON = SHARED / "reference" / "olofsson2014_example.json"


@settings(max_examples=24, deadline=None)
@given(st.permutations(range(4)))
def test_olofsson_example_is_the_same_whatever_the_order_of_its_classes(order):
    if not OLOFSSON.is_file():
        pytest.skip("published check values not found beside the checkout")
    ex = json.loads(OLOFSSON.read_text())
    classes, m = ex["classes"], np.array(ex["sample_counts"]["matrix"])
    pixels = np.array(ex["mapped_area_pixels"], dtype=float)
    # Strata listed in the permuted order: stratum s is class order[s].
    mc, rc, code = [], [], []
    for s, i in enumerate(order):
        for j in range(4):
            mc += [classes[i]] * m[i, j]
            rc += [classes[j]] * m[i, j]
            code += [s] * m[i, j]
    w = pixels[list(order)] / pixels.sum()
    acc = accuracy(np.array(mc, dtype=object), np.array(rc, dtype=object), Strata(np.array(code), w), map_classes=[classes[i] for i in order], ref_classes=classes)
    total_ha = pixels.sum() * ex["pixel_area_ha"]
    areas = acc.areas(total_ha)
    for k, name in enumerate(classes):
        assert areas[name].estimate == pytest.approx(ex["expected"]["area_ha"][k], abs=1.0)
        assert 1.959964 * areas[name].se == pytest.approx(ex["expected"]["area_ci95_halfwidth_ha"][k], abs=2.0)
        assert acc.users[name].estimate == pytest.approx(ex["expected"]["users_accuracy"][k], abs=0.006)
        assert acc.producers[name].estimate == pytest.approx(ex["expected"]["producers_accuracy"][k], abs=0.006)
    assert acc.overall.estimate == pytest.approx(ex["expected"]["overall_accuracy"], abs=0.006)


# -------------------------------------------------------------- intervals

Z95 = 1.959963984540054


@FEW
@given(n=st.integers(1, 2000), data=st.data(), level=st.sampled_from([0.8, 0.9, 0.95, 0.99]))
def test_wilson_bounds_match_scipy_and_hold_the_estimate_inside_0_1(n, data, level):
    k = data.draw(st.integers(0, n))
    from scipy.stats import norm

    z = float(norm.ppf(0.5 + level / 2))
    lo, hi = wilson_bounds(k / n, n, z)
    ci = binomtest(k, n).proportion_ci(confidence_level=level, method="wilson")
    assert lo == pytest.approx(ci.low, abs=1e-9) and hi == pytest.approx(ci.high, abs=1e-9)
    assert 0.0 <= lo <= k / n <= hi <= 1.0
    assert hi - lo > 0


@FEW
@given(n=st.integers(1, 500), data=st.data(), factor=st.integers(2, 10))
def test_wilson_narrows_as_the_sample_grows(n, data, factor):
    k = data.draw(st.integers(0, n))
    lo1, hi1 = wilson_bounds(k / n, n, Z95)
    lo2, hi2 = wilson_bounds(k / n, n * factor, Z95)  # the same share from more points
    assert hi2 - lo2 < hi1 - lo1


@FEW
@given(p=st.floats(0, 1), se=st.one_of(st.none(), st.floats(0, 1)), points=st.one_of(st.none(), st.integers(1, 1000)))
def test_wilson_of_an_estimate_with_its_se_stays_in_0_1_around_it(p, se, points):
    w = wilson(p, se, Z95, points)
    if w is None:
        # Nothing to compute n from: no points, and no SE that gives a finite effective size.
        usable_se = se is not None and se * se > 0 and 0 < p < 1 and np.isfinite(p * (1 - p) / (se * se))
        assert not points and not usable_se
        return
    assert 0.0 <= w.lo <= p <= w.hi <= 1.0 and w.n > 0


@FEW
@given(est=st.floats(-1, 2), a=st.floats(0, 1), b=st.floats(0, 1))
def test_wald_problem_names_what_is_wrong_with_an_interval(est, a, b):
    lo, hi = est - a, est + b
    got = wald_problem(est, lo, hi, proportion=True)
    if hi - lo <= 1e-12:
        assert got == "zero_width"
    elif lo < -1e-12:
        assert got == "below_zero"
    elif hi > 1 + 1e-12:
        assert got == "above_one"
    else:
        assert got is None
    assert wald_problem(est, lo, hi, proportion=False) in (got, None) or got == "above_one"


# -------------------------------------------------------- prior correction


def prior_of(k: int) -> st.SearchStrategy[np.ndarray]:
    """A prior over k outcomes: positive, summing to 1."""
    return st.lists(st.floats(1e-4, 1.0), min_size=k, max_size=k).map(lambda v: np.array(v) / sum(v))


@st.composite
def posteriors(draw, k=None):
    k = k or draw(st.integers(4, 8))
    n = draw(st.integers(1, 20))
    raw = draw(hnp.arrays(np.float64, (n, k), elements=st.floats(1e-6, 1.0)))
    return raw / raw.sum(1, keepdims=True)


@FEW
@given(data=st.data())
def test_reweighting_keeps_probabilities_normalised_and_equal_priors_change_nothing(data):
    p = data.draw(posteriors())
    k = p.shape[1]
    old, new = data.draw(prior_of(k)), data.draw(prior_of(k))
    q = reweight(p, old, new)
    assert (q >= 0).all() and np.allclose(q.sum(1), 1.0)
    np.testing.assert_allclose(reweight(p, old, old), p, rtol=1e-12)
    # Only the ratio of priors matters, not their scale; and the correction undoes itself.
    np.testing.assert_allclose(reweight(p, old, 3.0 * new), q, rtol=1e-12)
    np.testing.assert_allclose(reweight(q, new, old), p, rtol=1e-9, atol=1e-15)


@FEW
@given(data=st.data())
def test_em_prior_adjustment_gives_normalised_outputs(data):
    p = data.draw(posteriors())
    k = p.shape[1]
    train = data.draw(prior_of(k))
    q, prior = adjust_priors(p, train)
    assert np.allclose(q.sum(1), 1.0) and (q >= 0).all()
    assert prior.sum() == pytest.approx(1.0) and (prior > 0).all()


@FEW
@given(data=st.data(), soft=st.booleans())
def test_bbse_with_a_classifier_that_confuses_nothing_recovers_the_shares(data, soft):
    k = data.draw(st.integers(2, 6))
    # Every outcome among the held-out points; the map's true counts drawn freely.
    val_t = np.concatenate([np.arange(k), data.draw(st.lists(st.integers(0, k - 1), max_size=30))]).astype(np.int64)
    counts = np.array(data.draw(st.lists(st.integers(0, 50), min_size=k, max_size=k)))
    assume(counts.sum() > 0)
    map_t = np.repeat(np.arange(k), counts)
    eye = np.eye(k)
    q = bbse_prior(eye[val_t], val_t, eye[map_t], np.full(k, 1.0 / k), soft=soft, floor=1e-9)
    want = np.maximum(counts / counts.sum(), 1e-9)
    np.testing.assert_allclose(q, want / want.sum(), atol=1e-9)


@FEW
@given(data=st.data())
def test_population_prior_with_equal_inclusion_probabilities_is_the_sample_mix(data):
    k = data.draw(st.integers(2, 6))
    t = np.array(data.draw(st.lists(st.integers(0, k - 1), min_size=1, max_size=40)), dtype=np.int64)
    pi = data.draw(st.floats(1e-3, 1.0))
    prior = population_prior(t, np.full(len(t), pi), k, floor=1e-12)
    want = np.maximum(np.bincount(t, minlength=k) / len(t), 1e-12)
    np.testing.assert_allclose(prior, want / want.sum(), rtol=1e-9)
    assert prior.sum() == pytest.approx(1.0)
