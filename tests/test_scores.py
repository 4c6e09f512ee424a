"""Wall-to-wall benchmark scores on a handful of pixels with a known answer."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import f1_score

from plantation.benchmarks.scores import map_scores
from plantation.model.outcomes import Summary


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
    assert sc["interval80_coverage"] == pytest.approx(1 / 3, abs=1e-4)
    assert sc["year_mae"] == pytest.approx(0.5)
    # conversion vs not: TP 2, FP 1, FN 1 → F1 = 2·2 / (2·2 + 1 + 1) = 2/3
    assert sc["conversion_f1"] == pytest.approx(2 / 3, abs=1e-4)
    assert sc["macro_f1"] == pytest.approx(f1_score(true_label, s.label, average="macro"), abs=1e-4)
    # ECE bins: 0.9 (y=1), 0.8 (1), 0.2 (1), 0.1 (0), 0.6 (0), 0.0 (0) → each alone in its bin
    # except none share; |1-.9|+|1-.8|+|1-.2|+|0-.1|+|0-.6|+|0-0| = 1.8 → /6
    assert sc["ece"] == pytest.approx(0.3, abs=1e-4)
    assert sc["year_exact_by_onset_year"] == {"2016": 1.0, "2017": 0.0, "2018": 0.0}
