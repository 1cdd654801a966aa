"""Rule screen_effects: mixed-effects condition effects for every feature, BH q-values, hits."""
import pandas as pd

from plateloom.effects import screen_effects
from plateloom.steps import run_step
from plateloom.tables import write_parquet, write_text

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    wells = pd.concat([pd.read_parquet(path) for path in sm.input.wells], ignore_index=True)
    p = sm.params.settings
    effects = screen_effects(wells, list(p["features"]), set(p["log_features"]), p["ci_level"], p["hit_q_value"],
                             p["hit_min_log_ratio"])
    write_parquet(effects, sm.output.parquet, dict(p))
    write_text(effects.to_csv(index=False, float_format="%.6g"), sm.output.csv)


run_step(sm.log[0], step, "screen_effects")
