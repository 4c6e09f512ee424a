"""The outcome space of one pixel and what is read from a distribution over it.

A pixel's history is exactly one of ``3 + n_years`` outcomes:

====== ===================================================
index  outcome
====== ===================================================
0      stable forest (including logged or burnt and regrown)
1      old plantation (a plantation before the first year)
2      other land (crops, grass, water, roads, cleared forest)
3 + i  forest converted to plantation in ``years[i]``
====== ===================================================

Every map layer comes from one probability vector over these outcomes, so
class, year, interval and probabilities never contradict each other.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from plantation.errors import LabelError
from plantation.reference.labels import LABEL_CODES

#: Outcome index of each non-conversion label; conversions start at N_STATIC.
STATIC_OUTCOMES: dict[str, int] = {"stable_forest": 0, "old_plantation": 1, "other": 2}
N_STATIC = len(STATIC_OUTCOMES)


@dataclass(frozen=True)
class Outcomes:
    """Outcome indexing for a series covering ``years`` (ascending calendar years)."""

    years: tuple[int, ...]

    @property
    def size(self) -> int:
        return N_STATIC + len(self.years)

    def index(self, label: str, onset_year: int) -> int:
        """Outcome index of a label (``onset_year`` matters for conversions only)."""
        if label == "conversion":
            try:
                return N_STATIC + self.years.index(int(onset_year))
            except ValueError:
                raise LabelError(f"onset year {onset_year} is outside the series {self.years[0]}-{self.years[-1]}") from None
        if label not in STATIC_OUTCOMES:
            raise LabelError(f"unknown label {label!r}")
        return STATIC_OUTCOMES[label]

    def encode(self, labels: Sequence[str], onset_years: Sequence[int]) -> np.ndarray:
        """Outcome indices (int64) for arrays of labels and onset years."""
        return np.array([self.index(lab, y) for lab, y in zip(labels, onset_years, strict=True)], dtype=np.int64)

    def label_code(self, outcome: np.ndarray) -> np.ndarray:
        """Label code (see :data:`plantation.reference.labels.LABEL_CODES`) of outcome indices."""
        lut = np.array([LABEL_CODES["stable_forest"], LABEL_CODES["old_plantation"], LABEL_CODES["other"]] + [LABEL_CODES["conversion"]] * len(self.years))
        return lut[np.asarray(outcome)]

    def onset_year(self, outcome: np.ndarray) -> np.ndarray:
        """Conversion year of outcome indices (0 for non-conversion outcomes)."""
        lut = np.array([0] * N_STATIC + list(self.years))
        return lut[np.asarray(outcome)]


@dataclass
class Summary:
    """Per-pixel reading of outcome distributions; every array has the leading shape of the input.

    Attributes:
        label: label code (1 stable forest, 2 conversion, 3 old plantation,
            4 other) of the most probable of the four label groups, where the
            conversion group's probability is the sum over its years.
        year: most probable conversion year given conversion (0 unless
            ``label`` is conversion).
        year_low, year_high: an interval of conversion years holding at
            least ``level`` of the conversion probability, grown from the
            modal year towards the more probable neighbour (0 unless
            ``label`` is conversion); it always contains ``year``. Not
            equal-tailed, and not always the shortest such interval.
        p_conversion: probability of conversion in any year.
        p_after_cutoff: probability of conversion in a year after the cutoff year.
        p_label: probability of the chosen label group.
    """

    label: np.ndarray
    year: np.ndarray
    year_low: np.ndarray
    year_high: np.ndarray
    p_conversion: np.ndarray
    p_after_cutoff: np.ndarray
    p_label: np.ndarray


def group_probabilities(probs: np.ndarray) -> np.ndarray:
    """(..., 4) probabilities in label-code order: stable forest, conversion, old plantation, other."""
    p = np.asarray(probs)
    return np.stack([p[..., 0], p[..., N_STATIC:].sum(-1), p[..., 1], p[..., 2]], axis=-1)


def year_interval(p_years: np.ndarray, level: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mode and a mode-grown interval of a distribution over consecutive years.

    Starting at the mode, the interval takes the more probable neighbour
    each step until it holds ``level`` of the (normalised) mass.

    Args:
        p_years: (..., n_years) non-negative weights.
        level: wanted mass in (0, 1].

    Returns:
        (mode, low, high) as year *indices* (int64), each of shape (...).
    """
    if not 0.0 < level <= 1.0:
        raise ValueError(f"interval level must be in (0, 1], got {level!r}")
    w = np.asarray(p_years, dtype=np.float64)
    n = w.shape[-1]
    flat = w.reshape(-1, n)
    total = flat.sum(-1, keepdims=True)
    flat = np.where(total > 0, flat / np.where(total > 0, total, 1.0), 1.0 / n)
    mode = flat.argmax(-1)
    low = mode.copy()
    high = mode.copy()
    mass = flat[np.arange(len(flat)), mode]
    # At most n - 1 growth steps; each step is vectorised over pixels.
    for _ in range(n - 1):
        grow = mass < level - 1e-9
        if not grow.any():
            break
        left = np.where(low > 0, flat[np.arange(len(flat)), np.maximum(low - 1, 0)], -1.0)
        right = np.where(high < n - 1, flat[np.arange(len(flat)), np.minimum(high + 1, n - 1)], -1.0)
        take_left = grow & (left >= right) & (left >= 0)
        take_right = grow & ~take_left & (right >= 0)
        low = np.where(take_left, low - 1, low)
        high = np.where(take_right, high + 1, high)
        mass = mass + np.where(take_left, left, 0.0) + np.where(take_right, right, 0.0)
    shape = w.shape[:-1]
    return mode.reshape(shape), low.reshape(shape), high.reshape(shape)


