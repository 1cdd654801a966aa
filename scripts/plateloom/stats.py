"""False discovery rate: Benjamini-Hochberg q-values (used by the effects table and the collective readouts)."""

from __future__ import annotations

import numpy as np


def bh_qvalues(p_values: np.ndarray) -> np.ndarray:
    """Benjamini-Hochberg (1995) adjusted p-values (q-values); NaN p-values stay NaN and are not counted."""
    p = np.asarray(p_values, float)
    q = np.full(p.shape, np.nan)
    finite = np.isfinite(p)
    m = int(finite.sum())
    if m == 0:
        return q
    values = p[finite]
    order = np.argsort(values)
    scaled = values[order] * m / np.arange(1, m + 1)
    adjusted = np.minimum.accumulate(scaled[::-1])[::-1]
    result = np.empty(m)
    result[order] = np.minimum(adjusted, 1.0)
    q[finite] = result
    return q
