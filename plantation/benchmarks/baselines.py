"""What a practitioner would use instead of the network, for side-by-side benchmarks.

The baselines read the centre pixel's series only and return the same
outcome distribution as the network (see :mod:`plantation.model.outcomes`), so one
scoring code compares them all.

* :class:`AnnualTrees` — gradient-boosted trees (scikit-learn's
  ``HistGradientBoostingClassifier``) on per-year summaries of the indices:
  each year's median NDVI, NBR, NDMI, SWIR1 and red, its clear-view count,
  and the year-to-year changes of NBR and NDVI. The trees predict the
  outcome (a static class, or conversion in a given year) directly.
* :class:`AnnualForest` — a random forest (scikit-learn's
  ``RandomForestClassifier``) on the same per-year summaries plus each
  year's minimum of the indices and its year-to-year changes, tuned on the
  validation split (trees, depth, features per split) and calibrated like the
  network: one temperature on its log-probabilities, fitted on the validation
  split.
* :class:`BreakRule` — a structural break on the annual median NBR series,
  the exact penalised least-squares segmentation that PELT (Killick,
  Fearnhead & Eckley 2012, JASA 107: 1590–1598) computes, checked against
  ``ruptures``, plus a rule: the largest drop in segment mean
  is a conversion in the break year when it is deep enough and NBR then
  recovers partly (a plantation grows) without returning to the forest level
  (fire and logging regrow to forest). Without such a break, the nearest
  class centroid of the series' mean NBR, NDVI and SWIR1 decides. The rule's
  thresholds are chosen on the training samples by grid search.
"""

from __future__ import annotations

import itertools
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np

from plantation.model import calibration
from plantation.model.outcomes import N_STATIC, Outcomes

SUMMARY_CHANNELS: tuple[str, ...] = ("NDVI", "NBR", "NDMI", "swir1", "red")


#: Per-year reductions :func:`annual_summaries` knows, each NaN-aware.
ANNUAL_STATS = {"median": np.nanmedian, "min": np.nanmin}


def annual_summaries(x: np.ndarray, valid: np.ndarray, date_year: np.ndarray, n_years: int, stats: Sequence[str] = ("median",)) -> tuple[np.ndarray, np.ndarray]:
    """Per-year reductions (median, minimum) of each channel over valid dates.

    Args:
        x: (n, time, channel) values; valid: (n, time) bool.
        date_year: (time,) year index of each date.
        stats: names in :data:`ANNUAL_STATS`.

    Returns:
        (summaries (n, years, len(stats), channel) float32, NaN for a year
        with no clear view; clear counts (n, years) int).
    """
    bad = [k for k in stats if k not in ANNUAL_STATS]
    if bad:
        raise ValueError(f"unknown annual statistic(s) {bad}; choose from {list(ANNUAL_STATS)}")
    xm = np.where(valid[..., None], x, np.nan)
    out = np.full((x.shape[0], n_years, len(stats), x.shape[2]), np.nan, np.float32)
    count = np.zeros((x.shape[0], n_years), np.int64)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN years stay NaN
        for y in range(n_years):
            sel = date_year == y
            for k, name in enumerate(stats):
                out[:, y, k] = ANNUAL_STATS[name](xm[:, sel], axis=1)
            count[:, y] = valid[:, sel].sum(1)
    return out, count


def annual_medians(x: np.ndarray, valid: np.ndarray, date_year: np.ndarray, n_years: int) -> tuple[np.ndarray, np.ndarray]:
    """Per-year median of each channel over valid dates.

    Args:
        x: (n, time, channel) values; valid: (n, time) bool.
        date_year: (time,) year index of each date.

    Returns:
        (medians (n, years, channel) float32, NaN for a year with no clear
        view; clear counts (n, years) int).
    """
    med, count = annual_summaries(x, valid, date_year, n_years, ("median",))
    return med[:, :, 0], count


def _channel_index(channels: Sequence[str], wanted: Sequence[str]) -> list[int]:
    missing = [c for c in wanted if c not in channels]
    if missing:
        raise ValueError(f"baseline needs channel(s) {missing}; the samples have {list(channels)}")
    return [list(channels).index(c) for c in wanted]


