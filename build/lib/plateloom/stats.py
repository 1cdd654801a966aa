"""Small statistics shared by the stages: the MAD and its consistency constant, BH q-values."""

from __future__ import annotations

import numpy as np
from scipy import stats

# 1.4826 x MAD estimates the SD of normally distributed data (Rousseeuw & Croux 1993; common practice)
MAD_TO_SD = 1.4826


def mad(values: np.ndarray) -> float:
    """Median absolute deviation from the median (unscaled), over the finite values; NaN if none."""
    values = np.asarray(values, float)
    values = values[np.isfinite(values)]
    return float(stats.median_abs_deviation(values)) if len(values) else float("nan")


def bh_qvalues(p_values: np.ndarray) -> np.ndarray:
    """Benjamini-Hochberg (1995) adjusted p-values (q-values, ``scipy.stats.false_discovery_control``);
    NaN p-values stay NaN and are not counted in the family."""
    p = np.asarray(p_values, float)
    q = np.full(p.shape, np.nan)
    finite = np.isfinite(p)
    if finite.any():
        q[finite] = stats.false_discovery_control(p[finite], method="bh")
    return q
