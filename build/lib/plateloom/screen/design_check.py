"""Design check: simulate the screen's own design to learn the coverage and power of its intervals.

For a design (which wells of which treatment sit on which plate of which batch) and variance
components on the model scale (batch, plate within batch, residual), screens are simulated as

    y = effect * [treated] + u_batch + u_plate + e

and fitted by the same effects model as the real screen. Coverage is the share of CIs that hold
the planted effect; power is the share of treatments whose p-value is below ``alpha``. Extra
batches copy the layout of the first batch, which answers "do we need more imaging days?".
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.screen.effects import fit_feature_effects

DESIGN_COLUMNS = ["batch", "plate", "role", "treatment", "condition", "dose", "dose_unit"]


@dataclass(frozen=True)
class VarianceComponents:
    """Variances on the model scale (natural-log units squared for log-scale features)."""

    batch: float
    plate: float
    residual: float


def extend_design(design: pd.DataFrame, extra_batches: int) -> pd.DataFrame:
    """The design plus ``extra_batches`` copies of its first batch (new batch and plate names)."""
    design = design[DESIGN_COLUMNS].reset_index(drop=True)
    first = design[design["batch"] == sorted(design["batch"].unique())[0]]
    copies = [
        first.assign(batch=f"extra{k + 1}", plate=first["plate"].astype(str) + f"-extra{k + 1}")
        for k in range(extra_batches)
    ]
    return pd.concat([design, *copies], ignore_index=True)


def simulate_values(
    design: pd.DataFrame, components: VarianceComponents, effect: float, rng: np.random.Generator
) -> np.ndarray:
    """One simulated screen on ``design``: every non-control treatment has the same ``effect``."""
    batches = pd.factorize(design["batch"])[0]
    plates = pd.factorize(design["batch"].astype(str) + "\x00" + design["plate"].astype(str))[0]
    batch_effects = rng.normal(0.0, np.sqrt(components.batch), batches.max() + 1)
    plate_effects = rng.normal(0.0, np.sqrt(components.plate), plates.max() + 1)
    treated = (design["role"] != "negative_control").to_numpy()
    noise = rng.normal(0.0, np.sqrt(components.residual), len(design))
    return effect * treated + batch_effects[batches] + plate_effects[plates] + noise


def simulate_design(
    design: pd.DataFrame,
    components: VarianceComponents,
    effect: float,
    n_screens: int,
    seed: int,
    ci_level: float = 0.95,
    alpha: float = 0.05,
    fitter: str = "exact",
) -> pd.DataFrame:
    """Simulate ``n_screens`` screens; one row per screen and treatment with estimate, CI and coverage."""
    rng = np.random.default_rng(seed)
    design = design[DESIGN_COLUMNS].reset_index(drop=True)
    rows = []
    for screen in range(n_screens):
        wells = design.assign(value=simulate_values(design, components, effect, rng))
        fit = fit_feature_effects(wells, "value", "linear", ci_level, fitter)
        rows.append(fit[["treatment", "estimate", "ci_low", "ci_high", "p_value", "converged"]].assign(screen=screen))
    table = pd.concat(rows, ignore_index=True)
    table["covered"] = (table["ci_low"] <= effect) & (effect <= table["ci_high"])
    table["detected"] = table["p_value"] < alpha
    return table


def summarise_simulation(table: pd.DataFrame, label: str, n_batches: int, effect: float) -> dict:
    """Coverage and power of one simulated design, with the Monte Carlo standard error of the coverage.

    Intervals of one screen share its controls, so the standard error is taken over screens
    (standard deviation of the per-screen coverage / sqrt(screens)), not over intervals.
    """
    coverage = float(table["covered"].mean())
    per_screen = table.groupby("screen")["covered"].mean()
    n_screens = len(per_screen)
    se = float(per_screen.std(ddof=1) / np.sqrt(n_screens)) if n_screens > 1 else np.nan
    return {
        "design": label,
        "n_batches": n_batches,
        "effect": effect,
        "n_screens": n_screens,
        "n_intervals": len(table),
        "coverage": coverage,
        "coverage_mc_se": se,
        "power": float(table["detected"].mean()),
        "converged_share": float(table["converged"].mean()),
        "mean_ci_width": float((table["ci_high"] - table["ci_low"]).mean()),
    }


def design_check(
    design: pd.DataFrame,
    components: VarianceComponents,
    effect: float,
    n_screens: int,
    extra_batches: list[int],
    seed: int,
    ci_level: float = 0.95,
) -> pd.DataFrame:
    """Coverage and power for the design as imaged and with each number of extra batches."""
    if (design["role"] == "negative_control").sum() == 0 or design["treatment"].nunique() < 2:
        raise ValueError("design check needs negative controls and at least one other treatment")
    results = []
    for extra in sorted(set([0, *extra_batches])):
        extended = extend_design(design, extra)
        table = simulate_design(extended, components, effect, n_screens, seed + extra, ci_level)
        label = "as imaged" if extra == 0 else f"+{extra} batch{'es' if extra > 1 else ''}"
        results.append(summarise_simulation(table, label, extended["batch"].nunique(), effect))
    return pd.DataFrame(results)


def components_from_effects(effects: pd.DataFrame, feature: str) -> VarianceComponents:
    """Variance components of one feature's fitted screen model (first converged row)."""
    rows = effects[(effects["feature"] == feature) & effects["converged"]]
    if rows.empty:
        raise ValueError(
            f"design check: feature {feature!r} has no converged fit in the effects table; "
            "choose another screen.design_check.feature or give variance components in config"
        )
    first = rows.iloc[0]
    return VarianceComponents(
        float(first["batch_variance"]), float(first["plate_variance"]), float(first["residual_variance"])
    )
