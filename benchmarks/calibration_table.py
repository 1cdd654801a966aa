"""Calibration table of the effects model: coverage, false positives and CI width per design.

Simulates planted-truth screens (tests/calibration.py: batch SD 0.10, plate SD 0.05, residual SD
0.08 on the log scale) and fits each twice: as plateloom does now (uncorrected values, per-contrast
Satterthwaite df) and as it did before (batch-corrected values, one between-within df for every
contrast). Prints one row per (design, treatment, method); the cell-count rows compare the
Poisson precision weights with one residual variance, by control count per site.

    python benchmarks/calibration_table.py [screens] [--counts-only]
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))

from calibration import count_screen, shared_plate_design, simulate, whole_plate_design  # noqa: E402

from plateloom.screen.effects import fit_feature_effects  # noqa: E402
from plateloom.screen.model_wells import build_model_wells  # noqa: E402


def _between_within(fit: pd.DataFrame, wells: pd.DataFrame) -> pd.DataFrame:
    """The old interval: the same estimate and SE with df = wells - plates - (treatments - 1)."""
    df = len(wells) - wells["plate"].nunique() - (wells["treatment"].nunique() - 1)
    half = stats.t.ppf(0.975, df) * fit["std_error"]
    return fit.assign(df=df, ci_low=fit["estimate"] - half, ci_high=fit["estimate"] + half,
                      p_value=2 * stats.t.sf(np.abs(fit["estimate"] / fit["std_error"]), df))  # fmt: skip


def design_rows(name: str, design: pd.DataFrame, planted: dict[str, float], n_screens: int) -> list[dict]:
    rng = np.random.default_rng(2026)
    fits = {"now": [], "before": []}
    for _ in range(n_screens):
        wells = design.assign(value=simulate(design, planted, rng), well="w", excluded_by="")
        fits["now"].append(fit_feature_effects(wells, "value", "log", 0.95))
        corrected = build_model_wells(wells, ["value"], {"value"}, "control_location", model_on_corrected=True)
        old = fit_feature_effects(corrected.wells.assign(value=corrected.wells["value"]), "value", "linear", 0.95)
        fits["before"].append(_between_within(old, wells))
    rows = []
    for method, parts in fits.items():
        table = pd.concat(parts, ignore_index=True)
        truth = table["treatment"].map(planted).fillna(0.0)
        table["covered"] = (table["ci_low"] <= truth) & (truth <= table["ci_high"])
        for treatment, group in table.groupby("treatment"):
            null = planted.get(treatment, 0.0) == 0.0
            rows.append({
                "design": name, "treatment": treatment, "method": method, "screens": n_screens,
                "coverage": group["covered"].mean(),
                "mc_se": np.sqrt(0.95 * 0.05 / n_screens),
                "false_positive_rate": (group["p_value"] < 0.05).mean() if null else np.nan,
                "mean_ci_width": (group["ci_high"] - group["ci_low"]).mean(),
                "median_df": group["df"].median(),
                "mean_icc": group["icc_batch_plate"].mean(),
            })  # fmt: skip
    return rows


def count_rows(n_screens: int) -> list[dict]:
    """Cell-count coverage of a planted log ratio of -1 by control count: precision weights and no
    truncation (now), one residual variance without truncation, and the wells below the cell-count
    floor dropped with one residual variance (before)."""
    rows = []
    for control_count in (8.0, 20.0, 60.0):
        covered = {"now": [], "no weights": [], "before": []}
        for seed in range(n_screens):
            wells = count_screen(np.random.default_rng(seed), control_count, log_ratio=-1.0)
            model = build_model_wells(wells, ["cell_count"], {"cell_count"}, "control_location")
            unweighted = model.wells.rename(columns={"cell_count": "count"})
            fits = {
                "now": fit_feature_effects(model.wells, "cell_count", "log", 0.95),
                "no weights": fit_feature_effects(unweighted.assign(count_only=False), "count", "log", 0.95),
                "before": fit_feature_effects(unweighted, "count", "log", 0.95),
            }
            for method, fit in fits.items():
                covered[method].append(bool(fit.iloc[0]["ci_low"] <= -1.0 <= fit.iloc[0]["ci_high"]))
        for method, values in covered.items():
            rows.append({"design": f"cell count, {control_count:g} per site in controls, log ratio -1",
                         "treatment": "X", "method": method, "screens": n_screens, "coverage": np.mean(values),
                         "mc_se": np.sqrt(0.95 * 0.05 / n_screens)})  # fmt: skip
    return rows


def main() -> None:
    numbers = [a for a in sys.argv[1:] if a.isdigit()]
    n_screens = int(numbers[0]) if numbers else 400
    designs = [
        ("shared plates, 3 days x 2 plates", shared_plate_design(), {"A": 0.2, "C": 0.1}),
        ("whole-plate W, 3 days x 2 plates", whole_plate_design(3, 2), {"A": 0.2}),
        ("whole-plate W, 6 days x 2 plates", whole_plate_design(6, 2), {"A": 0.2}),
    ]
    with pd.option_context("display.width", 200, "display.max_columns", 20):
        if "--counts-only" in sys.argv:
            designs = []
        for name, design, planted in designs:
            table = pd.DataFrame(design_rows(name, design, planted, n_screens))
            print(table.round(3).to_string(index=False), flush=True)
        print(pd.DataFrame(count_rows(n_screens // 2)).round(3).to_string(index=False))


if __name__ == "__main__":
    main()
