"""Torsion-derived observables averaged over a run, with intervals.

3J(HN,HA) scalar couplings from the Karplus relation J = A cos^2(theta) + B cos(theta) + C with
theta = phi - 60 degrees: Vuister & Bax, J. Am. Chem. Soc. 115:7772 (1993) and Hu & Bax,
J. Am. Chem. Soc. 119:6360 (1997). Intervals: mean +- 1.96 standard errors, the standard error
inflated by the statistical inefficiency of the observable's series (pooled over walkers).
"""

from __future__ import annotations

import numpy as np

from hopwell.analysis.stats import statistical_inefficiency

KARPLUS_HN_HA = {
    "vuister-bax-1993": (6.51, -1.76, 1.60),
    "hu-bax-1997": (7.09, -1.42, 1.55),
}


def j3_hn_ha(phi_rad: np.ndarray, model: str = "hu-bax-1997") -> np.ndarray:
    """3J(HN,HA) in Hz for backbone phi angles (radians), same shape as ``phi_rad``."""
    if model not in KARPLUS_HN_HA:
        raise ValueError(f"unknown Karplus model {model!r}; use one of {sorted(KARPLUS_HN_HA)}")
    a, b, c = KARPLUS_HN_HA[model]
    cos = np.cos(np.asarray(phi_rad) - np.deg2rad(60.0))
    return a * cos**2 + b * cos + c


def series_mean(series: np.ndarray) -> tuple[float, float, float]:
    """Mean of per-walker series ``(n_walkers, n_samples)`` and its 95% interval."""
    x = np.asarray(series, dtype=float)
    g = float(np.mean([statistical_inefficiency(row) for row in x]))
    mean = float(x.mean())
    se = float(x.std(ddof=1) * np.sqrt(g / x.size)) if x.size > 1 else float("inf")
    return mean, mean - 1.96 * se, mean + 1.96 * se
