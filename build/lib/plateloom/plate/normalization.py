"""Plate normalizations against the plate's own control wells: a registry, one entry per method.

Each method takes a feature's values in every well of a plate and the values in its kept
negative- and positive-control wells, and returns the normalized values, written next to the
feature as ``<feature><suffix>``. Adding a normalization is one function and one registry entry
(and its name in the schema's enum; a test keeps the two equal).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from plateloom.plate.qc import robust_z


def percent_of_control(values: np.ndarray, negative: np.ndarray, positive: np.ndarray) -> np.ndarray:
    """100 x / median(neg): the value as a percentage of the negative controls' median (100 = control)."""
    negative = negative[np.isfinite(negative)]
    centre = np.median(negative) if len(negative) else np.nan
    if not np.isfinite(centre) or centre == 0:
        return np.full(np.shape(values), np.nan)
    return 100.0 * np.asarray(values, float) / centre


def percent_activity(values: np.ndarray, negative: np.ndarray, positive: np.ndarray) -> np.ndarray:
    """Normalized percent activity, 100 (x - median(neg)) / (median(pos) - median(neg)): 0 at the
    negative and 100 at the positive controls' median; NaN without both kinds of control."""
    negative, positive = negative[np.isfinite(negative)], positive[np.isfinite(positive)]
    if len(negative) == 0 or len(positive) == 0:
        return np.full(np.shape(values), np.nan)
    span = np.median(positive) - np.median(negative)
    return 100.0 * (values - np.median(negative)) / span if span != 0 else np.full(np.shape(values), np.nan)


def _robust_z(values: np.ndarray, negative: np.ndarray, positive: np.ndarray) -> np.ndarray:
    return robust_z(values, negative)


@dataclass(frozen=True)
class Normalization:
    """A plate normalization: the column suffix it writes and its function (None: writes nothing)."""

    suffix: str
    compute: Callable[[np.ndarray, np.ndarray, np.ndarray], np.ndarray] | None


NORMALIZATIONS: dict[str, Normalization] = {
    "robust_z": Normalization("_robust_z", _robust_z),
    "percent_of_control": Normalization("_percent_of_control", percent_of_control),
    "percent_activity": Normalization("_percent_activity", percent_activity),
    "raw": Normalization("", None),
}


def normalize(values: np.ndarray, negative: np.ndarray, positive: np.ndarray, method: str) -> np.ndarray | None:
    """``values`` normalized by ``method`` (a key of ``NORMALIZATIONS``); None for "raw"."""
    compute = NORMALIZATIONS[method].compute
    if compute is None:
        return None
    return compute(np.asarray(values, float), np.asarray(negative, float), np.asarray(positive, float))
