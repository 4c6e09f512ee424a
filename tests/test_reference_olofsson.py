"""The estimators against published worked examples and reference libraries.

Sources:
- Olofsson, P., Foody, G. M., Herold, M., Stehman, S. V., Woodcock, C. E.,
  Wulder, M. A. (2014). Good practices for estimating area and assessing
  accuracy of land change. Remote Sensing of Environment 148: 42–57,
  section 5 (Tables 8–9), and its eq. 13 sample size; counts, mapped areas
  and the published results are read from ``../shared/reference/
  olofsson2014_example.json``.
- scikit-learn's metrics (accuracy_score, precision_score, recall_score) for
  an unstratified sample, where design-based and plain sample figures agree.
- The rare-class rule of thumb (common practice, in check_values.md): at 1%
  prevalence, 99% recall and a 1% false-positive rate, precision (user's
  accuracy) is about 50%.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest
from sklearn.metrics import accuracy_score, precision_score, recall_score

from plantation.assessment.estimators import Strata, accuracy, allocate, cochran_sample_size, expected_overall_se, stratified_mean, stratified_ratio

#: The shared check values beside the checkout (or where PLANTATION_SHARED points).
SHARED = Path(os.environ.get("PLANTATION_SHARED", Path(__file__).resolve().parents[2] / "shared"))
REFERENCE = SHARED / "reference" / "olofsson2014_example.json"


@pytest.fixture(scope="module")
def example() -> dict:
    if not REFERENCE.is_file():
        pytest.skip(f"published check values not found beside the checkout ({REFERENCE.name})")
    return json.loads(REFERENCE.read_text())


def expand(matrix: list[list[int]], classes: list[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sample points (map class, reference class, stratum code) from a count matrix whose rows are strata."""
    mc, rc, code = [], [], []
    for i, row in enumerate(matrix):
        for j, n in enumerate(row):
            mc += [classes[i]] * n
            rc += [classes[j]] * n
            code += [i] * n
    return np.array(mc, dtype=object), np.array(rc, dtype=object), np.array(code)


def test_olofsson_2014_section5_reproduced(example: dict) -> None:
    classes = example["classes"]
    m = example["sample_counts"]["matrix"]
    pixels = np.array(example["mapped_area_pixels"], dtype=np.float64)
    total_ha = pixels.sum() * example["pixel_area_ha"]
    mc, rc, code = expand(m, classes)
    # The design's n is 641 (eq. 13, tested below); the allocation printed in
    # Table 8 (75, 75, 165, 325 per stratum) places 640 of them.
    assert len(mc) == 640
    strata = Strata(code=code, weight=pixels / pixels.sum())
    acc = accuracy(mc, rc, strata, map_classes=classes, ref_classes=classes, confidence=0.95)
    exp = example["expected"]
    areas = acc.areas(total_ha)
    # Published to the nearest hectare.
    assert [round(areas[c].estimate) for c in classes] == exp["area_ha"]
    assert [round(1.96 * areas[c].se) for c in classes] == exp["area_ci95_halfwidth_ha"]
    # The interval uses z = 1.959964; the paper's 1.96 gives the same hectares to within 1.
    assert [abs(areas[c].half_width - h) <= 1.0 for c, h in zip(classes, exp["area_ci95_halfwidth_ha"], strict=True)] == [True] * 4
    assert [round(acc.users[c].estimate, 2) for c in classes] == exp["users_accuracy"]
    assert [round(acc.producers[c].estimate, 2) for c in classes] == exp["producers_accuracy"]
    assert round(acc.overall.estimate, 2) == exp["overall_accuracy"]
    assert acc.proportions.sum() == pytest.approx(1.0)
    assert acc.counts.tolist() == m


def test_olofsson_2014_equations_for_standard_errors(example: dict) -> None:
    """The ratio estimator's SEs equal the paper's closed forms when strata are the map classes (eqs. 5–7)."""
    classes = example["classes"]
    n = np.array(example["sample_counts"]["matrix"], dtype=np.float64)
    pixels = np.array(example["mapped_area_pixels"], dtype=np.float64)
    w = pixels / pixels.sum()
    ni = n.sum(1)
    p = w[:, None] * n / ni[:, None]  # eq. 4
    u = np.diag(n) / ni
    pj = p.sum(0)
    prod = np.diag(p) / pj
    oa = np.trace(p)
    v_oa = np.sum(w**2 * u * (1 - u) / (ni - 1))  # eq. 5
    v_u = u * (1 - u) / (ni - 1)  # eq. 6
    # eq. 7: producer's accuracy of class j.
    nj_hat = np.array([np.sum(pixels * n[:, j] / ni) for j in range(4)])
    v_p = np.zeros(4)
    for j in range(4):
        others = sum(pixels[i] ** 2 * n[i, j] / ni[i] * (1 - n[i, j] / ni[i]) / (ni[i] - 1) for i in range(4) if i != j)
        v_p[j] = (1 / nj_hat[j] ** 2) * (pixels[j] ** 2 * (1 - prod[j]) ** 2 * u[j] * (1 - u[j]) / (ni[j] - 1) + prod[j] ** 2 * others)
    mc, rc, code = expand(example["sample_counts"]["matrix"], classes)
    acc = accuracy(mc, rc, Strata(code=code, weight=w), map_classes=classes, ref_classes=classes)
    assert acc.overall.estimate == pytest.approx(oa, rel=1e-12)
    assert acc.overall.se == pytest.approx(np.sqrt(v_oa), rel=1e-10)
    for k, c in enumerate(classes):
        assert acc.users[c].se == pytest.approx(np.sqrt(v_u[k]), rel=1e-10)
        assert acc.producers[c].estimate == pytest.approx(prod[k], rel=1e-12)
        assert acc.producers[c].se == pytest.approx(np.sqrt(v_p[k]), rel=1e-8)


