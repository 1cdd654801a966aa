"""Plate normalization and plate QC from control wells."""

from __future__ import annotations

import numpy as np
import pandas as pd

MAD_TO_SD = 1.4826  # makes the MAD consistent with the SD of a normal distribution (Rousseeuw & Croux 1993)


def mad(values: np.ndarray) -> float:
    """Median absolute deviation from the median (unscaled)."""
    values = np.asarray(values, float)
    values = values[np.isfinite(values)]
    return float(np.median(np.abs(values - np.median(values)))) if len(values) else float("nan")


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
        return "excellent (Z' >= 0.5)"
    if value > 0:
        return "marginal (0 < Z' < 0.5)"
    return "unusable for single-point screening (Z' <= 0)"


def add_robust_z(profile: pd.DataFrame, features: list[str]) -> pd.DataFrame:
    """Add <feature>_robust_z columns, scaled on the plate's negative-control wells that were kept."""
    out = profile.copy()
    controls = out[(out["role"] == "negative_control") & (out["excluded_by"] == "")]
    for feature in features:
        out[f"{feature}_robust_z"] = robust_z(out[feature].to_numpy(float), controls[feature].to_numpy(float))
    return out


def apply_well_exclusions(profile: pd.DataFrame, min_cells_per_well: float) -> pd.DataFrame:
    """Mark wells by the declared exclusion rules in column excluded_by ('' when kept)."""
    out = profile.copy()
    reason = np.where(out["cell_count"] < min_cells_per_well,
                      [f"min_cells_per_well: {c:.1f} cells < {min_cells_per_well:g}" for c in out["cell_count"]], "")
    out["excluded_by"] = reason
    return out


def plate_qc(profile: pd.DataFrame, features: list[str]) -> pd.DataFrame:
    """Per feature: control counts, medians, Z', robust Z' and the verdict band."""
    kept = profile[profile["excluded_by"] == ""]
    negative = kept[kept["role"] == "negative_control"]
    positive = kept[kept["role"] == "positive_control"]
    rows = []
    for feature in features:
        neg, pos = negative[feature].dropna().to_numpy(float), positive[feature].dropna().to_numpy(float)
        value = z_prime(pos, neg)
        rows.append({"feature": feature, "n_negative": len(neg), "n_positive": len(pos),
                     "negative_median": float(np.median(neg)) if len(neg) else np.nan,
                     "positive_median": float(np.median(pos)) if len(pos) else np.nan,
                     "negative_cv": float(neg.std(ddof=1) / neg.mean()) if len(neg) > 1 and neg.mean() != 0 else np.nan,
                     "z_prime": value, "robust_z_prime": robust_z_prime(pos, neg), "verdict": z_prime_verdict(value)})
    return pd.DataFrame(rows)
