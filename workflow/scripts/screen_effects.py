"""Rule screen_effects: all feature chunks together, BH q-values over every (feature, test treatment), hit calls."""

import pandas as pd

from plateloom.io.job import run_step
from plateloom.io.tables import csv_text, write_parquet, write_text
from plateloom.screen.hits import HitRule, add_hit_calls

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    table = pd.concat([pd.read_parquet(path) for path in sm.input.parts], ignore_index=True)
    p = sm.params.settings
    rule = HitRule(p["hit_q_value"], p["hit_min_log_ratio"], p["hit_min_standardized_effect"])
    effects = add_hit_calls(table, rule)
    write_parquet(effects, sm.output.parquet, dict(p))
    write_text(csv_text(effects), sm.output.csv)


run_step(sm.log[0], step, "screen_effects")