def annual_features(x: np.ndarray, valid: np.ndarray, date_year: np.ndarray, n_years: int, channels: Sequence[str], *, minima: bool = False) -> np.ndarray:
    """The trees' feature matrix (n, features), NaN where a year had no clear view.

    Columns: each year's median of :data:`SUMMARY_CHANNELS`, its clear-view
    count, the year-to-year changes of median NBR and NDVI; with ``minima``
    then also each year's minimum of the channels and the year-to-year
    changes of minimum NBR and NDVI (a clearing shows in the minimum even when
    the year's median still looks like forest).
    """
    ci = _channel_index(channels, SUMMARY_CHANNELS)
    summ, count = annual_summaries(x[:, :, ci], valid, date_year, n_years, ("median", "min") if minima else ("median",))
    parts = []
    for k in range(summ.shape[2]):
        s = summ[:, :, k]
        parts.append([s.reshape(len(x), -1), np.diff(s[:, :, 1], axis=1), np.diff(s[:, :, 0], axis=1)])
    med = parts[0]
    cols = [med[0], count, med[1], med[2]]  # the original column order, which AnnualTrees models rely on
    for extra in parts[1:]:
        cols.extend(extra)
    return np.concatenate(cols, axis=1).astype(np.float32)


@dataclass
class AnnualTrees:
    """Gradient-boosted trees on annual summaries (see the module docstring)."""

    max_iter: int = 300
    learning_rate: float = 0.08
    seed: int = 0
    model_: object | None = field(default=None, repr=False)
    classes_: np.ndarray | None = None

    def fit(self, feats: np.ndarray, target: np.ndarray, n_outcomes: int) -> AnnualTrees:
        from sklearn.ensemble import HistGradientBoostingClassifier

        self.n_outcomes_ = n_outcomes
        self.model_ = HistGradientBoostingClassifier(
            max_iter=self.max_iter, learning_rate=self.learning_rate, early_stopping=True, validation_fraction=0.15, n_iter_no_change=20, random_state=self.seed
        )
        # Early stopping holds out a stratified share of the samples, which an
        # outcome seen once cannot give; such an outcome cannot be learnt anyway.
        target = np.asarray(target)
        keep = np.bincount(target, minlength=n_outcomes)[target] >= 2
        self.model_.fit(feats[keep], target[keep])  # type: ignore[attr-defined]
        self.classes_ = self.model_.classes_  # type: ignore[attr-defined]
        return self

    def predict_proba(self, feats: np.ndarray) -> np.ndarray:
        """(n, outcomes) probabilities; outcomes absent from training get 0."""
        if self.model_ is None or self.classes_ is None:
            raise RuntimeError("AnnualTrees is not fitted yet; call fit first")
        p = self.model_.predict_proba(feats)  # type: ignore[attr-defined]
        out = np.zeros((len(feats), self.n_outcomes_), np.float64)
        out[:, self.classes_] = p
        return out


