"""Wall-to-wall scores of a conversion-year map against complete truth (simulated regions).

These are benchmark scores for comparing methods on a region whose every
pixel is known. They are not the design-based accuracy and area estimates a
real map needs from a reference sample.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sklearn.metrics import f1_score

from plantation.model.calibration import expected_calibration_error
from plantation.model.outcomes import Summary
from plantation.reference.labels import LABEL_CODES

CONVERSION = LABEL_CODES["conversion"]


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
        bins; ``interval80_coverage``: share of true conversions whose year
        lies in the mapped interval (a pixel not mapped as conversion has no
        interval and counts as not covered).
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
        out["interval80_coverage"] = float((hit & (lo <= yr) & (yr <= hi)).sum() / n_conv)
    if not has_probability:
        out["ece_note"] = "0/1 outputs: ECE is the error of a probability that is always 0 or 1"
    return {k: (round(v, 4) if isinstance(v, float) else v) for k, v in out.items()}
