"""The break baseline's segmentation against ruptures (PyPI), the reference PELT implementation.

``ruptures.Pelt(model="l2", min_size=1, jump=1).predict(pen)`` returns the
exact minimiser of the penalised least-squares cost (Killick et al. 2012);
our vectorised optimal partitioning must return the same breaks.
"""

from __future__ import annotations

import numpy as np
import pytest

from plantation.benchmarks.baselines import optimal_partition

rpt = pytest.importorskip("ruptures")


@pytest.mark.parametrize("penalty", [0.001, 0.005, 0.02, 0.1])
def test_breaks_equal_ruptures_pelt(penalty):
    rng = np.random.default_rng(int(penalty * 1000))
    n, years = 200, 12
    step = np.where(np.arange(years)[None] >= rng.integers(1, years, (n, 1)), -0.3, 0.0) * (rng.random((n, 1)) < 0.6)
    y = 0.6 + step + rng.normal(0, 0.04, (n, years))
    starts = optimal_partition(y, penalty)
    for i in range(n):
        ref = rpt.Pelt(model="l2", min_size=1, jump=1).fit(y[i]).predict(pen=penalty)
        assert [*np.flatnonzero(starts[i]).tolist(), years] == ref, f"row {i}"
