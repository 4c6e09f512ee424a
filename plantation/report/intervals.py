"""When a sample-based (Wald) interval cannot be trusted, and the Wilson interval shown beside it.

The assessment's intervals are Wald intervals, estimate ± z·SE, from the
stratified estimators (Olofsson et al. 2014). For a proportion near 0 or 1,
or from few sample points, the Wald interval is known to fail: it collapses
to zero width when every point agrees (SE = 0) and can reach below 0 or above
1 (Agresti & Coull 1998, "Approximate is better than 'exact' for interval
estimation of binomial proportions", The American Statistician 52:119–126).
:func:`wald_problem` says which of those it is; :func:`wilson` gives the
score interval of Wilson (1927, "Probable inference, the law of succession,
and statistical inference", JASA 22:209–212), which stays inside 0–1 and has
a width above zero at 0 and 1.

Under stratified sampling there is no plain count of successes out of n, so
the Wilson interval is computed from the effective sample size
n_eff = p(1 − p) / SE², the number of simple random points that would give the
estimate's SE (Kish 1965; used for survey proportions by Korn & Graubard
1998). Where that is undefined (p = 0 or 1, or SE = 0) the number of sample
points behind the estimate stands in for it. An area is a proportion of the
region's area, so it is handled as one: area / total area.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

#: Why a Wald interval is flagged, by code.
PROBLEMS: dict[str, str] = {
    "zero_width": "zero width: every sample point behind it agrees, which the sample cannot show for the whole region",
    "below_zero": "its lower bound is below zero",
    "above_one": "its upper bound is above 1",
}


def wald_problem(estimate: float | None, lo: float | None, hi: float | None, *, proportion: bool, tol: float = 1e-12) -> str | None:
    """The first :data:`PROBLEMS` code that applies to the interval ``lo``–``hi`` of ``estimate`` (None: none, or nothing to judge).

    Args:
        proportion: the quantity lies in 0–1 (an accuracy, a share); else it is an area, which may not fall below zero.
    """
    if estimate is None or lo is None or hi is None or not all(math.isfinite(x) for x in (estimate, lo, hi)):
        return None
    if hi - lo <= tol:
        return "zero_width"
    if lo < -tol:
        return "below_zero"
    if proportion and hi > 1 + tol:
        return "above_one"
    return None


@dataclass(frozen=True)
class Wilson:
    """A Wilson score interval and the sample size it was computed with."""

    lo: float
    hi: float
    n: float
    #: "effective": n_eff = p(1 − p)/SE²; "points": the sample points behind the estimate.
    basis: str


def wilson_bounds(p: float, n: float, z: float) -> tuple[float, float]:
    """Wilson's (1927) score interval of a proportion ``p`` from ``n`` trials at normal quantile ``z``."""
    if not n > 1e-12:  # no evidence (or so little that n² underflows): the interval tends to 0–1
        return 0.0, 1.0
    if not math.isfinite(n):
        return p, p
    z2 = z * z
    den = 1.0 + z2 / n
    centre = (p + z2 / (2.0 * n)) / den
    half = z / den * math.sqrt(max(p * (1.0 - p) / n + z2 / (4.0 * n * n), 0.0))
    # The bounds hold p exactly (lo = 0 at p = 0, hi = 1 at p = 1); rounding
    # alone would leave them a few ulps off, outside the estimate.
    return min(max(0.0, centre - half), p), max(min(1.0, centre + half), p)


def wilson(p: float, se: float | None, z: float, points: int | None) -> Wilson | None:
    """The Wilson interval of a proportion estimated as ``p`` with standard error ``se``.

    n is the effective sample size p(1 − p)/se² where 0 < p < 1 and se > 0,
    else ``points`` (the sample points behind the estimate); None when
    neither is known.
    """
    if not math.isfinite(p):
        return None
    p = min(max(p, 0.0), 1.0)
    # se² can underflow to 0 and p(1 − p)/se² overflow: such an n says nothing, and the points stand in.
    n_eff = p * (1.0 - p) / (se * se) if se is not None and math.isfinite(se) and se * se > 0 and 0.0 < p < 1.0 else math.nan
    if math.isfinite(n_eff) and n_eff > 0:
        n, basis = n_eff, "effective"
    elif points:
        n, basis = float(points), "points"
    else:
        return None
    lo, hi = wilson_bounds(p, n, z)
    return Wilson(lo, hi, n, basis)
