"""Rule design_check: coverage and power of the screen's own design, simulated with its fitted variances."""

import pandas as pd

from plateloom.io.job import run_step
from plateloom.io.tables import csv_text, write_parquet, write_text
from plateloom.screen.design_check import components_from_effects, design_check

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    model_wells = pd.read_parquet(sm.input.model_wells)
    effects = pd.read_parquet(sm.input.effects)
    p = sm.params.settings
    c = p["design_check"]
    components = components_from_effects(effects, c["feature"])
    table = design_check(
        model_wells,
        components,
        float(c["effect_log_ratio"]),
        int(c["n_screens"]),
        list(c["extra_batches"]),
        int(c["seed"]),
        p["ci_level"],
    )
    table = table.assign(
        feature=c["feature"],
        batch_variance=components.batch,
        plate_variance=components.plate,
        residual_variance=components.residual,
    )
    write_parquet(table, sm.output.parquet, dict(p))
    write_text(csv_text(table), sm.output.csv)


run_step(sm.log[0], step, "design_check")
