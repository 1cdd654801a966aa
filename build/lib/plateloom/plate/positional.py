"""Positional effects on a plate: Tukey's median polish, the B-score, the edge-effect diagnostic."""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from plateloom.setup.plate_formats import PlateFormat, plate_format, well_grid
from plateloom.stats import MAD_TO_SD, mad


@dataclass(frozen=True)
class MedianPolish:
    """Additive fit grid = overall + row[:, None] + column[None, :] + residual (NaN where no well)."""

    overall: float
    row: np.ndarray
    column: np.ndarray
    residual: np.ndarray


def _line_medians(values: np.ndarray, axis: int) -> np.ndarray:
    """Medians along rows or columns ignoring NaN; 0 for a line with no value (its effect stays 0)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nan_to_num(np.nanmedian(values, axis=axis))


def median_polish(grid: np.ndarray, max_iterations: int = 20, tolerance: float = 1e-10) -> MedianPolish:
    """Tukey's two-way median polish (Tukey 1977) of a plate-shaped array; NaN cells are ignored."""
    residual = np.array(grid, float)
    rows, columns = residual.shape
    row, column, overall = np.zeros(rows), np.zeros(columns), 0.0
    for _ in range(max_iterations):
        row_median = _line_medians(residual, axis=1)
        residual -= row_median[:, None]
        row += row_median
        shift = np.median(column)
        column -= shift
        overall += shift
        column_median = _line_medians(residual, axis=0)
        residual -= column_median[None, :]
        column += column_median
        shift = np.median(row)
        row -= shift
        overall += shift
        if max(np.abs(row_median).max(), np.abs(column_median).max()) < tolerance:
            break
    return MedianPolish(overall, row, column, residual)


def b_scores(grid: np.ndarray) -> np.ndarray:
    """B-score: median-polish residuals divided by 1.4826 x their MAD.

    Brideau et al. (2003) divide by the unscaled MAD; plateloom scales it by 1.4826 so that a
    B-score reads on the same scale as a robust z (1 = one robust SD). Divide by 1.4826 to get
    the published values.
    """
    residual = median_polish(grid).residual
    scale = MAD_TO_SD * mad(residual[np.isfinite(residual)])
    return residual / scale if scale > 0 else np.full(residual.shape, np.nan)


def positional_correction(
    grid: np.ndarray, fit_grid: np.ndarray, min_wells_per_line: int = 3
) -> tuple[np.ndarray, list[str]]:
    """Remove from ``grid`` the row and column effects that median polish finds in ``fit_grid``.

    ``fit_grid`` holds the values to fit (NaN elsewhere), normally each well minus the median
    of its treatment on the plate, so treatments do not pose as positions. A row or column
    with fewer than ``min_wells_per_line`` fitted wells (for example control-only edge
    columns when controls are left out) cannot be estimated: its effect stays 0 and is named
    in the returned notes.
    """
    polish = median_polish(fit_grid)
    notes = []
    row, column = polish.row.copy(), polish.column.copy()
    for name, effects, support in (
        ("row", row, np.isfinite(fit_grid).sum(axis=1)),
        ("column", column, np.isfinite(fit_grid).sum(axis=0)),
    ):
        thin = np.flatnonzero(support < min_wells_per_line)
        effects[thin] = 0.0
        if len(thin):
            notes.append(
                f"{name}{'s' if len(thin) > 1 else ''} {', '.join(str(i + 1) for i in thin)}: "
                f"fewer than {min_wells_per_line} wells, effect not estimated"
            )
    return grid - row[:, None] - column[None, :], notes


