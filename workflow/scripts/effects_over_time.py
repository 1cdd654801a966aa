"""Rule effects_over_time: the endpoint model per time window, simultaneous bands, kinetic summary."""

import pandas as pd

from plateloom.io.job import run_step
from plateloom.io.tables import csv_text, read_extra, write_parquet, write_text
from plateloom.screen.hits import HitRule
from plateloom.screen.kinetics import (
    ModelChoices,
    area_effects,
    effects_over_time,
    kinetic_features,
    kinetic_summary,
    model_time_courses,
)

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    p = sm.params.settings
    courses = pd.concat([pd.read_parquet(path) for path in sm.input.time_courses], ignore_index=True)
    treatments = pd.read_parquet(sm.input.treatments)
    scales = read_extra(sm.input.model_wells)["scales"]
    features = kinetic_features(p["kinetic_features"], [f for f in p["features"] if f in scales], list(courses.columns))
    rule = HitRule(p["hit_q_value"], p["hit_min_log_ratio"], p["hit_min_standardized_effect"])
    choices = ModelChoices(p["ci_level"], p["fitter"], p["df_method"], rule)
    rows = model_time_courses(courses, features, scales)
    effects = effects_over_time(rows, features, scales, choices, treatments)
    summary = kinetic_summary(
        effects, area_effects(rows, features, choices, treatments), p["hit_q_value"], p["onset_windows"]
    )
    write_parquet(effects, sm.output.effects, dict(p))
    write_text(csv_text(effects), sm.output.effects_csv)
    write_parquet(summary, sm.output.summary, dict(p))
    write_text(csv_text(summary), sm.output.summary_csv)


run_step(sm.log[0], step, "effects_over_time")