def test_olofsson_2014_sample_size(example: dict) -> None:
    pixels = np.array(example["mapped_area_pixels"], dtype=np.float64)
    s = example["sample_size_example"]
    n = cochran_sample_size(pixels / pixels.sum(), s["assumed_users_accuracy"], s["target_standard_error_overall_accuracy"])
    assert n == s["expected_n"] == 641
    # The finite-population form differs only in the last digit for ten million pixels.
    assert cochran_sample_size(pixels / pixels.sum(), s["assumed_users_accuracy"], 0.01, population=int(pixels.sum())) in (640, 641)
    # Eq. 13 is the size at which Neyman allocation (n_h ∝ W_h S_h) meets the target exactly;
    # proportional allocation of the same n falls a little short of it.
    w, u = pixels / pixels.sum(), np.array(s["assumed_users_accuracy"])
    neyman = n * w * np.sqrt(u * (1 - u)) / np.sum(w * np.sqrt(u * (1 - u)))
    assert expected_overall_se(w, u, neyman) == pytest.approx(0.01, rel=0.001)
    alloc = allocate(n, pixels.astype(int), floor=0)
    assert alloc.sum() == n
    assert 0.01 < expected_overall_se(w, u, alloc) < 0.011


def test_unstratified_sample_agrees_with_scikit_learn() -> None:
    """One stratum (simple random sample): user's = precision, producer's = recall, overall = accuracy."""
    rng = np.random.default_rng(11)
    classes = ["a", "b", "c"]
    truth = rng.choice(classes, 500, p=[0.6, 0.3, 0.1])
    pred = np.where(rng.uniform(size=500) < 0.8, truth, rng.choice(classes, 500))
    acc = accuracy(pred, truth, Strata(code=np.zeros(500, dtype=int), weight=np.array([1.0])), map_classes=classes, ref_classes=classes)
    assert acc.overall.estimate == pytest.approx(accuracy_score(truth, pred))
    for c, prec, rec in zip(classes, precision_score(truth, pred, labels=classes, average=None), recall_score(truth, pred, labels=classes, average=None), strict=True):
        assert acc.users[c].estimate == pytest.approx(prec)
        assert acc.producers[c].estimate == pytest.approx(rec)
    # And the SE of a proportion from a simple random sample: sqrt(p(1-p)/(n-1)).
    p = accuracy_score(truth, pred)
    assert acc.overall.se == pytest.approx(np.sqrt(p * (1 - p) / 499))


def test_rare_class_user_accuracy_near_half() -> None:
    """1% prevalence, 99% recall, 1% false positives: user's accuracy ≈ 0.5 (common practice)."""
    rng = np.random.default_rng(5)
    n_pop = 2_000_000
    truth = rng.uniform(size=n_pop) < 0.01
    mapped = np.where(truth, rng.uniform(size=n_pop) < 0.99, rng.uniform(size=n_pop) < 0.01)
    # A stratified sample of the simulated map: 1,000 points in each map stratum.
    idx = np.concatenate([rng.choice(np.flatnonzero(mapped == s), 1000, replace=False) for s in (True, False)])
    code = np.where(mapped[idx], 0, 1)
    w = np.array([mapped.mean(), 1 - mapped.mean()])
    mc = np.where(mapped[idx], "change", "none")
    rc = np.where(truth[idx], "change", "none")
    acc = accuracy(mc, rc, Strata(code=code, weight=w), map_classes=["change", "none"], ref_classes=["change", "none"])
    ua = acc.users["change"]
    assert ua.lo < 0.5 < ua.hi
    assert ua.estimate == pytest.approx(0.5, abs=0.05)
    assert acc.producers["change"].estimate == pytest.approx(0.99, abs=0.03)
    # The area of the rare class comes out near its 1%, not the map's ~2%.
    assert acc.area_share["change"].estimate == pytest.approx(truth.mean(), abs=0.002)
    assert mapped.mean() == pytest.approx(0.0199, abs=0.001)


def test_ratio_undefined_and_strata_checks() -> None:
    code = np.array([0, 0, 1, 1])
    s = Strata(code=code, weight=np.array([0.5, 0.5]))
    assert stratified_ratio(np.zeros(4), np.zeros(4), s) is None
    assert stratified_mean(np.array([1, 1, 0, 0]), s).estimate == pytest.approx(0.5)
    with pytest.raises(ValueError, match="no sample point"):
        Strata(code=np.array([0, 0]), weight=np.array([0.5, 0.5]))
    with pytest.raises(ValueError, match="one sample point"):
        Strata(code=np.array([0, 0, 1]), weight=np.array([0.5, 0.5]))
    with pytest.raises(ValueError, match="sum to 1"):
        Strata(code=code, weight=np.array([0.5, 0.6]))


def test_finite_population_correction_shrinks_variance() -> None:
    code = np.repeat([0, 1], 10)
    y = np.tile([1, 0], 10)
    plain = stratified_mean(y, Strata(code=code, weight=np.array([0.5, 0.5])))
    fpc = stratified_mean(y, Strata(code=code, weight=np.array([0.5, 0.5]), size=np.array([20, 20]), fpc=True))
    # Half of each stratum sampled: the variance halves.
    assert fpc.se**2 == pytest.approx(plain.se**2 / 2)


def test_allocation_floor_and_caps() -> None:
    alloc = allocate(300, [100_000, 2_000, 40, 0], floor=50)
    assert alloc.tolist()[2:] == [40, 0]  # capped at its 40 units; empty stratum gets nothing
    assert alloc[1] >= 50 and alloc.sum() == 300
    # Floors larger than the total raise the total.
    assert allocate(10, [1000, 1000, 1000], floor=50).tolist() == [50, 50, 50]
