"""Design-based estimators of accuracy and area from a stratified random sample.

Pure functions on small arrays, after Olofsson et al. (2014), *Good practices
for estimating area and assessing accuracy of land change*, Remote Sensing of
Environment 148: 42–57, and Stehman (2014), *Estimating area and map accuracy
for stratified random sampling when the strata are different from the map
classes*, International Journal of Remote Sensing 35: 4923–4939.

Every estimate here is a stratified mean or a ratio of two stratified means of
per-point values ``y`` (and ``x``):

* mean: p̂ = Σ_h W_h ȳ_h, V(p̂) = Σ_h W_h² (1 − f_h) s²_yh / n_h;
* ratio: R̂ = Σ_h W_h ȳ_h / Σ_h W_h x̄_h, V(R̂) = X̂⁻² Σ_h W_h² (1 − f_h)
  (s²_yh + R̂² s²_xh − 2 R̂ s_xyh) / n_h (Stehman 2014, eq. 27–28),

with W_h the share of the region's area in stratum h, n_h its sample size
and f_h = n_h / N_h the sampling fraction (the finite-population correction
is off by default, as in Olofsson et al.'s equations). When the strata are the
map classes these reduce to Olofsson et al.'s equations 2–10; when they are
not (a buffer stratum, conversion split by year groups) they are Stehman's
estimator. Units inside a stratum are taken as equal in area (pixels of one
grid), so areas are the region's area times a proportion.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import asdict, dataclass

import numpy as np
from scipy.stats import norm

from plantation.errors import PlantationError


class EstimationError(PlantationError, ValueError):
    """A sample cannot support the estimate asked for (an empty stratum, a bad weight)."""


@dataclass(frozen=True)
class Estimate:
    """A point estimate with its standard error and a symmetric normal interval.

    ``lo``/``hi`` are ``estimate ∓ z·se`` at the ``confidence`` it was made
    with; they are not clipped, so a proportion's interval can pass 0 or 1
    exactly as the normal approximation says.
    """

    estimate: float
    se: float
    lo: float
    hi: float

    @property
    def half_width(self) -> float:
        return (self.hi - self.lo) / 2.0

    def scaled(self, factor: float) -> Estimate:
        """The same estimate in other units (e.g. a proportion times an area)."""
        return Estimate(self.estimate * factor, self.se * abs(factor), self.lo * factor, self.hi * factor)

    def as_dict(self, digits: int = 6) -> dict[str, float]:
        return {k: round(float(v), digits) for k, v in asdict(self).items()}


def z_value(confidence: float) -> float:
    """Two-sided standard-normal quantile, e.g. 1.959964 for 0.95."""
    if not 0.0 < confidence < 1.0:
        raise EstimationError(f"confidence {confidence!r} must lie strictly between 0 and 1")
    return float(norm.ppf(0.5 + confidence / 2.0))


def with_interval(estimate: float, variance: float, confidence: float = 0.95) -> Estimate:
    se = float(np.sqrt(max(variance, 0.0)))
    z = z_value(confidence)
    return Estimate(float(estimate), se, float(estimate) - z * se, float(estimate) + z * se)


@dataclass(frozen=True)
class Strata:
    """The sampling design, as the estimators need it.

    Attributes:
        code: stratum index (0..H−1) of every sample point.
        weight: W_h, the share of the region's area in each stratum (sums to 1).
        size: N_h, the number of units (pixels) in each stratum; used only for
            the finite-population correction.
        fpc: apply the finite-population correction 1 − n_h/N_h.
    """

    code: np.ndarray
    weight: np.ndarray
    size: np.ndarray | None = None
    fpc: bool = False

    def __post_init__(self) -> None:
        code = np.asarray(self.code)
        w = np.asarray(self.weight, dtype=np.float64)
        if code.ndim != 1 or (code.size and (code.min() < 0 or code.max() >= w.size)):
            raise EstimationError(f"stratum codes must be integers in 0..{w.size - 1}")
        if (w < 0).any() or not np.isclose(w.sum(), 1.0, atol=1e-9):
            raise EstimationError(f"stratum weights must be non-negative and sum to 1, got sum {w.sum():.12g}")
        n = np.bincount(code, minlength=w.size)
        empty = np.flatnonzero((w > 0) & (n == 0))
        if empty.size:
            raise EstimationError(f"stratum {int(empty[0])} covers area (weight {w[empty[0]]:.4g}) but has no sample point")
        single = np.flatnonzero((w > 0) & (n == 1))
        if single.size:
            raise EstimationError(f"stratum {int(single[0])} has one sample point: its variance cannot be estimated (need at least 2)")
        if self.fpc:
            if self.size is None:
                raise EstimationError("the finite-population correction needs the stratum sizes N_h")
            if (np.asarray(self.size) < n).any():
                raise EstimationError("a stratum has more sample points than units")

    @property
    def n(self) -> np.ndarray:
        return np.bincount(np.asarray(self.code), minlength=np.asarray(self.weight).size)

    def _factor(self) -> np.ndarray:
        """W_h² (1 − f_h) / n_h per stratum (0 where the stratum has no area)."""
        w = np.asarray(self.weight, dtype=np.float64)
        n = self.n.astype(np.float64)
        f = np.zeros_like(w)
        if self.fpc and self.size is not None:
            size = np.asarray(self.size, dtype=np.float64)
            f = np.divide(n, size, out=np.zeros_like(w), where=size > 0)
        return np.divide(w**2 * (1.0 - f), n, out=np.zeros_like(w), where=n > 0)


def _stratum_moments(values: np.ndarray, strata: Strata) -> tuple[np.ndarray, np.ndarray]:
    """Per-stratum means (H, k) and sample covariance matrices (H, k, k) of the columns of ``values``."""
    code = np.asarray(strata.code)
    h = np.asarray(strata.weight).size
    k = values.shape[1]
    means = np.zeros((h, k))
    cov = np.zeros((h, k, k))
    for s in range(h):
        v = values[code == s]
        if len(v) == 0:
            continue
        means[s] = v.mean(axis=0)
        if len(v) > 1:
            d = v - means[s]
            cov[s] = d.T @ d / (len(v) - 1)
    return means, cov


def stratified_mean(y: np.ndarray, strata: Strata, confidence: float = 0.95) -> Estimate:
    """The population mean of ``y`` (a proportion when ``y`` is 0/1) under stratified random sampling."""
    y = np.asarray(y, dtype=np.float64).reshape(-1, 1)
    if y.shape[0] != np.asarray(strata.code).size:
        raise EstimationError(f"{y.shape[0]} values for {np.asarray(strata.code).size} sample points")
    means, cov = _stratum_moments(y, strata)
    w = np.asarray(strata.weight, dtype=np.float64)
    return with_interval(float(w @ means[:, 0]), float(strata._factor() @ cov[:, 0, 0]), confidence)


def stratified_ratio(y: np.ndarray, x: np.ndarray, strata: Strata, confidence: float = 0.95) -> Estimate | None:
    """The ratio of the population totals of ``y`` and ``x`` (Stehman 2014, eq. 27–28).

    User's accuracy of map class i is the ratio with y = [map i and reference
    i], x = [map i]; producer's accuracy of class j uses x = [reference j].
    Returns None when the estimated total of ``x`` is zero (the ratio is not
    defined: no sample point has that map or reference class).
    """
    y = np.asarray(y, dtype=np.float64)
    x = np.asarray(x, dtype=np.float64)
    if y.shape != x.shape or y.shape[0] != np.asarray(strata.code).size:
        raise EstimationError("y and x must have one value per sample point")
    means, cov = _stratum_moments(np.stack([y, x], axis=1), strata)
    w = np.asarray(strata.weight, dtype=np.float64)
    ybar, xbar = float(w @ means[:, 0]), float(w @ means[:, 1])
    if xbar <= 0:
        return None
    r = ybar / xbar
    per = cov[:, 0, 0] + r * r * cov[:, 1, 1] - 2.0 * r * cov[:, 0, 1]
    return with_interval(r, float(strata._factor() @ per) / xbar**2, confidence)


# --------------------------------------------------------------------------- accuracy and area


@dataclass(frozen=True)
class Accuracy:
    """The error matrix and accuracies of a map from a stratified reference sample.

    Attributes:
        map_classes, ref_classes: row and column names of the matrices.
        proportions: estimated area proportions p_ij (map class i, reference j); sums to 1.
        counts: sample counts n_ij.
        overall: overall accuracy, over the classes present in both lists.
        users: user's accuracy per map class (None where no point has that map class).
        producers: producer's accuracy per reference class (None where no point has it).
        area_share: estimated share of the region in each reference class.
    """

    map_classes: list[str]
    ref_classes: list[str]
    proportions: np.ndarray
    counts: np.ndarray
    overall: Estimate
    users: dict[str, Estimate | None]
    producers: dict[str, Estimate | None]
    area_share: dict[str, Estimate]

    def areas(self, total_area: float) -> dict[str, Estimate]:
        """Area of each reference class (in the units of ``total_area``)."""
        return {k: v.scaled(total_area) for k, v in self.area_share.items()}


def accuracy(map_class: Sequence[str], ref_class: Sequence[str], strata: Strata, *, map_classes: Sequence[str], ref_classes: Sequence[str], confidence: float = 0.95) -> Accuracy:
    """Error matrix in area proportions, overall/user's/producer's accuracy and class areas.

    Args:
        map_class: the map's class at each sample point.
        ref_class: the reference (interpreted) class at each sample point.
        strata: the design (strata may be the map classes or not).
        map_classes, ref_classes: the classes, in matrix order; a map class
            that matches no reference class (e.g. ``no_data``) is a row of its
            own and counts as an error in the overall accuracy.
    """
    mc = np.asarray(map_class, dtype=object)
    rc = np.asarray(ref_class, dtype=object)
    for name, got, allowed in (("map", mc, map_classes), ("reference", rc, ref_classes)):
        bad = sorted(set(got.tolist()) - set(allowed))
        if bad:
            raise EstimationError(f"{name} class(es) {bad} not in {list(allowed)}")
    mi = {c: mc == c for c in map_classes}
    rj = {c: rc == c for c in ref_classes}
    props = np.zeros((len(map_classes), len(ref_classes)))
    counts = np.zeros((len(map_classes), len(ref_classes)), dtype=np.int64)
    for i, a in enumerate(map_classes):
        for j, b in enumerate(ref_classes):
            cell = mi[a] & rj[b]
            counts[i, j] = int(cell.sum())
            props[i, j] = stratified_mean(cell, strata, confidence).estimate
    agree = mc == rc
    users = {a: stratified_ratio(mi[a] & agree, mi[a], strata, confidence) for a in map_classes}
    producers = {b: stratified_ratio(rj[b] & agree, rj[b], strata, confidence) for b in ref_classes}
    return Accuracy(
        map_classes=list(map_classes),
        ref_classes=list(ref_classes),
        proportions=props,
        counts=counts,
        overall=stratified_mean(agree, strata, confidence),
        users=users,
        producers=producers,
        area_share={b: stratified_mean(rj[b], strata, confidence) for b in ref_classes},
    )


# --------------------------------------------------------------------------- sample size and allocation


def cochran_sample_size(weights: Sequence[float], users_accuracy: Sequence[float], target_se: float, population: int | None = None) -> int:
    """Total sample size for a target standard error of overall accuracy.

    Olofsson et al. (2014), eq. 13 (Cochran 1977, eq. 5.25):
    n = (Σ W_i S_i / S(Ô))², S_i = √(U_i (1 − U_i)), with W_i the mapped area
    share of stratum i and U_i its assumed user's accuracy. With
    ``population`` (N units) the finite-population form
    n = (Σ W_i S_i)² / (S(Ô)² + Σ W_i S_i² / N) is used. Rounded up.
    """
    w = np.asarray(weights, dtype=np.float64)
    u = np.asarray(users_accuracy, dtype=np.float64)
    if w.shape != u.shape:
        raise EstimationError(f"{w.size} weights for {u.size} assumed user's accuracies")
    if ((u < 0) | (u > 1)).any():
        raise EstimationError(f"assumed user's accuracies must lie in [0, 1], got {u.tolist()}")
    if not target_se > 0:
        raise EstimationError(f"target standard error {target_se!r} must be positive")
    s = np.sqrt(u * (1.0 - u))
    num = float(w @ s) ** 2
    den = target_se**2 + (float(w @ (s**2)) / population if population else 0.0)
    return int(np.ceil(num / den - 1e-9))


def allocate(total: int, sizes: Sequence[int], floor: int) -> np.ndarray:
    """Split ``total`` sample points over strata: a floor for each, the rest by area.

    Every stratum with units gets at least ``floor`` points (or all its units
    if it has fewer), so that rare strata, where the user's accuracies that
    matter are estimated, are not left with a handful; the remainder goes in
    proportion to the strata's sizes (Olofsson et al. 2014, section 5.1.3,
    recommend such a compromise between equal and proportional allocation).
    No stratum gets more points than it has units. The result sums to
    ``min(max(total, Σ floors), Σ N_h)``.
    """
    n_pop = np.asarray(sizes, dtype=np.int64)
    if (n_pop < 0).any():
        raise EstimationError("stratum sizes must be non-negative")
    cap = n_pop.copy()
    base = np.minimum(cap, np.where(n_pop > 0, floor, 0))
    total = int(min(max(total, int(base.sum())), int(cap.sum())))
    alloc = base.copy()
    # Hand out the rest in proportion to size, among strata still below their cap;
    # largest remainders break the rounding so the sum is exact.
    for _ in range(len(n_pop) + 1):
        left = total - int(alloc.sum())
        open_ = alloc < cap
        if left <= 0 or not open_.any():
            break
        share = np.where(open_, n_pop, 0).astype(np.float64)
        want = left * share / share.sum()
        add = np.floor(want).astype(np.int64)
        rem = left - int(add.sum())
        if rem > 0:
            order = np.argsort(-(want - add), kind="stable")
            add[order[:rem]] += 1
        alloc = np.minimum(alloc + add, cap)
    return alloc


def expected_overall_se(weights: Sequence[float], users_accuracy: Sequence[float], allocation: Sequence[int]) -> float:
    """Standard error of overall accuracy that an allocation would give if the assumed user's accuracies hold.

    V(Ô) = Σ W_h² U_h (1 − U_h) / n_h (Olofsson et al. 2014, eq. 5, with
    n_h − 1 ≈ n_h for planning).
    """
    w = np.asarray(weights, dtype=np.float64)
    u = np.asarray(users_accuracy, dtype=np.float64)
    n = np.asarray(allocation, dtype=np.float64)
    var = np.divide(w**2 * u * (1 - u), n, out=np.zeros_like(w), where=n > 0)
    return float(np.sqrt(var.sum()))
