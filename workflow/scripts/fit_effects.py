"""Rule fit_effects: the mixed-effects model for one chunk of features (chunks run in parallel)."""

import pandas as pd

from plateloom.io.job import run_step
from plateloom.io.tables import read_extra, write_parquet
from plateloom.screen.effects import fit_feature_effects

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    model_wells = pd.read_parquet(sm.input.model_wells)
    treatments = pd.read_parquet(sm.input.treatments)
    extra = read_extra(sm.input.model_wells)
    scales, notes = extra["scales"], extra.get("feature_notes", {})
    p = sm.params.settings
    parts = [
        fit_feature_effects(
            model_wells,
            feature,
            scales[feature],
            p["ci_level"],
            p["fitter"],
            treatments,
            notes.get(feature, ""),
            p["df_method"],
        )
        for feature in sm.params.features
    ]
    write_parquet(pd.concat(parts, ignore_index=True), sm.output.part, dict(p))


run_step(sm.log[0], step, "fit_effects")
