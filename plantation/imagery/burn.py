"""Burn indices and burn severity from surface reflectance.

Pure index math on reflectance as unitless fractions (0–1), any array type
that supports arithmetic; NaN where a denominator is zero, never ``inf``.

* dNBR = NBR(before) − NBR(after), NBR = (NIR − SWIR2) / (NIR + SWIR2)
  (Key & Benson 2006, FIREMON), with their severity classes on dNBR × 1000:
  < −100 enhanced regrowth, −100 to 99 unburned, 100–269 low, 270–439
  moderate-low, 440–659 moderate-high, ≥ 660 high.
* MIRBI = 10 · SWIR2 − 9.8 · SWIR1 + 2 (Trigg & Flasse 2001, "mid-infrared
  burn index").
* BAI = 1 / ((0.1 − Red)² + (0.06 − NIR)²) (Chuvieco et al. 2002, "burned
  area index"): the inverse squared distance to a charcoal-like red/NIR
  point, so high on char and low on bare soil, which is brighter in both.

A large dNBR says the canopy went, not how: bare soil after mechanical
clearing also has a low NBR (common practice). A char index (BAI, MIRBI)
beside it tells the two apart.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from plantation.imagery.indices import _safe_div, nbr

#: Key & Benson (2006) severity classes: (code, name, lowest dNBR of the class), dNBR unitless (the published breaks ÷ 1000), ascending.
SEVERITY_CLASSES: tuple[tuple[int, str, float], ...] = (
    (1, "enhanced regrowth", -np.inf),
    (2, "unburned", -0.100),
    (3, "low", 0.100),
    (4, "moderate-low", 0.270),
    (5, "moderate-high", 0.440),
    (6, "high", 0.660),
)
#: Severity code of each class name.
SEVERITY: dict[str, int] = {name: code for code, name, _ in SEVERITY_CLASSES}


def dnbr(nir_before: Any, swir2_before: Any, nir_after: Any, swir2_after: Any) -> Any:
    """Differenced normalised burn ratio NBR(before) − NBR(after), unitless in [−2, 2]; positive where the canopy was lost."""
    return nbr(nir_before, swir2_before) - nbr(nir_after, swir2_after)


def severity_class(d: Any) -> np.ndarray:
    """Key & Benson (2006) severity code (:data:`SEVERITY_CLASSES`) of dNBR values (unitless, not × 1000); 0 where dNBR is NaN.

    A class starts at its published break and runs up to the next: low is
    0.100 ≤ dNBR < 0.270 (the table's 100–269 on dNBR × 1000 integers).
    """
    v = np.asarray(d, dtype=np.float64)
    breaks = np.array([lo for _, _, lo in SEVERITY_CLASSES[1:]])
    code = np.searchsorted(breaks, np.where(np.isfinite(v), v, 0.0), side="right") + 1
    return np.where(np.isfinite(v), code, 0).astype(np.int16)


def mirbi(swir1: Any, swir2: Any) -> Any:
    """Mid-infrared burn index 10 · SWIR2 − 9.8 · SWIR1 + 2 (Trigg & Flasse 2001), unitless."""
    return 10.0 * swir2 - 9.8 * swir1 + 2.0


def bai(red: Any, nir: Any) -> Any:
    """Burned area index 1 / ((0.1 − Red)² + (0.06 − NIR)²) (Chuvieco et al. 2002), unitless, ≥ 0."""
    return _safe_div(1.0, (0.1 - red) ** 2 + (0.06 - nir) ** 2)
