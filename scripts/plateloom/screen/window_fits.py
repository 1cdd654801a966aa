"""The endpoint model in every time window of one feature, with what windows share done once.

The windows of a time course hold the same wells, so the design (treatment codes, batches,
plates), the treatment catalogue, the counts and the notes about the design are the same in every
window; only the response changes. This path fits the first window exactly as the endpoint does
(``fit_feature_effects``: it is the template of every window's rows), forms the group sums of all
windows' responses at once (``plateloom.screen.reml``: one pass over the wells), and then, per
window, runs the REML optimisation (started from the previous window's variance ratios), the
Satterthwaite df and the columns that depend on the response. It gives the endpoint path's rows
(checked equal in ``tests/test_kinetics.py``) and is used only where that path would fit the
exact REML model with Satterthwaite df to every window; anything else (another fitter or df
method, the weighted cell count, wells that differ between windows, a fit that falls back) goes
through ``fit_feature_effects`` window by window.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

from plateloom.columns import REFERENCE_ROLE
from plateloom.screen.batch_correction import COUNT_FEATURE
from plateloom.screen.denominator_df import satterthwaite_df
from plateloom.screen.effects import (
    DF_METHOD_NAMES,
    design_note,
    fit_feature_effects,
    join_notes,
    model_data,
    pooled_control_sd,
    row_note,
    treatment_codes,
    treatment_counts,
    with_ratios,
)
from plateloom.screen.nested_fit import BOUNDARY_SHARE, treatment_design
from plateloom.screen.reml import ExactNestedFit, GroupSums, fit_nested_exact, group_sums, window_sums

EXACT_METHOD = "REML mixed model (exact)"


def _model_mask(part: pd.DataFrame, feature: str) -> np.ndarray:
    """The rows ``model_data`` keeps: finite values, and not kept for the cell count only."""
    keep = np.isfinite(part[feature].to_numpy(float))
    if "count_only" in part.columns and feature != COUNT_FEATURE:
        keep &= ~part["count_only"].to_numpy(bool)
    return keep


def aligned_windows(parts: list[pd.DataFrame]) -> bool:
    """Whether every window holds the same wells (plate, well) in the same order."""
    keys = parts[0][["plate", "well"]].to_numpy(object)
    return all(len(part) == len(keys) and np.array_equal(part[["plate", "well"]].to_numpy(object), keys)
               for part in parts[1:])  # fmt: skip


def _same_model_rows(parts: list[pd.DataFrame], feature: str) -> np.ndarray | None:
    """The rows in the model, if they are the same in every window; else None."""
    mask = _model_mask(parts[0], feature)
    return mask if all(np.array_equal(_model_mask(part, feature), mask) for part in parts[1:]) else None


def _window_columns(
    fit: ExactNestedFit, terms: np.ndarray, ci_level: float, nested: bool, one_batch: bool
) -> dict[str, object]:
    """The response-dependent columns of one window's rows (``terms``: each row's design column, -1
    for a treatment with no wells in the model)."""
    df_all = satterthwaite_df(fit.sums, fit.variance_parameters, np.eye(len(fit.params)))
    has = terms >= 0
    pick = np.where(has, terms, 0)
    estimate = np.where(has, fit.params[pick], np.nan)
    error = np.where(has, fit.std_errors[pick], np.nan)
    df = np.where(has, df_all[pick], np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        t_value = np.where(error > 0, estimate / error, np.nan)
        quantile = np.where(np.isfinite(df), stats.t.ppf(0.5 + ci_level / 2, df), np.nan)
        p_value = np.where(np.isfinite(t_value), 2 * stats.t.sf(np.abs(t_value), df), np.nan)
    batch, plate = fit.batch_variance, fit.plate_variance if nested else 0.0
    if one_batch:
        batch, plate = 0.0, fit.batch_variance
    total = np.nansum([batch, plate, fit.residual_variance])
    return {
        "estimate": estimate,
        "std_error": error,
        "df": df,
        "df_method": np.where(np.isfinite(df), DF_METHOD_NAMES["satterthwaite"], ""),
        "ci_low": estimate - quantile * error,
        "ci_high": estimate + quantile * error,
        "t_value": t_value,
        "p_value": p_value,
        "batch_variance": batch,
        "plate_variance": plate,
        "residual_variance": fit.residual_variance,
        "icc_batch_plate": (batch + plate) / total if total > 0 else np.nan,
    }


@dataclass(frozen=True)
class _SharedDesign:
    """What every window of one feature shares: the first window's rows (the template), the design
    and its groups, the group sums of all windows' responses, each row's design column (-1: no
    wells), its treatment's counts and the note about the design."""

    template: pd.DataFrame
    design: np.ndarray
    groups: np.ndarray
    plate: np.ndarray
    nested: bool
    n_batches: int
    responses: np.ndarray  # wells x windows
    sums: GroupSums
    terms: np.ndarray
    row_counts: list
    note: str
    controls: np.ndarray