@dataclass
class AnnualForest:
    """Random forest on annual medians and minima, tuned and temperature-scaled on the validation split.

    ``fit`` tries every combination of ``n_estimators`` × ``max_depth`` ×
    ``max_features`` on the training split and scores each by its validation
    negative log-likelihood *after* temperature scaling, the form in which
    the forest is compared: raw forest probabilities are often exactly 0 or 1,
    so an uncalibrated score would pick shallow forests for their smoother
    probabilities rather than for telling the outcomes apart. The validation
    split, not the out-of-bag samples, scores the grid because the network is
    early-stopped and calibrated on that same (spatial) split; out-of-bag
    samples are neighbours of the training pixels. The best combination is
    refitted on the training split (same seed: the same forest), and one
    temperature T is fitted on its validation log-probabilities with
    :func:`plantation.model.calibration.fit_temperature`:
    ``p ∝ max(p_forest, prob_floor) ** (1 / T)`` over the outcomes seen in
    training; outcomes absent from training get probability 0.

    Attributes (after ``fit``):
        n_outcomes_: size of the outcome space.
        classes_: outcome indices seen in training (the forest's columns).
        params_: the chosen ``n_estimators``, ``max_depth``, ``max_features``.
        temperature_: the fitted temperature.
        grid_: one dict per grid point: its parameters, ``val_nll_raw`` and
            ``val_nll`` (after its own temperature).
        val_nll_: validation NLL of the chosen forest before (``raw``) and
            after (``calibrated``) temperature scaling, over validation
            samples whose outcome was seen in training (``n``; ``n_unseen``
            others are left out, since no forest can give them probability).
    """

    n_estimators: tuple[int, ...] = (100, 300)
    max_depth: tuple[int | None, ...] = (8, 16, None)
    max_features: tuple[str | float, ...] = ("sqrt", 0.3)
    seed: int = 0
    n_jobs: int = 1
    #: Smallest forest probability taken to the log (a leaf vote of 0 is not certainty).
    prob_floor: float = 1e-4
    model_: object | None = field(default=None, repr=False)
    classes_: np.ndarray | None = None
    params_: dict[str, object] | None = None
    temperature_: float | None = None
    grid_: list[dict[str, object]] = field(default_factory=list, repr=False)
    val_nll_: dict[str, float | int] | None = None

    @staticmethod
    def features(x: np.ndarray, valid: np.ndarray, date_year: np.ndarray, n_years: int, channels: Sequence[str]) -> np.ndarray:
        """The forest's feature matrix (n, features): :func:`annual_features` with minima."""
        return annual_features(x, valid, date_year, n_years, channels, minima=True)

    def _forest(self, n_estimators: int, max_depth: int | None, max_features: str | float, warm_start: bool = False) -> object:
        from sklearn.ensemble import RandomForestClassifier

        return RandomForestClassifier(n_estimators=n_estimators, max_depth=max_depth, max_features=max_features, random_state=self.seed, n_jobs=self.n_jobs, warm_start=warm_start)

    def _log_probs(self, model: object, feats: np.ndarray) -> np.ndarray:
        """(n, seen outcomes) log of the floored forest probabilities."""
        p = model.predict_proba(feats)  # type: ignore[attr-defined]
        return np.log(np.maximum(p, self.prob_floor))

    def fit(self, feats: np.ndarray, target: np.ndarray, n_outcomes: int, *, val: tuple[np.ndarray, np.ndarray]) -> AnnualForest:
        """Tune on ``val`` = (validation features, validation targets), refit, calibrate; returns self.

        Args:
            feats: (n, features) training features (:meth:`features`).
            target: (n,) outcome indices in [0, n_outcomes).
            n_outcomes: size of the outcome space (``Outcomes.size``).
            val: the validation split's (features, targets), the split the
                network is early-stopped and temperature-scaled on.
        """
        vf, vt = np.asarray(val[0]), np.asarray(val[1])
        target = np.asarray(target)
        if len(feats) != len(target) or len(vf) != len(vt):
            raise ValueError(f"features and targets differ in length: train {len(feats)} vs {len(target)}, val {len(vf)} vs {len(vt)}")
        for name, t in (("target", target), ("val target", vt)):
            if len(t) and (t.min() < 0 or t.max() >= n_outcomes):
                raise ValueError(f"{name} holds outcome indices outside [0, {n_outcomes}); got {t.min()}..{t.max()}")
        if not (self.n_estimators and self.max_depth and self.max_features):
            raise ValueError(f"the tuning grid is empty: n_estimators={self.n_estimators!r}, max_depth={self.max_depth!r}, max_features={self.max_features!r}")
        classes = np.unique(target)
        seen = np.isin(vt, classes)
        if not seen.any():
            raise ValueError("no validation sample has an outcome seen in training; the forest cannot be tuned or calibrated (check the split)")
        vf_s, vt_s = vf[seen], np.searchsorted(classes, vt[seen])
        self.n_outcomes_ = n_outcomes
        self.grid_ = []
        for depth, mf in itertools.product(self.max_depth, self.max_features):
            # Growing one warm-started forest gives each tree count the same forest a fresh fit would.
            model = self._forest(min(self.n_estimators), depth, mf, warm_start=True)
            for n_est in sorted(self.n_estimators):
                model.set_params(n_estimators=n_est)  # type: ignore[attr-defined]
                model.fit(feats, target)  # type: ignore[attr-defined]
                lp = self._log_probs(model, vf_s)
                t = calibration.fit_temperature(lp, vt_s)
                self.grid_.append({"n_estimators": n_est, "max_depth": depth, "max_features": mf, "val_nll_raw": calibration.nll(lp, vt_s), "val_nll": calibration.nll(lp, vt_s, t)})
        best = min(self.grid_, key=lambda g: g["val_nll"])  # type: ignore[arg-type, return-value]
        self.params_ = {k: best[k] for k in ("n_estimators", "max_depth", "max_features")}
        self.model_ = self._forest(**self.params_)  # type: ignore[arg-type]
        # Early stopping holds out a stratified share of the samples, which an
        # outcome seen once cannot give; such an outcome cannot be learnt anyway.
        target = np.asarray(target)
        keep = np.bincount(target, minlength=n_outcomes)[target] >= 2
        self.model_.fit(feats[keep], target[keep])  # type: ignore[attr-defined]
        self.classes_ = self.model_.classes_  # type: ignore[attr-defined]
        lp = self._log_probs(self.model_, vf_s)
        self.temperature_ = calibration.fit_temperature(lp, vt_s)
        self.val_nll_ = {"raw": calibration.nll(lp, vt_s), "calibrated": calibration.nll(lp, vt_s, self.temperature_), "n": int(seen.sum()), "n_unseen": int((~seen).sum())}
        return self

    def predict_proba(self, feats: np.ndarray) -> np.ndarray:
        """(n, outcomes) calibrated probabilities; outcomes absent from training get 0."""
        if self.model_ is None or self.classes_ is None or self.temperature_ is None:
            raise RuntimeError("AnnualForest is not fitted yet; call fit first")
        from scipy.special import softmax

        out = np.zeros((len(feats), self.n_outcomes_), np.float64)
        out[:, self.classes_] = softmax(self._log_probs(self.model_, feats) / self.temperature_, axis=1)
        return out


