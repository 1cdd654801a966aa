"""Rule fate_effects: division and death rate ratios, death hazard ratios, survival curves, GR."""

import numpy as np
import pandas as pd

from plateloom.io.job import run_step
from plateloom.io.tables import csv_text, write_parquet, write_text
from plateloom.plate.summaries import read_plate_dataset
from plateloom.screen.fate_effects import (
    fate_effects,
    gr_fits,
    gr_values_per_treatment,
    kept_wells,
    survival_curves,
    track_lives,
)

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    p = sm.params.settings
    wells = kept_wells(pd.concat([pd.read_parquet(path) for path in sm.input.wells], ignore_index=True))
    tracks = read_plate_dataset(list(sm.input.tracks), ["plate", "well", "start_min", "end_min", "end_event"])
    lives = track_lives(tracks, wells)
    level = float(p["ci_level"])
    effects = fate_effects(wells, lives, level)
    write_parquet(effects, sm.output.effects, dict(p))
    write_text(csv_text(effects), sm.output.csv)
    times = np.unique(np.concatenate([lives["entry_min"], lives["exit_min"]]))
    write_parquet(survival_curves(lives, times, level), sm.output.survival, dict(p))
    growth = gr_values_per_treatment(wells, level)
    write_parquet(growth, sm.output.growth, dict(p))
    write_text(csv_text(growth), sm.output.growth_csv)
    write_parquet(gr_fits(growth, level), sm.output.gr_curves, dict(p))


run_step(sm.log[0], step, "fate_effects")
