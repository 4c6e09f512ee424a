"""Wall-to-wall scores of a conversion-year map against complete truth (simulated regions).

These are benchmark scores for comparing methods on a region whose every
pixel is known. They are not the design-based accuracy and area estimates a
real map needs from a reference sample.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from sklearn.metrics import f1_score

from plantation.mapping.fire import FIRE_CODES
from plantation.model.calibration import expected_calibration_error
from plantation.model.outcomes import Summary
from plantation.reference.labels import LABEL_CODES, LABEL_NAMES
from plantation.simulation.scenario import FIRE_TRUTH

CONVERSION = LABEL_CODES["conversion"]

#: Event kinds (keys of :data:`plantation.simulation.scenario.EVENTS`) that are
#: not conversions but can look like one.
LOOK_ALIKES: tuple[str, ...] = ("logging", "fire_regrowth", "cleared_for_crops", "cropland", "grassland", "water")
#: Bins of years from the event to the last year of the series; the last is open.
YEARS_SINCE_BINS: tuple[str, ...] = ("0", "1", "2", "3+")


def map_scores(summary: Summary, true_label: np.ndarray, true_year: np.ndarray, *, has_interval: bool = True, has_probability: bool = True) -> dict[str, Any]:
    """Scores of one method over all pixels.

    Args:
        summary: the method's per-pixel summary (flattened or not).
        true_label: label codes (1..4) of the truth, same shape.
        true_year: truth conversion year (0 where not a conversion).
        has_interval: whether the method's year interval is meaningful
            (``interval80_coverage`` is None otherwise).
        has_probability: whether ``p_conversion`` is a probability (``ece``
            is still computed for a 0/1 rule, which is then its error rate
            structure, but flagged).

    Returns:
        ``year_exact`` and ``year_within1``: shares of true conversions mapped
        as conversion in the right year (within one year); ``conversion_f1``:
        F1 of conversion vs. not; ``macro_f1``: mean F1 over the four labels;
        ``year_mae``: mean absolute year error over true conversions mapped as
        conversion; ``ece``: expected calibration error of p_conversion, 10
        bins; ``interval80_coverage``: share of true conversions mapped as
        conversion whose year lies in the mapped interval (the interval is
        of the year given conversion, so a missed conversion is a class
        error, counted in ``year_exact``, not here);
        ``interval80_coverage_all_conversions``: the same over all true
        conversions, a pixel not mapped as conversion counting as not covered.
    """
    lab = np.asarray(true_label).ravel()
    yr = np.asarray(true_year).ravel()
    pl = np.asarray(summary.label).ravel()
    py = np.asarray(summary.year).ravel()
    conv = lab == CONVERSION
    n_conv = max(int(conv.sum()), 1)
    hit = conv & (pl == CONVERSION)
    out: dict[str, Any] = {
        "year_exact": float((hit & (py == yr)).sum() / n_conv),
        "year_within1": float((hit & (np.abs(py.astype(np.int64) - yr) <= 1)).sum() / n_conv),
        "conversion_f1": float(f1_score(conv, pl == CONVERSION)),
        "macro_f1": float(f1_score(lab, pl, labels=list(LABEL_CODES.values()), average="macro", zero_division=0)),
        "year_mae": float(np.abs(py[hit].astype(np.int64) - yr[hit]).mean()) if hit.any() else None,
        "ece": float(expected_calibration_error(np.asarray(summary.p_conversion).ravel(), conv)),
        "interval80_coverage": None,
        "interval80_coverage_all_conversions": None,
        "n_pixels": int(lab.size),
        "n_true_conversions": int(conv.sum()),
    }
    by_year = {}
    for y in np.unique(yr[conv]):
        m = conv & (yr == y)
        by_year[str(int(y))] = round(float((hit[m] & (py[m] == y)).mean()), 4)
    out["year_exact_by_onset_year"] = by_year
    if has_interval:
        lo = np.asarray(summary.year_low).ravel()
        hi = np.asarray(summary.year_high).ravel()
        inside = hit & (lo <= yr) & (yr <= hi)
        out["interval80_coverage"] = float(inside.sum() / max(int(hit.sum()), 1))
        out["interval80_coverage_all_conversions"] = float(inside.sum() / n_conv)
    if not has_probability:
        out["ece_note"] = "0/1 outputs: ECE is the error of a probability that is always 0 or 1"
    return {k: (round(v, 4) if isinstance(v, float) else v) for k, v in out.items()}


def per_class_f1(summary: Summary, true_label: np.ndarray) -> dict[str, float]:
    """F1 of each label (stable_forest, conversion, old_plantation, other), the map's class against the truth's.

    Args:
        summary: the method's per-pixel summary (flattened or not).
        true_label: label codes (1..4) of the truth, same shape.

    Returns:
        {label name: F1}, 0 for a label neither mapped nor true; the same
        numbers as ``sklearn.metrics.f1_score(..., average=None, zero_division=0)``.
    """
    lab = np.asarray(true_label).ravel()
    pl = np.asarray(summary.label).ravel()
    if lab.shape != pl.shape:
        raise ValueError(f"map and truth differ in size: {pl.size} vs {lab.size} pixels")
    out = {}
    for name in LABEL_NAMES:
        c = LABEL_CODES[name]
        tp = int(((pl == c) & (lab == c)).sum())
        denom = int((pl == c).sum() + (lab == c).sum())  # 2·TP + FP + FN
        out[name] = round(2 * tp / denom, 4) if denom else 0.0
    return out


def false_conversion_rate(
    pred_conversion: np.ndarray, truth_event: np.ndarray, truth_event_year: np.ndarray, years: Sequence[int], event_codes: Mapping[str, int], kinds: Sequence[str] = LOOK_ALIKES
) -> dict[str, dict[str, Any]]:
    """Share of each look-alike's pixels mapped as conversion, overall and by years since its event.

    Years since the event count to the last year of the series: an event in
    the last year has had no time to regrow (0), one three or more years
    before it has (``3+``). Kinds without an event year in the truth (0:
    cropland, grassland, water) have no breakdown.

    Args:
        pred_conversion: bool, pixels the method maps as conversion (e.g.
            ``summary.label == 2``).
        truth_event: event codes of the truth raster's ``event`` band (band 3
            of ``truth.tif``), same shape.
        truth_event_year: calendar year of the event (band 4; 0 when none).
        years: calendar years of the series (``Outcomes.years``).
        event_codes: event name → code (:data:`plantation.simulation.scenario.EVENTS`).
        kinds: the event kinds to score.

    Returns:
        {kind: {"rate", "n_pixels", "by_years_since": {bin: rate},
        "n_by_years_since": {bin: pixels}}}; a rate is None where there are no
        pixels.
    """
    pred = np.asarray(pred_conversion).ravel().astype(bool)
    ev = np.asarray(truth_event).ravel()
    ey = np.asarray(truth_event_year).ravel().astype(np.int64)
    if not (pred.shape == ev.shape == ey.shape):
        raise ValueError(f"map and truth differ in size: {pred.size}, {ev.size} and {ey.size} pixels")
    unknown = [k for k in kinds if k not in event_codes]
    if unknown:
        raise ValueError(f"unknown event kind(s) {unknown}; the event codes are {sorted(event_codes)}")
    since = np.minimum(int(max(years)) - ey, len(YEARS_SINCE_BINS) - 1)

    def rate(m: np.ndarray) -> float | None:
        return round(float(pred[m].mean()), 4) if m.any() else None

    out: dict[str, dict[str, Any]] = {}
    for kind in kinds:
        m = ev == event_codes[kind]
        dated = m & (ey > 0)
        res: dict[str, Any] = {"rate": rate(m), "n_pixels": int(m.sum()), "by_years_since": {}, "n_by_years_since": {}}
        if dated.any():
            for b, name in enumerate(YEARS_SINCE_BINS):
                mb = dated & (since == b)
                res["by_years_since"][name] = rate(mb)
                res["n_by_years_since"][name] = int(mb.sum())
        out[kind] = res
    return out


def fire_scores(mapped_label: np.ndarray, fire_code: np.ndarray, fire_year: np.ndarray, true_label: np.ndarray, true_fire: np.ndarray, true_event_year: np.ndarray) -> dict[str, Any]:
    """Fire in the clearing against the simulator's truth, over all pixels.

    Burnt vs not burnt is scored on the observed clearings: pixels converted
    in the truth and mapped as converted with a known fire code (burnt or
    not burnt); ``unknown`` is counted apart (its share of the mapped true
    clearings), never as "no fire". Escaped fire is scored by area: mapped
    escaped-fire pixels over true ones, with the share of mapped pixels that
    are truly escaped fire and, of those, the share with the true year.

    Args:
        mapped_label: the map's class codes; fire_code, fire_year: its fire
            layers (codes of :data:`plantation.mapping.fire.FIRE_CODES`).
        true_label: truth class codes; true_fire: the truth's ``fire`` band
            (:data:`plantation.simulation.scenario.FIRE_TRUTH`); true_event_year: its ``event_year`` band.

    Returns:
        ``fire_balanced_accuracy`` (mean of the recalls of burnt and not
        burnt; None without both), ``burnt_recall``, ``not_burnt_recall``,
        ``known_share``, ``observed_clearings``, ``escaped_fire_area_ratio``
        (None without true escaped fire), ``escaped_fire_precision``,
        ``escaped_fire_year_exact``, and the pixel counts.
    """
    lab, code, year = (np.asarray(a).ravel() for a in (mapped_label, fire_code, fire_year))
    tl, tf, ty = (np.asarray(a).ravel() for a in (true_label, true_fire, true_event_year))
    clearings = (tl == CONVERSION) & (lab == CONVERSION)
    burnt_map = code == FIRE_CODES["converted_burnt"]
    known = clearings & (burnt_map | (code == FIRE_CODES["converted_not_burnt"]))
    burnt_true = tf == FIRE_TRUTH["clearing_burnt"]
    pos, neg = int((known & burnt_true).sum()), int((known & ~burnt_true).sum())
    tpr = float((known & burnt_true & burnt_map).sum() / pos) if pos else None
    tnr = float((known & ~burnt_true & ~burnt_map).sum() / neg) if neg else None
    esc_map = code == FIRE_CODES["escaped_fire"]
    esc_true = tf == FIRE_TRUTH["escaped_fire"]
    hit = esc_map & esc_true
    n_map, n_true = int(esc_map.sum()), int(esc_true.sum())

    def r(x: float | None) -> float | None:
        return None if x is None else round(float(x), 4)

    return {
        "fire_balanced_accuracy": r((tpr + tnr) / 2) if tpr is not None and tnr is not None else None,
        "burnt_recall": r(tpr),
        "not_burnt_recall": r(tnr),
        "observed_clearings": int(known.sum()),
        "observed_burnt": pos,
        "observed_not_burnt": neg,
        "known_share": r(known.sum() / clearings.sum()) if clearings.any() else None,
        "escaped_fire_area_ratio": r(n_map / n_true) if n_true else None,
        "escaped_fire_precision": r(hit.sum() / n_map) if n_map else None,
        "escaped_fire_year_exact": r((hit & (year == ty)).sum() / hit.sum()) if hit.any() else None,
        "escaped_fire_pixels": {"mapped": n_map, "true": n_true},
    }