def _fill_gaps(series: np.ndarray) -> np.ndarray:
    """Linear interpolation over NaN years (ends take the nearest value); all-NaN rows become 0."""
    s = series.copy()
    n = s.shape[1]
    t = np.arange(n)
    for i in np.flatnonzero(np.isnan(s).any(1)):
        ok = ~np.isnan(s[i])
        s[i] = np.interp(t, t[ok], s[i, ok]) if ok.any() else 0.0
    return s


def optimal_partition(series: np.ndarray, penalty: float) -> np.ndarray:
    """Exact penalised least-squares segmentation of many short series at once.

    Minimises Σ_segments Σ (y − segment mean)² + penalty × (number of
    breaks), the objective that PELT solves exactly (Killick et al. 2012),
    by the optimal-partitioning recursion of Jackson et al. (2005, IEEE
    Signal Processing Letters 12: 105–108), vectorised over rows. For the
    dozen points of an annual series that is O(n²) per row with no pruning
    needed; ``ruptures.Pelt(model="l2", min_size=1, jump=1)`` gives the same
    breaks (tested) but loops in Python per row.

    Args:
        series: (rows, n) float, no NaN.

    Returns:
        bool (rows, n): True at index i when a new segment starts at i (i > 0).
    """
    y = np.asarray(series, dtype=np.float64)
    rows, n = y.shape
    s1 = np.concatenate([np.zeros((rows, 1)), np.cumsum(y, 1)], 1)
    s2 = np.concatenate([np.zeros((rows, 1)), np.cumsum(y * y, 1)], 1)
    best = np.zeros((rows, n + 1))
    best[:, 0] = -penalty
    last = np.zeros((rows, n + 1), np.int64)
    for t in range(1, n + 1):
        s = np.arange(t)
        length = (t - s).astype(np.float64)
        cost = s2[:, t : t + 1] - s2[:, :t] - (s1[:, t : t + 1] - s1[:, :t]) ** 2 / length
        total = best[:, :t] + cost + penalty
        last[:, t] = total.argmin(1)
        best[:, t] = total.min(1)
    starts = np.zeros((rows, n), bool)
    t = np.full(rows, n)
    for _ in range(n):
        s = last[np.arange(rows), t]
        live = t > 0
        starts[np.flatnonzero(live & (s > 0)), s[live & (s > 0)]] = True
        t = np.where(live, s, 0)
    return starts


