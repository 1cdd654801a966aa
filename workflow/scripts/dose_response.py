"""Rule dose_response: four-parameter logistic fits per compound and feature, EC50 with CI."""

import pandas as pd

from plateloom.io.job import run_step
from plateloom.io.tables import csv_text, read_extra, write_parquet, write_text
from plateloom.screen.dose_response import dose_response_table

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    model_wells = pd.read_parquet(sm.input.model_wells)
    scales = read_extra(sm.input.model_wells)["scales"]
    p = sm.params.settings
    missing = [f for f in p["dose_response_features"] if f not in scales]
    if missing:
        raise ValueError(f"screen.dose_response.features {missing} are not among screen.features; add them there")
    fits, points = dose_response_table(
        model_wells, list(p["dose_response_features"]), scales, int(p["dose_response_min_doses"]), p["ci_level"]
    )
    write_parquet(fits, sm.output.parquet, dict(p))
    write_text(csv_text(fits), sm.output.csv)
    write_parquet(points, sm.output.points, dict(p))


run_step(sm.log[0], step, "dose_response")
