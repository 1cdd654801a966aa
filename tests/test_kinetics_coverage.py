"""Calibration of the effects over time on seeded simulations with known effect curves (planted truth).

An awkward design, not a balanced one: 3 days x 2 plates, a treatment with a delayed-then-waning
curve on every plate, a null treatment, a treatment present on two of the three days only, 10% of
(well, window) values missing at random, day-by-window shifts (each day's time course drifts its
own way) and a well effect shared by all windows of a well (windows of a well are correlated).
"""

import numpy as np
import pandas as pd
import pytest

from plateloom.screen.kinetics import ModelChoices, area_effects, effects_over_time

WINDOWS = 6
WINDOW_MIN = 30.0
CURVE = np.array([0.0, 0.05, 0.25, 0.30, 0.20, 0.10])  # planted effect per window (model-scale units)


def simulate_screen(rng: np.random.Generator) -> pd.DataFrame:
    """Time-course rows (model scale, feature f) of one simulated screen."""
    rows = []
    for day in range(3):
        day_shift = rng.normal(0, 0.10) + rng.normal(0, 0.04, WINDOWS)  # day, and day x window
        for plate_number in range(2):
            plate = f"D{day}P{plate_number}"
            plate_shift = rng.normal(0, 0.05)
            treatments = ["vehicle"] * 6 + ["T"] * 3 + ["N"] * 3 + (["S"] * 3 if day < 2 else [])
            for number, treatment in enumerate(treatments):
                role = "negative_control" if treatment == "vehicle" else "test"
                curve = CURVE if treatment in ("T", "S") else np.zeros(WINDOWS)
                values = day_shift + plate_shift + rng.normal(0, 0.06) + curve + rng.normal(0, 0.05, WINDOWS)
                values[rng.random(WINDOWS) < 0.10] = np.nan
                for window in range(WINDOWS):
                    rows.append(
                        {
                            "plate": plate,
                            "batch": f"day{day}",
                            "well": f"W{number:02d}",
                            "role": role,
                            "condition": treatment,
                            "dose": np.nan,
                            "dose_unit": "",
                            "treatment": treatment,
                            "n_sites": 1,
                            "count_only": False,
                            "window": window,
                            "window_start_min": window * WINDOW_MIN,
                            "window_end_min": (window + 1) * WINDOW_MIN,
                            "time_origin": "first_frame",
                            "f": values[window],
                        }
                    )
    return pd.DataFrame(rows)


@pytest.mark.slow
def test_pointwise_intervals_and_simultaneous_bands_cover_the_planted_curves():
    rng = np.random.default_rng(7)
    screens = 500
    pointwise, simultaneous, area = [], [], []
    for _ in range(screens):
        rows = simulate_screen(rng)
        effects = effects_over_time(rows, ["f"], {"f": "linear"}, ModelChoices())
        for treatment in ("T", "S"):
            curve = effects[effects["treatment"] == treatment].sort_values("window")
            truth = CURVE[curve["window"].to_numpy()]
            pointwise.extend(((curve["ci_low"] <= truth) & (truth <= curve["ci_high"])).tolist())
            simultaneous.append(bool(((curve["band_low"] <= truth) & (truth <= curve["band_high"])).all()))
        areas = area_effects(rows, ["f"], ModelChoices(), None).set_index("treatment")
        true_area = CURVE.sum() * WINDOW_MIN
        area.append(bool(areas.loc["T", "auc_ci_low"] <= true_area <= areas.loc["T", "auc_ci_high"]))
    pointwise_rate, band_rate, area_rate = np.mean(pointwise), np.mean(simultaneous), np.mean(area)
    # Monte Carlo SE of a 0.95 coverage: sqrt(0.95 x 0.05 / 6000) = 0.003 pointwise (6000 intervals,
    # correlated within a curve, so somewhat more), 0.007 for the 1000 bands, 0.010 for the 500 areas.
    # Bonferroni is conservative when the windows are correlated: measured 0.965 over 1600 bands.
    print(f"pointwise {pointwise_rate:.3f}, simultaneous {band_rate:.3f}, area {area_rate:.3f}")
    assert 0.93 <= pointwise_rate <= 0.97
    assert band_rate >= 0.95
    assert 0.92 <= area_rate <= 0.98
