"""The screen stage in pure functions: wells in the model, batch correction, diagnostics, feature chunks."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.columns import ANALYSED_ROLES
from plateloom.screen.batch_correction import (
    batches_without_controls,
    correct_batches,
    model_scale,
    principal_components,
    variance_shares,
)

KEY_COLUMNS = [
    "plate",
    "batch",
    "well",
    "row",
    "column",
    "is_edge",
    "role",
    "condition",
    "dose",
    "dose_unit",
    "treatment",
]


@dataclass(frozen=True)
class ModelWells:
    """Wells in the model with batch-corrected model-scale features, and the diagnostics of the correction."""

    wells: pd.DataFrame  # KEY_COLUMNS + one column per feature (model scale, corrected)
    scales: dict[str, str]  # feature -> "log" | "linear"
    variance: pd.DataFrame  # feature, stage (before/after), batch_share, plate_share, residual_share
    components: pd.DataFrame  # plate, well, batch, stage, pc1, pc2, pc1_share, pc2_share
    notes: list[str]  # what the correction could not do, for the report


def build_model_wells(wells: pd.DataFrame, features: list[str], log_features: set[str], method: str) -> ModelWells:
    """Select the wells of the model, put features on their model scale and correct batches by ``method``."""
    missing = [f for f in features if f not in wells.columns]
    if missing:
        raise ValueError(f"features {missing} are not columns of the well profiles; check screen.features in config")
    required = [c for c in ("plate", "batch", "well", "role", "treatment") if c not in wells.columns]
    if required:
        raise ValueError(f"well profiles lack columns {required}")
    kept = wells[in_model(wells)].sort_values(["batch", "plate", "well"]).reset_index(drop=True)
    if kept.empty:
        raise ValueError(
            "no well is left in the screen model: every well or plate was excluded "
            "(see the exclusion ledger in the plate reports)"
        )
    if not (kept["role"] == "negative_control").any():
        raise ValueError(
            "no negative-control well is left in the screen model; check the layouts' role column "
            "and the exclusion ledger"
        )
    values, scales = model_scale(kept, features, log_features)
    is_control = (kept["role"] == "negative_control").to_numpy()
    treatment = np.where(is_control, "negative_control", kept["treatment"])
    corrected = correct_batches(values, kept["batch"].to_numpy(), is_control, treatment, method)
    notes = [
        f"batch {name} has no negative-control well left in the model: it was not aligned "
        "(its effects still come from within-plate contrasts where its plates have controls; check the ledger)"
        for name in batches_without_controls(kept["batch"].to_numpy(), is_control)
        if method in ("control_location", "control_location_scale")
    ]
    diagnostics_v, diagnostics_pc = [], []
    for stage, table in (("before", values), ("after", corrected)):
        shares = variance_shares(table, kept["batch"].to_numpy(), kept["plate"].to_numpy(), treatment)
        diagnostics_v.append(shares.assign(stage=stage))
        scores, explained = principal_components(table, 2)
        diagnostics_pc.append(
            kept[["plate", "well", "batch"]].assign(
                stage=stage, pc1=scores[:, 0], pc2=scores[:, 1], pc1_share=explained[0], pc2_share=explained[1]
            )
        )
    model = pd.concat([kept[[c for c in KEY_COLUMNS if c in kept]], corrected], axis=1)
    return ModelWells(
        model, scales, pd.concat(diagnostics_v, ignore_index=True), pd.concat(diagnostics_pc, ignore_index=True), notes
    )


def in_model(wells: pd.DataFrame) -> pd.Series:
    """Wells that enter the screen model: kept, on a kept plate, with a role the model uses."""
    plate_kept = wells["plate_excluded_by"] == "" if "plate_excluded_by" in wells else True
    return (wells["excluded_by"] == "") & plate_kept & wells["role"].isin(list(ANALYSED_ROLES))


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
