"""The estimators against the numerical example of Stehman (2014), where the strata are not the map classes.

Source: Stehman, S. V. (2014). Estimating area and map accuracy for
stratified random sampling when the strata are different from the map
classes. International Journal of Remote Sensing 35: 4923–4939, numerical
example: 40 points in 4 strata of 40,000, 30,000, 20,000 and 10,000 pixels,
10 points each. The points, and the results checked here (the error matrix
in area, user's and producer's accuracy with their standard errors), are as
printed in the documentation example of the R package mapac
(``aa_stratified``, D. Pflugmacher), an implementation of Stehman's
estimators. Overall accuracy 0.63 and the area proportion of class A, 0.35
with standard error 0.082, are the paper's figures from memory.
"""

from __future__ import annotations

import numpy as np
import pytest

from plantation.assessment.estimators import Strata, accuracy

REFERENCE = "AAAAACBABCABBBBBAABBCCCCCDDBBADDDDDDDCCB"
MAP = "AAAAAAABBBABBBBBBBBBBBCCCCCCBBDDDDDDDDDD"
STRATUM = "1111111111222222222233333333334444444444"
N_H = np.array([40000, 30000, 20000, 10000], dtype=np.float64)


@pytest.fixture(scope="module")
def acc():
    code = np.array([int(c) - 1 for c in STRATUM])
    return accuracy(np.array(list(MAP), dtype=object), np.array(list(REFERENCE), dtype=object), Strata(code=code, weight=N_H / N_H.sum()), map_classes=list("ABCD"), ref_classes=list("ABCD"))


def test_error_matrix_in_area(acc) -> None:
    # mapac prints the matrix scaled to the 40 points (area proportion × 40).
    expected = [[9.2, 1.6, 1.6, 0.0], [4.8, 10.8, 3.2, 0.0], [0.0, 0.8, 2.4, 1.6], [0.0, 0.4, 0.8, 2.8]]
    np.testing.assert_allclose(acc.proportions * 40, expected, atol=1e-9)
    # Map class B spans strata 1-3 and the strata are not the map classes: the counts are not the matrix.
    assert acc.counts[1].sum() == 16 and acc.proportions[1].sum() == pytest.approx(0.47)


def test_users_and_producers_accuracy_with_standard_errors(acc) -> None:
    published = {
        "A": (0.7419355, 0.1645627, 0.6571429, 0.1477318),
        "B": (0.5744681, 0.1248023, 0.7941176, 0.1165671),
    }
    for c, (ua, ua_se, pa, pa_se) in published.items():
        assert acc.users[c].estimate == pytest.approx(ua, abs=5e-8)
        assert acc.users[c].se == pytest.approx(ua_se, abs=5e-8)
        assert acc.producers[c].estimate == pytest.approx(pa, abs=5e-8)
        assert acc.producers[c].se == pytest.approx(pa_se, abs=5e-8)
    assert acc.users["C"].estimate == pytest.approx(0.5)
    assert acc.users["C"].se == pytest.approx(0.2151657, abs=5e-8)
    assert acc.producers["C"].estimate == pytest.approx(0.3)


def test_overall_accuracy_and_area_of_class_a(acc) -> None:
    assert acc.overall.estimate == pytest.approx(0.63)
    assert acc.area_share["A"].estimate == pytest.approx(0.35)
    assert round(acc.area_share["A"].se, 3) == 0.082
