"""Rule correct_batches: wells in the model, features on their model scale, batch-correction diagnostics."""

import pandas as pd

from plateloom.io.job import run_step
from plateloom.io.tables import write_parquet
from plateloom.screen.model_wells import build_model_wells, treatment_catalogue

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    wells = pd.concat([pd.read_parquet(path) for path in sm.input.wells], ignore_index=True)
    p = sm.params.settings
    model = build_model_wells(
        wells, list(p["features"]), set(p["log_features"]), p["batch_correction"], p["model_on_corrected_values"]
    )
    extra = {
        "scales": model.scales,
        "notes": model.notes,
        "feature_notes": model.feature_notes,
        "design_warnings": model.design_warnings,
    }
    write_parquet(model.wells, sm.output.model_wells, dict(p), extra=extra)
    write_parquet(treatment_catalogue(wells), sm.output.treatments, dict(p))
    write_parquet(model.variance, sm.output.variance, dict(p))
    write_parquet(model.components, sm.output.components, dict(p))


run_step(sm.log[0], step, "correct_batches")