def summarise(probs: np.ndarray, years: Sequence[int], *, cutoff_year: int, level: float = 0.8) -> Summary:
    """Read class, year, interval and probabilities from outcome distributions.

    Args:
        probs: (..., 3 + len(years)) probabilities (rows sum to one).
        years: calendar years of the conversion outcomes.
        cutoff_year: conversions in years strictly after it count as "after
            the cutoff" (e.g. 2020 for a cutoff of 31 December 2020).
        level: mass of the year interval.
    """
    p = np.asarray(probs, dtype=np.float64)
    yrs = np.asarray(years, dtype=np.int64)
    if p.shape[-1] != N_STATIC + len(yrs):
        raise ValueError(f"probabilities have {p.shape[-1]} outcomes; {N_STATIC + len(yrs)} expected for {len(yrs)} years")
    groups = group_probabilities(p)
    label = groups.argmax(-1) + 1
    conv = label == LABEL_CODES["conversion"]
    mode, low, high = year_interval(p[..., N_STATIC:], level)
    return Summary(
        label=label.astype(np.uint8),
        year=np.where(conv, yrs[mode], 0).astype(np.int16),
        year_low=np.where(conv, yrs[low], 0).astype(np.int16),
        year_high=np.where(conv, yrs[high], 0).astype(np.int16),
        p_conversion=groups[..., 1].astype(np.float32),
        p_after_cutoff=p[..., N_STATIC:][..., yrs > cutoff_year].sum(-1).astype(np.float32),
        p_label=groups.max(-1).astype(np.float32),
    )


#: Interval masses searched when the interval level is recalibrated (see :func:`interval_coverage_curve`).
MASS_GRID: tuple[float, ...] = tuple(round(0.3 + 0.01 * i, 2) for i in range(70))


def interval_coverage_curve(p_years: np.ndarray, true_index: np.ndarray, masses: Sequence[float] = MASS_GRID) -> list[float]:
    """Held-out coverage of the mode-grown year interval at each interval mass.

    The interval a map reports for a nominal level (say 80%) is grown from
    the mode until it holds that much of the year distribution. Whole years
    make it hold more than asked when one year already carries most of the
    mass, so its coverage on held-out data drifts from the nominal level.
    Measuring coverage against the mass asked for, on labelled conversions
    the model did not train on, and then asking for the mass whose coverage
    is the nominal level, recalibrates the interval (Kuleshov et al. 2018,
    "Accurate uncertainties for deep learning using calibrated regression").

    Args:
        p_years: (n, n_years) year weights of held-out true conversions
            (the conversion outcomes' probabilities; rows need not sum to 1).
        true_index: (n,) index of each one's true year.
        masses: interval masses to try, increasing.

    Returns:
        Coverage (share of the n whose true year lies in the interval) for
        each mass; empty input gives an empty list.
    """
    w = np.asarray(p_years, dtype=np.float64)
    t = np.asarray(true_index, dtype=np.int64).ravel()
    if w.ndim != 2 or len(w) != len(t):
        raise ValueError(f"p_years must be (n, years) with one true year per row; got shapes {w.shape} and {t.shape}")
    if len(t) == 0:
        return []
    out = []
    for m in masses:
        _, lo, hi = year_interval(w, float(m))
        out.append(float(((lo <= t) & (t <= hi)).mean()))
    return out


def mass_for_coverage(masses: Sequence[float], coverage: Sequence[float], level: float) -> float:
    """The interval mass whose measured coverage is nearest ``level``; ``level`` itself without a curve.

    Coverage is a step function of the mass; among masses tied for nearest,
    the one nearest ``level`` itself is taken (the least change from the
    uncalibrated rule).
    """
    if not masses or len(masses) != len(coverage):
        return float(level)
    m = np.asarray(masses, dtype=np.float64)
    gap = np.abs(np.asarray(coverage, dtype=np.float64) - level)
    tied = np.flatnonzero(gap <= gap.min() + 1e-12)
    return float(m[tied[np.argmin(np.abs(m[tied] - level))]])
