"""Calibration of the effects model on planted-truth screens (slow, seeded).

Coverage of 95% intervals per design, the family-wise false-hit rate among test compounds under a
global null, the fitted ICC against the planted one, and cell-count effects. Monte Carlo standard
errors are binomial: sqrt(p (1 - p) / n) over screens.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from calibration import (
    TRUE_ICC,
    Placement,
    count_screen,
    coverage_runs,
    layout,
    shared_plate_design,
    simulate,
    whole_plate_design,
)

from plateloom.screen.design_check import VarianceComponents, simulate_design
from plateloom.screen.effects import fit_feature_effects
from plateloom.screen.hits import HitRule, add_hit_calls
from plateloom.screen.model_wells import build_model_wells

pytestmark = pytest.mark.slow


def _mc_se(p: float, n: int) -> float:
    return float(np.sqrt(p * (1 - p) / n))


@pytest.mark.parametrize(
    "design, effects",
    [
        (shared_plate_design(), {"A": 0.2, "B": 0.0, "C": 0.1, "D": 0.0}),
        (whole_plate_design(n_batches=6, plates_per_batch=2), {"A": 0.2, "W": 0.1}),
    ],
    ids=["shared-plate placements (3 days x 2 plates)", "whole-plate treatment (12 plates)"],
)
def test_95_percent_intervals_cover_within_093_097_for_every_placement(design, effects):
    runs = coverage_runs(design, effects, n_screens=800, seed=25)
    coverage = runs.groupby("treatment")["covered"].mean()
    for treatment, value in coverage.items():
        # Monte Carlo SE at 800 screens is about 0.008; 0.93-0.97 is +-2.5 SE around 0.95.
        assert 0.93 <= value <= 0.97, f"{treatment}: coverage {value:.3f} (MC SE {_mc_se(value, 800):.3f})"


def test_whole_plate_treatment_gets_few_df_and_shared_plate_treatment_many():
    runs = coverage_runs(whole_plate_design(n_batches=6, plates_per_batch=2), {"A": 0.2, "W": 0.1}, 20, seed=3)
    df = runs.groupby("treatment")["df"].median()
    assert df["W"] < 20 and df["A"] > 200


def test_family_wise_false_hits_among_test_compounds_under_global_null():
    # 20 null test compounds and a positive control with a large effect on every plate, 5 features.
    placements = [Placement(f"T{i:02d}", tuple((b, p) for b in range(3) for p in range(2)), wells=2) for i in range(20)]
    placements.append(Placement("POS", tuple((b, p) for b in range(3) for p in range(2)), wells=4))
    design = layout(3, 2, 8, placements)
    design.loc[design["treatment"] == "POS", "role"] = "positive_control"
    rng = np.random.default_rng(41)
    n_screens, any_false_hit, any_false_hit_with_controls = 300, 0, 0
    for _ in range(n_screens):
        parts = []
        for feature in range(5):
            wells = design.assign(value=simulate(design, {"POS": 0.8}, rng))
            parts.append(fit_feature_effects(wells, "value", "log", 0.95).assign(feature=f"f{feature}"))
        table = pd.concat(parts, ignore_index=True)
        rule = HitRule(0.05, 0.0, 0.0)
        hits = add_hit_calls(table, rule)
        any_false_hit += bool(hits.loc[hits["role"] == "test", "hit"].any())
        # the old family (positive controls included) for comparison
        loose = add_hit_calls(table.assign(role="test"), rule)
        any_false_hit_with_controls += bool(loose.loc[table["role"] == "test", "hit"].any())
    rate = any_false_hit / n_screens
    assert rate <= 0.05 + 2 * _mc_se(0.05, n_screens), f"family-wise false-hit rate {rate:.3f}"
    assert any_false_hit_with_controls / n_screens > 2 * rate + 0.05


def test_fitted_icc_tracks_the_planted_icc():
    # 6 days x 2 plates: the mean fitted ICC is within 0.05 of the planted 0.661.
    runs = coverage_runs(whole_plate_design(n_batches=6, plates_per_batch=2), {"A": 0.2, "W": 0.1}, 300, seed=9)
    per_screen = runs.drop_duplicates("screen")["icc_batch_plate"]
    assert abs(per_screen.mean() - TRUE_ICC) < 0.05


def test_design_check_coverage_on_a_whole_plate_design_matches_an_independent_simulation():
    design = whole_plate_design(n_batches=6, plates_per_batch=2)
    truth = VarianceComponents(0.10**2, 0.05**2, 0.08**2)
    checked = simulate_design(design, truth, effect=0.1, n_screens=300, seed=4)
    independent = coverage_runs(design, {"A": 0.1, "W": 0.1}, 300, seed=5)
    for treatment in ("A", "W"):
        a = checked.loc[checked["treatment"] == treatment, "covered"].mean()
        b = independent.loc[independent["treatment"] == treatment, "covered"].mean()
        assert abs(a - b) < 3 * _mc_se(0.95, 300) * np.sqrt(2), (treatment, a, b)


def test_cell_count_effect_of_minus_3_is_covered_without_truncation():
    covered, estimates = [], []
    for seed in range(60):
        wells = count_screen(np.random.default_rng(seed), control_count=60.0, log_ratio=-3.0)
        model = build_model_wells(wells, ["cell_count"], {"cell_count"}, "control_location")
        row = fit_feature_effects(model.wells, "cell_count", "log", 0.95).iloc[0]
        covered.append(row["ci_low"] <= -3.0 <= row["ci_high"])
        estimates.append(row["estimate"])
    assert np.mean(covered) >= 0.9, np.mean(covered)
    assert np.mean(estimates) == pytest.approx(-3.0, abs=0.1)