def edge_effect(profile: pd.DataFrame, feature: str, log_scale: bool) -> dict[str, float]:
    """Outer against inner wells, within treatments: the edge shift and its p-value.

    Least squares of the well value (natural log for positive features) on one mean per
    treatment plus an edge indicator, so treatments placed unevenly over the plate do not
    pose as an edge effect; edge_shift is the indicator's coefficient (log ratio or unit).
    """
    data = profile[(profile["excluded_by"] == "") & profile[feature].notna()]
    values = data[feature].to_numpy(float)
    if log_scale:
        values = np.log(np.where(values > 0, values, np.nan))
    finite = np.isfinite(values)
    data, values = data[finite], values[finite]
    edge = data["is_edge"].to_numpy(bool)
    result = {
        "feature": feature,
        "n_edge": int(edge.sum()),
        "n_inner": int((~edge).sum()),
        "edge_shift": np.nan,
        "p_value": np.nan,
    }
    codes = pd.factorize(data["treatment"])[0]
    design = np.column_stack([np.eye(codes.max() + 1)[codes], edge.astype(float)]) if len(codes) else np.empty((0, 1))
    residual_df = len(values) - np.linalg.matrix_rank(design) if len(values) else 0
    if edge.sum() < 2 or (~edge).sum() < 2 or residual_df < 2:
        return result
    coefficients, *_ = np.linalg.lstsq(design, values, rcond=None)
    residuals = values - design @ coefficients
    sigma2 = residuals @ residuals / residual_df
    covariance = sigma2 * np.linalg.pinv(design.T @ design)
    se = float(np.sqrt(covariance[-1, -1]))
    shift = float(coefficients[-1])
    if se > 0:
        result["p_value"] = float(2 * stats.t.sf(abs(shift / se), residual_df))
    result["edge_shift"] = shift
    return result


def _grid_values(profile: pd.DataFrame, values: np.ndarray, fmt: PlateFormat) -> np.ndarray:
    return well_grid(dict(zip(profile["well"], values)), fmt)


def _from_grid(profile: pd.DataFrame, grid: np.ndarray) -> np.ndarray:
    return grid[profile["row"].to_numpy() - 1, profile["column"].to_numpy() - 1]


def _median_polish_feature(profile: pd.DataFrame, feature: str, kept: np.ndarray, log_scale: bool, fmt: PlateFormat):
    """Replace ``feature`` by its row- and column-corrected values (originals kept as
    ``<feature>_uncorrected``, B-scores as ``<feature>_b_score``); return the correction's notes."""
    values = profile[feature].to_numpy(float)
    scaled = np.log(values) if log_scale else values
    grid = _grid_values(profile, np.where(kept, scaled, np.nan), fmt)
    # row and column effects are fitted on each well's departure from its treatment's median
    centred = pd.Series(np.where(kept, scaled, np.nan)).groupby(profile["treatment"].to_numpy()).transform("median")
    fit_grid = _grid_values(profile, np.where(kept, scaled - centred.to_numpy(), np.nan), fmt)
    corrected, notes = positional_correction(grid, fit_grid)
    corrected_values = np.where(kept, _from_grid(profile, corrected), scaled)
    profile[f"{feature}_uncorrected"] = values
    profile[feature] = np.exp(corrected_values) if log_scale else corrected_values
    profile[f"{feature}_b_score"] = _from_grid(profile, b_scores(grid))
    return notes


def correct_positions(
    profile: pd.DataFrame, features: list[str], kept: np.ndarray, wells: int, method: str
) -> tuple[list[dict], set[str]]:
    """The edge-effect diagnostic of every feature and, with ``method`` "median_polish", the
    positional correction applied in place to ``profile``; returns (edge rows, notes)."""
    fmt = plate_format(wells)
    edge_rows, notes = [], set()
    for feature in features:
        values = profile[feature].to_numpy(float)
        log_scale = bool(np.all(values[np.isfinite(values)] > 0))
        edge_rows.append(edge_effect(profile, feature, log_scale) | {"scale": "log" if log_scale else "linear"})
        if method == "median_polish":
            notes.update(_median_polish_feature(profile, feature, kept, log_scale, fmt))
            after = edge_effect(profile, feature, log_scale)
            edge_rows[-1] |= {"edge_shift_corrected": after["edge_shift"], "p_value_corrected": after["p_value"]}
    return edge_rows, notes