def largest_drop(series: np.ndarray, penalty: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The break with the largest drop in segment mean, per row.

    Args:
        series: (n, years) without NaN.
        penalty: segmentation penalty (squared NBR units; see :func:`optimal_partition`).

    Returns:
        (year index where the lower segment starts (−1: no drop), drop size,
        highest value after the drop), each (n,).
    """
    y = np.asarray(series, dtype=np.float64)
    n, ny = y.shape
    starts = optimal_partition(y, penalty)
    seg = np.cumsum(starts, 1)  # segment number of each year
    n_seg = int(seg.max()) + 1
    one = np.eye(n_seg)[seg]  # (n, years, segments)
    count = one.sum(1)
    mean = (one * y[..., None]).sum(1) / np.maximum(count, 1)
    first = np.where(count > 0, np.argmax(one, axis=1), ny)  # first year of each segment
    drop_each = np.where(count[:, 1:] > 0, mean[:, :-1] - mean[:, 1:], -np.inf)
    year = np.full(n, -1, np.int64)
    drop = np.zeros(n)
    after = np.zeros(n)
    if n_seg > 1:
        j = drop_each.argmax(1)
        d = drop_each[np.arange(n), j]
        ok = d > 0
        year = np.where(ok, first[np.arange(n), j + 1], -1)
        drop = np.where(ok, d, 0.0)
        later = np.arange(ny)[None, :] >= np.maximum(year, 0)[:, None]
        after = np.where(ok, np.where(later, y, -np.inf).max(1), 0.0)
    return year, drop, after


@dataclass
class BreakRule:
    """PELT break on annual NBR with a plantation rule (see the module docstring)."""

    penalties: tuple[float, ...] = (0.002, 0.005, 0.01)
    drops: tuple[float, ...] = (0.08, 0.12, 0.18, 0.25)
    recover_min: tuple[float, ...] = (0.0, 0.15, 0.25, 0.35)
    recover_max: tuple[float, ...] = (0.45, 0.5, 0.55, 0.6, 1.0)
    params_: dict[str, float] | None = None
    centroids_: np.ndarray | None = None
    scale_: np.ndarray | None = None

    @staticmethod
    def series(x: np.ndarray, valid: np.ndarray, date_year: np.ndarray, n_years: int, channels: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """(annual NBR without gaps (n, years), static features (n, 3): mean NBR, NDVI, SWIR1)."""
        ci = _channel_index(channels, ("NBR", "NDVI", "swir1"))
        med, _ = annual_medians(x[:, :, ci], valid, date_year, n_years)
        nbr = _fill_gaps(med[:, :, 0].astype(np.float64))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            static = np.nan_to_num(np.nanmean(med, axis=1))
        return nbr, static

    def _decide(self, brk: tuple[np.ndarray, np.ndarray, np.ndarray], static: np.ndarray, drop_min: float, rec_lo: float, rec_hi: float) -> np.ndarray:
        year, drop, after = brk
        conv = (year >= 0) & (drop >= drop_min) & (after >= rec_lo) & (after <= rec_hi)
        if self.centroids_ is None:
            raise RuntimeError("BreakRule is not fitted yet; call fit first")
        d = (((static[:, None, :] - self.centroids_[None]) / self.scale_) ** 2).sum(-1)
        return np.where(conv, N_STATIC + np.maximum(year, 0), d.argmin(1))

    def fit(self, nbr: np.ndarray, static: np.ndarray, target: np.ndarray) -> BreakRule:
        """Choose penalty and thresholds maximising the share of exactly right outcomes on the training samples."""
        # Scaled so NBR, NDVI and SWIR1 count alike in the distance.
        self.scale_ = np.where(static.std(0) > 0, static.std(0), 1.0)
        self.centroids_ = np.stack([static[target == c].mean(0) if (target == c).any() else np.full(static.shape[1], np.inf) for c in range(N_STATIC)])
        best = (-1.0, {})
        for pen in self.penalties:
            brk = largest_drop(nbr, pen)
            for dmin, lo, hi in itertools.product(self.drops, self.recover_min, self.recover_max):
                if lo >= hi:
                    continue
                acc = float((self._decide(brk, static, dmin, lo, hi) == target).mean())
                if acc > best[0]:
                    best = (acc, {"penalty": pen, "drop_min": dmin, "recover_min": lo, "recover_max": hi})
        self.params_ = best[1]
        return self

    def predict(self, nbr: np.ndarray, static: np.ndarray) -> np.ndarray:
        """Outcome index (n,) of each series."""
        if self.params_ is None:
            raise RuntimeError("BreakRule is not fitted yet; call fit first")
        p = self.params_
        return self._decide(largest_drop(nbr, p["penalty"]), static, p["drop_min"], p["recover_min"], p["recover_max"])

    def predict_proba(self, nbr: np.ndarray, static: np.ndarray, outcomes: Outcomes) -> np.ndarray:
        """A rule knows no uncertainty: probability 1 on its outcome."""
        out = np.zeros((len(nbr), outcomes.size))
        out[np.arange(len(nbr)), self.predict(nbr, static)] = 1.0
        return out
