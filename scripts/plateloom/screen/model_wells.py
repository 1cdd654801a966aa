"""The screen stage in pure functions: wells in the model, their model scale, batch-correction
diagnostics, feature chunks."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.columns import ANALYSED_ROLES, KEY_COLUMNS
from plateloom.screen.batch_correction import (
    COUNT_FEATURE,
    batches_without_controls,
    correct_batches,
    model_scale,
    principal_components,
    variance_shares,
)
from plateloom.screen.design_warnings import design_warnings


@dataclass(frozen=True)
class ModelWells:
    """Wells in the model with model-scale features, and the diagnostics of the batch correction."""

    wells: pd.DataFrame  # KEY_COLUMNS + n_sites, count_only + one column per feature (model scale)
    scales: dict[str, str]  # feature -> "log" | "linear"
    variance: pd.DataFrame  # feature, stage (before/after), batch_share, plate_share, residual_share
    components: pd.DataFrame  # plate, well, batch, stage, pc1, pc2, pc1_share, pc2_share
    notes: list[str]  # what the correction could not do, for the report
    feature_notes: dict[str, str]  # feature -> how its scale or wells were decided
    design_warnings: list[str]  # what the design itself cannot tell (plateloom.screen.design_warnings)


def _selected_wells(wells: pd.DataFrame, features: list[str]) -> tuple[pd.DataFrame, np.ndarray]:
    """The wells of the model (and, with the cell count among the features, those kept for it
    alone), and which of them are kept for the cell count only."""
    missing = [f for f in features if f not in wells.columns]
    if missing:
        raise ValueError(f"features {missing} are not columns of the well profiles; check screen.features in config")
    required = [c for c in ("plate", "batch", "well", "role", "treatment") if c not in wells.columns]
    if required:
        raise ValueError(f"well profiles lack columns {required}")
    counted = count_only(wells) if COUNT_FEATURE in features else pd.Series(False, index=wells.index)
    kept = wells[in_model(wells) | counted].sort_values(["batch", "plate", "well"]).reset_index(drop=True)
    only_counts = count_only(kept).to_numpy() if COUNT_FEATURE in features else np.zeros(len(kept), bool)
    analysed = kept[~only_counts]
    if analysed.empty:
        raise ValueError(
            "no well is left in the screen model: every well or plate was excluded "
            "(see the exclusion ledger in the plate reports)"
        )
    if not (analysed["role"] == "negative_control").any():
        raise ValueError(
            "no negative-control well is left in the screen model; check the layouts' role column "
            "and the exclusion ledger"
        )
    return kept, only_counts


def _diagnostics(values: pd.DataFrame, corrected: pd.DataFrame, analysed: pd.DataFrame, treatment: np.ndarray):
    """Variance shares and principal components of the analysed wells before and after correction."""
    shares, components = [], []
    for stage, table in (("before", values), ("after", corrected)):
        shares.append(
            variance_shares(table, analysed["batch"].to_numpy(), analysed["plate"].to_numpy(), treatment).assign(
                stage=stage
            )
        )
        scores, explained = principal_components(table, 2)
        components.append(
            analysed[["plate", "well", "batch"]].assign(
                stage=stage, pc1=scores[:, 0], pc2=scores[:, 1], pc1_share=explained[0], pc2_share=explained[1]
            )
        )
    return pd.concat(shares, ignore_index=True), pd.concat(components, ignore_index=True)


def build_model_wells(
    wells: pd.DataFrame, features: list[str], log_features: set[str], method: str, model_on_corrected: bool = False
) -> ModelWells:
    """Select the wells of the model, put features on their model scale and correct batches by ``method``.

    The model is fitted on the uncorrected model-scale values (the batch random intercept absorbs
    day shifts, and the variance components stay honest) unless ``model_on_corrected``; the
    correction always feeds the diagnostics (variance shares, principal components). Wells
    excluded only by the min_cells_per_well rule stay in the table for the cell count alone
    (``count_only``): leaving them out would truncate the very feature the rule is built on.
    """
    kept, only_counts = _selected_wells(wells, features)
    values, scales, feature_notes = model_scale(kept, features, log_features)
    values.loc[only_counts, [f for f in features if f != COUNT_FEATURE]] = np.nan
    if only_counts.any():
        kept_note = f"{int(only_counts.sum())} wells below min_cells_per_well kept for the cell count only"
        feature_notes[COUNT_FEATURE] = "; ".join(n for n in (feature_notes.get(COUNT_FEATURE, ""), kept_note) if n)
    analysed = kept[~only_counts]
    is_control = (analysed["role"] == "negative_control").to_numpy()
    treatment = np.where(is_control, "negative_control", analysed["treatment"])
    corrected = correct_batches(values[~only_counts], analysed["batch"].to_numpy(), is_control, treatment, method)
    notes = [
        f"batch {name} has no negative-control well left in the model: it was not aligned "
        "(its effects still come from within-plate contrasts where its plates have controls; check the ledger)"
        for name in batches_without_controls(analysed["batch"].to_numpy(), is_control)
        if method in ("control_location", "control_location_scale")
    ]
    variance, components = _diagnostics(values[~only_counts], corrected, analysed, treatment)
    modelled = values.copy()
    if model_on_corrected:
        modelled.loc[~only_counts] = corrected
    keys = kept[[c for c in KEY_COLUMNS if c in kept]].assign(
        n_sites=kept["n_sites"] if "n_sites" in kept else 1, count_only=only_counts
    )
    return ModelWells(
        pd.concat([keys, modelled], axis=1), scales, variance, components, notes, feature_notes, design_warnings(kept)
    )


def in_model(wells: pd.DataFrame) -> pd.Series:
    """Wells that enter the screen model: kept, on a kept plate, with a role the model uses."""
    plate_kept = wells["plate_excluded_by"] == "" if "plate_excluded_by" in wells else True
    return (wells["excluded_by"] == "") & plate_kept & wells["role"].isin(list(ANALYSED_ROLES))


def count_only(wells: pd.DataFrame) -> pd.Series:
    """Wells excluded by the min_cells_per_well rule and nothing else, on a plate with a negative
    control in the model (a plate with no usable well is an imaging failure, not a count of 0):
    kept for the cell count only."""
    plate_kept = wells["plate_excluded_by"] == "" if "plate_excluded_by" in wells else True
    reasons = wells["excluded_by"].fillna("").astype(str)
    only_min_cells = reasons.str.startswith("min_cells_per_well") & ~reasons.str.contains(";", regex=False)
    working = wells.loc[in_model(wells) & (wells["role"] == "negative_control"), "plate"]
    return only_min_cells & plate_kept & wells["role"].isin(list(ANALYSED_ROLES)) & wells["plate"].isin(working)


def treatment_catalogue(wells: pd.DataFrame) -> pd.DataFrame:
    """Every treatment of the screen (all wells, excluded or not): treatment, condition, dose, dose_unit, role."""
    used = wells[wells["role"].isin(list(ANALYSED_ROLES))]
    return (
        used.drop_duplicates("treatment")[["treatment", "condition", "dose", "dose_unit", "role"]]
        .sort_values("treatment")
        .reset_index(drop=True)
    )


def feature_chunks(features: list[str], per_chunk: int) -> list[list[str]]:
    """Consecutive groups of at most ``per_chunk`` features, one effects job each."""
    if per_chunk < 1:
        raise ValueError(f"screen.features_per_job must be at least 1, got {per_chunk}")
    return [features[i : i + per_chunk] for i in range(0, len(features), per_chunk)]