def _shared_design(template: pd.DataFrame, parts: list[pd.DataFrame], feature: str, mask: np.ndarray) -> _SharedDesign:
    data, n_not_finite = model_data(parts[0], feature)
    data["code"], mapping = treatment_codes(data["treatment"])
    batch = pd.factorize(data["batch"], sort=True)[0]
    plate = pd.factorize(data["plate"], sort=True)[0]
    n_batches, n_plates = int(batch.max()) + 1, int(plate.max()) + 1
    nested = n_batches >= 2 and n_plates > n_batches
    design, names = treatment_design(data["code"])
    responses = np.column_stack([part[feature].to_numpy(float)[mask] for part in parts])
    groups = batch if n_batches >= 2 else plate
    position = {name: i for i, name in enumerate(names)}
    codes = template["treatment"].map(mapping)
    counts = treatment_counts(data)
    return _SharedDesign(
        template,
        design,
        groups,
        plate,
        nested,
        n_batches,
        responses,
        group_sums(responses, design, groups, plate if nested else None),
        np.array([position.get(f"C(code)[T.{c}]", -1) if isinstance(c, str) else -1 for c in codes]),
        [counts.loc[c] if isinstance(c, str) and c in counts.index else None for c in codes],
        design_note(data, n_not_finite),
        (data["treatment"] == REFERENCE_ROLE).to_numpy(),
    )


def _window_table(shared: _SharedDesign, fit: ExactNestedFit, column: int, scale: str, ci_level: float) -> pd.DataFrame:
    """One window's rows: the template with the response-dependent columns of ``fit`` and the notes."""
    total = fit.batch_variance + fit.plate_variance + fit.residual_variance
    boundary = min(fit.batch_variance, fit.plate_variance if shared.nested else np.inf) < BOUNDARY_SHARE * total
    note = join_notes(
        shared.note,
        "one batch only: random intercept per plate" if shared.n_batches < 2 else "",
        "a variance component was estimated at zero (singular fit)" if boundary else "",
    )
    table = shared.template.copy()
    one_batch = shared.n_batches < 2
    for name, values in _window_columns(fit, shared.terms, ci_level, shared.nested, one_batch).items():
        table[name] = values
    table["control_well_sd"] = pooled_control_sd(shared.responses[:, column], shared.controls, shared.plate)
    table["note"] = [row_note(count, shared.n_batches, note) for count in shared.row_counts]
    return with_ratios(table, scale)


def shared_window_effects(
    parts: list[pd.DataFrame],
    feature: str,
    scale: str,
    settings: tuple[float, str, str],
    treatments: pd.DataFrame | None = None,
    aligned: bool | None = None,
) -> list[pd.DataFrame] | None:
    """``fit_feature_effects`` of each window's wells (``parts``, in window order), one table per
    window; None where this path does not apply (see the module's docstring). ``settings``: CI
    level, fitter, df method; ``aligned``: ``aligned_windows(parts)`` if already known."""
    ci_level, fitter, df_method = settings
    if fitter != "exact" or df_method != "satterthwaite" or feature == COUNT_FEATURE or len(parts) < 2:
        return None
    mask = _same_model_rows(parts, feature) if (aligned_windows(parts) if aligned is None else aligned) else None
    if mask is None:
        return None
    template = fit_feature_effects(parts[0], feature, scale, ci_level, fitter, treatments, "", df_method)
    if not (template["method"] == EXACT_METHOD).all():
        return None
    shared = _shared_design(template, parts, feature, mask)
    if np.any(np.nanstd(shared.responses, axis=0) == 0):
        return None
    plates = shared.plate if shared.nested else None
    tables, start = [template], None
    for column in range(1, len(parts)):
        response, sums = shared.responses[:, column], window_sums(shared.sums, column)
        fit = fit_nested_exact(response, shared.design, shared.groups, plates, sums=sums, start=start)
        if not fit.converged:
            return None
        start = fit.variance_parameters[:-1]
        tables.append(_window_table(shared, fit, column, scale, ci_level))
    return tables
