"""Planted-truth screens for calibration checks of the effects model (invented designs).

Log-scale well values y = effect(treatment) + u_batch + u_plate + e with batch SD 0.10, plate SD
0.05 and residual SD 0.08 (natural-log units), on designs that place treatments in the ways real
screens do: on every plate, on one plate per day, on a single plate, on the plates of two of three
days, or on whole plates without controls.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.screen.effects import fit_feature_effects

BATCH_SD, PLATE_SD, RESIDUAL_SD = 0.10, 0.05, 0.08


@dataclass(frozen=True)
class Placement:
    """Where one treatment sits: ``wells`` wells on each listed (batch, plate) index pair; on a
    whole plate when ``whole_plate``."""

    treatment: str
    plates: tuple[tuple[int, int], ...]
    wells: int = 4
    whole_plate: bool = False


def shared_plate_design(n_batches: int = 3, plates_per_batch: int = 2, controls: int = 8) -> pd.DataFrame:
    """3 days x 2 plates with controls on every plate and four test treatments placed:
    A on every plate, B on one plate per day, C on a single plate, D on both plates of two days."""
    every = tuple((b, p) for b in range(n_batches) for p in range(plates_per_batch))
    placements = [
        Placement("A", every),
        Placement("B", tuple((b, 0) for b in range(n_batches))),
        Placement("C", ((0, 1),)),
        Placement("D", tuple((b, p) for b in range(1, n_batches) for p in range(plates_per_batch))),
    ]
    return layout(n_batches, plates_per_batch, controls, placements)


def whole_plate_design(n_batches: int = 6, plates_per_batch: int = 2, controls: int = 16) -> pd.DataFrame:
    """``n_batches`` days x ``plates_per_batch`` plates: W fills the last plate of every day (no
    controls there), A shares the other plates with the negative controls."""
    shared = tuple((b, p) for b in range(n_batches) for p in range(plates_per_batch - 1))
    whole = tuple((b, plates_per_batch - 1) for b in range(n_batches))
    placements = [Placement("A", shared), Placement("W", whole, wells=controls + 4, whole_plate=True)]
    return layout(n_batches, plates_per_batch, controls, placements)


def layout(n_batches: int, plates_per_batch: int, controls: int, placements: list[Placement]) -> pd.DataFrame:
    """One row per well: batch, plate, role, treatment, condition, dose, dose_unit."""
    rows = []
    for b in range(n_batches):
        for p in range(plates_per_batch):
            here = [x for x in placements if (b, p) in x.plates]
            if not any(x.whole_plate for x in here):
                rows += [(f"d{b}", f"d{b}p{p}", "negative_control", "vehicle")] * controls
            for x in here:
                rows += [(f"d{b}", f"d{b}p{p}", "test", x.treatment)] * x.wells
    table = pd.DataFrame(rows, columns=["batch", "plate", "role", "treatment"])
    return table.assign(condition=table["treatment"], dose=np.nan, dose_unit="")


def simulate(design: pd.DataFrame, effects: dict[str, float], rng: np.random.Generator) -> np.ndarray:
    """Log-scale values of one screen on ``design`` with planted ``effects`` per treatment (0 if absent)."""
    batches = pd.factorize(design["batch"])[0]
    plates = pd.factorize(design["plate"])[0]
    u_batch = rng.normal(0, BATCH_SD, batches.max() + 1)
    u_plate = rng.normal(0, PLATE_SD, plates.max() + 1)
    planted = design["treatment"].map(effects).fillna(0.0).to_numpy()
    return planted + u_batch[batches] + u_plate[plates] + rng.normal(0, RESIDUAL_SD, len(design))


def coverage_runs(design: pd.DataFrame, effects: dict[str, float], n_screens: int, seed: int) -> pd.DataFrame:
    """Fit ``n_screens`` simulated screens; one row per screen and treatment with the interval,
    df, p-value, whether the interval covers the planted effect, and the fitted ICC."""
    rng = np.random.default_rng(seed)
    rows = []
    for screen in range(n_screens):
        wells = design.assign(value=simulate(design, effects, rng))
        fit = fit_feature_effects(wells, "value", "log", 0.95)
        planted = fit["treatment"].map(effects).fillna(0.0)
        rows.append(
            fit[["treatment", "estimate", "ci_low", "ci_high", "df", "p_value", "icc_batch_plate"]].assign(
                screen=screen, covered=(fit["ci_low"] <= planted) & (planted <= fit["ci_high"])
            )
        )
    return pd.concat(rows, ignore_index=True)


TRUE_ICC = (BATCH_SD**2 + PLATE_SD**2) / (BATCH_SD**2 + PLATE_SD**2 + RESIDUAL_SD**2)


def count_screen(rng: np.random.Generator, control_count: float, log_ratio: float, n_sites: int = 4) -> pd.DataFrame:
    """Well profiles of a planted count screen: 3 days x 2 plates, 16 control and 4 treated wells
    per plate; nuclei per site ~ Poisson(mu x lognormal well factor), mu = ``control_count`` x
    exp(``log_ratio``) for the treated wells and batch/plate factors as above. The
    min_cells_per_well rule (5 nuclei per site) is applied as the plate stage would."""
    rows = []
    for b in range(3):
        u_batch = rng.normal(0, BATCH_SD)
        for p in range(2):
            u_plate = rng.normal(0, PLATE_SD)
            for w in range(20):
                treated = w % 5 == 4
                mu = control_count * np.exp(u_batch + u_plate + rng.normal(0, RESIDUAL_SD) + log_ratio * treated)
                count = rng.poisson(mu, n_sites).mean()
                rows.append(
                    (f"d{b}", f"d{b}p{p}", f"W{w:02d}", "test" if treated else "negative_control",
                     "X" if treated else "vehicle", count, n_sites)
                )  # fmt: skip
    table = pd.DataFrame(rows, columns=["batch", "plate", "well", "role", "treatment", "cell_count", "n_sites"])
    excluded = np.where(table["cell_count"] < 5, "min_cells_per_well: below 5", "")
    return table.assign(condition=table["treatment"], dose=np.nan, dose_unit="", excluded_by=excluded)
