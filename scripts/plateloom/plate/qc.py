"""Plate normalization and plate QC from control wells."""

from __future__ import annotations

import numpy as np
import pandas as pd

from plateloom.stats import MAD_TO_SD, mad


def robust_z(values: np.ndarray, controls: np.ndarray) -> np.ndarray:
    """(x - median(controls)) / (1.4826 x MAD(controls)); NaN when the controls have no spread."""
    controls = np.asarray(controls, float)
    controls = controls[np.isfinite(controls)]
    if len(controls) == 0:
        return np.full(np.shape(values), np.nan)
    scale = MAD_TO_SD * mad(controls)
    if scale == 0:
        return np.full(np.shape(values), np.nan)
    return (np.asarray(values, float) - np.median(controls)) / scale


def z_prime(positive: np.ndarray, negative: np.ndarray) -> float:
    """Z'-factor (Zhang, Chung & Oldenburg 1999): 1 - 3 (sd_pos + sd_neg) / |mean_pos - mean_neg|."""
    positive, negative = np.asarray(positive, float), np.asarray(negative, float)
    if len(positive) < 2 or len(negative) < 2:
        return float("nan")
    separation = abs(positive.mean() - negative.mean())
    if separation == 0:
        return float("-inf")
    return float(1.0 - 3.0 * (positive.std(ddof=1) + negative.std(ddof=1)) / separation)


def robust_z_prime(positive: np.ndarray, negative: np.ndarray) -> float:
    """Z'-factor with medians and 1.4826 x MAD in place of means and SDs."""
    positive, negative = np.asarray(positive, float), np.asarray(negative, float)
    if len(positive) < 2 or len(negative) < 2:
        return float("nan")
    separation = abs(np.median(positive) - np.median(negative))
    if separation == 0:
        return float("-inf")
    return float(1.0 - 3.0 * MAD_TO_SD * (mad(positive) + mad(negative)) / separation)


def z_prime_verdict(value: float) -> str:
    """Plain-language band for a Z'-factor (Zhang et al. 1999): excellent, marginal or unusable."""
    if not np.isfinite(value):
        return "not computable"
    if value >= 0.5:
        return "excellent"
    if value > 0:
        return "marginal"
    return "unusable"


UNMOVED_SSMD = 2.0  # below this |SSMD| the positive control barely moves a feature


def qc_verdict(z_value: float, ssmd_value: float, n_positive: int, n_negative: int) -> str:
    """The Z' band, or why Z' says nothing about this feature: too few control wells, or a positive
    control that does not move it (|SSMD| below UNMOVED_SSMD, where Z' runs to large negative values
    that measure nothing but the lack of a shift)."""
    if n_positive < 2:
        return "no Z': fewer than 2 positive-control wells on this plate"
    if n_negative < 2:
        return "no Z': fewer than 2 negative-control wells on this plate"
    if np.isfinite(ssmd_value) and abs(ssmd_value) < UNMOVED_SSMD and not z_value > 0:
        return f"no Z': the positive control does not move this feature (|SSMD| < {UNMOVED_SSMD:g})"
    return z_prime_verdict(z_value)


def plate_qc(profile: pd.DataFrame, features: list[str]) -> pd.DataFrame:
    """Per feature: control counts, medians and CVs, Z', robust Z', SSMD, signal window, verdict band."""
    kept = profile[profile["excluded_by"] == ""]
    negative = kept[kept["role"] == "negative_control"]
    positive = kept[kept["role"] == "positive_control"]
    rows = []
    for feature in features:
        neg, pos = negative[feature].dropna().to_numpy(float), positive[feature].dropna().to_numpy(float)
        value = z_prime(pos, neg)
        rows.append(
            {
                "feature": feature,
                "n_negative": len(neg),
                "n_positive": len(pos),
                "negative_median": float(np.median(neg)) if len(neg) else np.nan,
                "positive_median": float(np.median(pos)) if len(pos) else np.nan,
                "negative_cv": float(neg.std(ddof=1) / neg.mean()) if len(neg) > 1 and neg.mean() != 0 else np.nan,
                "positive_cv": float(pos.std(ddof=1) / pos.mean()) if len(pos) > 1 and pos.mean() != 0 else np.nan,
                "z_prime": value,
                "robust_z_prime": robust_z_prime(pos, neg),
                "ssmd": ssmd(pos, neg),
                "robust_ssmd": robust_ssmd(pos, neg),
                "signal_window": signal_window(pos, neg),
                "verdict": qc_verdict(value, ssmd(pos, neg), len(pos), len(neg)),
            }
        )
    return pd.DataFrame(rows)


def ssmd(first: np.ndarray, second: np.ndarray) -> float:
    """Strictly standardised mean difference (Zhang 2007): (mean1 - mean2) / sqrt(var1 + var2)."""
    first, second = np.asarray(first, float), np.asarray(second, float)
    if len(first) < 2 or len(second) < 2:
        return float("nan")
    spread = np.sqrt(first.var(ddof=1) + second.var(ddof=1))
    return float((first.mean() - second.mean()) / spread) if spread > 0 else float("nan")


def robust_ssmd(first: np.ndarray, second: np.ndarray) -> float:
    """SSMD with medians and 1.4826 x MAD in place of means and SDs (Zhang 2007, robust form)."""
    first, second = np.asarray(first, float), np.asarray(second, float)
    if len(first) < 2 or len(second) < 2:
        return float("nan")
    spread = MAD_TO_SD * np.sqrt(mad(first) ** 2 + mad(second) ** 2)
    return float((np.median(first) - np.median(second)) / spread) if spread > 0 else float("nan")


def signal_window(positive: np.ndarray, negative: np.ndarray) -> float:
    """Signal window: (|mean_pos - mean_neg| - 3 (sd_pos + sd_neg)) / sd_pos.

    Definition recalled from memory (assay-validation practice, e.g. Iversen et al. 2006);
    values of 2 or more are usually taken as acceptable.
    """
    positive, negative = np.asarray(positive, float), np.asarray(negative, float)
    if len(positive) < 2 or len(negative) < 2:
        return float("nan")
    sd_pos = positive.std(ddof=1)
    if sd_pos == 0:
        return float("nan")
    return float((abs(positive.mean() - negative.mean()) - 3 * (sd_pos + negative.std(ddof=1))) / sd_pos)
