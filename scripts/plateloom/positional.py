"""Positional effects on a plate: Tukey's median polish, the B-score, the edge-effect diagnostic."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from .plate_stats import MAD_TO_SD, mad


@dataclass(frozen=True)
class MedianPolish:
    """Additive fit grid = overall + row[:, None] + column[None, :] + residual (NaN where no well)."""

    overall: float
    row: np.ndarray
    column: np.ndarray
    residual: np.ndarray


def median_polish(grid: np.ndarray, max_iterations: int = 20, tolerance: float = 1e-10) -> MedianPolish:
    """Tukey's two-way median polish (Tukey 1977) of a plate-shaped array; NaN cells are ignored."""
    residual = np.array(grid, float)
    rows, columns = residual.shape
    row, column, overall = np.zeros(rows), np.zeros(columns), 0.0
    for _ in range(max_iterations):
        row_median = np.nan_to_num(np.nanmedian(residual, axis=1)) if np.isfinite(residual).any() else np.zeros(rows)
        residual -= row_median[:, None]
        row += row_median
        shift = np.median(column)
        column -= shift
        overall += shift
        column_median = np.nan_to_num(np.nanmedian(residual, axis=0))
        residual -= column_median[None, :]
        column += column_median
        shift = np.median(row)
        row -= shift
        overall += shift
        if max(np.abs(row_median).max(), np.abs(column_median).max()) < tolerance:
            break
    return MedianPolish(overall, row, column, residual)


def b_scores(grid: np.ndarray) -> np.ndarray:
    """B-score (Brideau et al. 2003): median-polish residuals divided by 1.4826 x their MAD."""
    residual = median_polish(grid).residual
    scale = MAD_TO_SD * mad(residual[np.isfinite(residual)])
    return residual / scale if scale > 0 else np.full(residual.shape, np.nan)


def positional_correction(grid: np.ndarray, fit_mask: np.ndarray, min_wells_per_line: int = 3) -> tuple[np.ndarray, list[str]]:
    """Remove row and column effects estimated by median polish on the wells in ``fit_mask``.

    Effects are fitted on ``fit_mask`` wells (normally test wells, whose median is the plate
    background) and subtracted from every well, controls included. A row or column with
    fewer than ``min_wells_per_line`` fitted wells (for example control-only edge columns)
    cannot be estimated: its effect is left at 0 and named in the returned warnings.
    """
    fitted = np.where(fit_mask, grid, np.nan)
    polish = median_polish(fitted)
    warnings = []
    row_support = np.isfinite(fitted).sum(axis=1)
    column_support = np.isfinite(fitted).sum(axis=0)
    row, column = polish.row.copy(), polish.column.copy()
    for index in np.flatnonzero(row_support < min_wells_per_line):
        row[index] = 0.0
        warnings.append(f"row {index + 1}: {row_support[index]} fitted wells, row effect not estimated")
    for index in np.flatnonzero(column_support < min_wells_per_line):
        column[index] = 0.0
        warnings.append(f"column {index + 1}: {column_support[index]} fitted wells, column effect not estimated")
    return grid - row[:, None] - column[None, :], warnings


def edge_effect(profile: pd.DataFrame, feature: str, log_scale: bool) -> dict[str, float]:
    """Outer against inner wells of the same treatment: shift of the medians and a Mann-Whitney p-value.

    Each well is centred on the median of its treatment on the plate (on the log scale for
    positive features), so treatments placed differently do not pose as an edge effect.
    """
    data = profile[(profile["excluded_by"] == "") & profile[feature].notna()].copy()
    values = data[feature].astype(float)
    if log_scale:
        values = np.log(values.where(values > 0))
    data["centred"] = values - values.groupby(data["treatment"]).transform("median")
    edge, inner = data.loc[data["is_edge"], "centred"].dropna(), data.loc[~data["is_edge"], "centred"].dropna()
    if len(edge) < 3 or len(inner) < 3:
        return {"feature": feature, "n_edge": len(edge), "n_inner": len(inner), "edge_shift": np.nan, "p_value": np.nan}
    p_value = float(stats.mannwhitneyu(edge, inner, alternative="two-sided").pvalue)
    return {"feature": feature, "n_edge": len(edge), "n_inner": len(inner),
            "edge_shift": float(edge.median() - inner.median()), "p_value": p_value}
