"""Effects over time: windows, time courses, bands, onset and half-maximum rules, the kinetic summary."""

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from plateloom.plate.time_courses import (
    TimeWindows,
    control_drift,
    drift_notes,
    window_index,
    window_medians,
)
from plateloom.screen.kinetics import (
    BAND_METHOD,
    add_simultaneous_band,
    half_maximum_time,
    kinetic_features,
    onset_window,
    well_areas,
)


def test_window_index_counts_whole_windows_from_the_origin():
    times = np.array([0.0, 5.0, 29.9, 30.0, 59.0, 60.0, np.nan, -5.0])
    assert window_index(times, 30.0).tolist() == [0, 0, 0, 1, 1, 2, -1, -1]
    # from a treatment 10 min after the first frame: the frames before it belong to no window
    assert window_index(times, 30.0, origin_min=10.0).tolist() == [-1, -1, 0, 0, 1, 1, -1, -1]
    with pytest.raises(ValueError, match="window_min"):
        window_index(times, 0.0)


def test_window_medians_equal_pandas_groupby_medians():
    # Reference: pandas groupby median (NaN skipped) per window of floor(t / 20).
    rng = np.random.default_rng(3)
    times = rng.choice(np.arange(0, 120, 5.0), 500)
    values = rng.lognormal(0, 1, (2, 500))
    values[1, rng.random(500) < 0.2] = np.nan
    before = values.copy()
    numbers, medians, counts = window_medians(values, times, 20.0)
    frame = pd.DataFrame({"w": np.floor(times / 20).astype(int), "a": values[0], "b": values[1]})
    expected = frame.groupby("w")[["a", "b"]].median()
    assert numbers.tolist() == expected.index.tolist() == list(range(6))
    np.testing.assert_allclose(medians, expected.to_numpy(), rtol=1e-12)
    assert counts.tolist() == frame.groupby("w").size().tolist()
    np.testing.assert_array_equal(values, before)  # the block is not reordered


def test_onset_needs_the_stated_run_of_significant_windows():
    assert onset_window(np.array([False, True, False, True, True, True]), 2) == 3
    assert onset_window(np.array([False, True, False, True, True, True]), 1) == 1
    assert onset_window(np.array([False, False, False, False, True]), 2) == 4  # the last window: all that remain
    assert onset_window(np.array([False, False]), 2) == -1


def test_half_maximum_time_is_interpolated_between_window_midpoints():
    midpoints = np.array([15.0, 45.0, 75.0, 105.0])
    # peak -0.8 at 105 min; half is -0.4, reached between -0.2 (45 min) and -0.6 (75 min): at 60 min
    assert half_maximum_time(midpoints, np.array([0.0, -0.2, -0.6, -0.8]), 3) == pytest.approx(60.0)
    assert half_maximum_time(midpoints, np.array([0.5, 0.6, 0.2, 0.1]), 1) == 15.0
    assert np.isnan(half_maximum_time(midpoints, np.array([0.0, 0.0, 0.0, 0.0]), 0))


def test_simultaneous_band_is_the_bonferroni_t_interval_over_the_curve():
    # Reference: Bonferroni's inequality with the t quantile from scipy: t_{df}(1 - 0.05 / (2 W)).
    table = pd.DataFrame(
        {
            "feature": "f",
            "treatment": ["a"] * 4 + ["b"] * 2,
            "estimate": [0.1, 0.2, np.nan, 0.3, 1.0, 2.0],
            "std_error": [0.1, 0.1, np.nan, 0.2, 0.5, 0.5],
            "df": [10.0, 12.0, np.nan, 8.0, 30.0, 3.0],
        }
    )
    band = add_simultaneous_band(table, 0.95)
    quantile = stats.t.ppf(1 - 0.05 / (2 * 3), 8.0)  # treatment a has 3 windows with an estimate
    assert band.loc[3, "band_high"] == pytest.approx(0.3 + quantile * 0.2, rel=1e-12)
    assert band.loc[5, "band_low"] == pytest.approx(2.0 - stats.t.ppf(1 - 0.05 / 4, 3.0) * 0.5, rel=1e-12)
    assert band["band_windows"].tolist() == [3, 3, 3, 3, 2, 2]
    assert band.loc[0, "band_method"] == BAND_METHOD and band.loc[2, "band_method"] == ""
    pointwise = stats.t.ppf(0.975, 10.0) * 0.1
    assert band.loc[0, "band_high"] - 0.1 > pointwise  # wider than the pointwise interval


def test_kinetic_features_default_to_the_screen_features_measured_per_window():
    columns = ["well", "window", "cell_count", "area_um2", "mean_intensity_reporter"]
    assert kinetic_features(None, ["cell_count", "area_um2", "speed_um_per_min"], columns) == ["cell_count", "area_um2"]
    with pytest.raises(ValueError, match="speed_um_per_min"):
        kinetic_features(["speed_um_per_min"], [], columns)


def test_well_area_is_value_times_window_length_and_missing_for_an_incomplete_well():
    rows = pd.DataFrame(
        {
            "plate": "P",
            "well": ["A01", "A01", "A02", "A02", "A03"],
            "plate_well": ["P/A01", "P/A01", "P/A02", "P/A02", "P/A03"],
            "window": [0, 1, 0, 1, 0],
            "window_start_min": [0.0, 30.0, 0.0, 30.0, 0.0],
            "window_end_min": [30.0, 60.0, 30.0, 60.0, 30.0],
            "n_sites": 1,
            "count_only": False,
            "f": [1.0, 2.0, 0.5, np.nan, 3.0],
        }
    )
    areas = well_areas(rows, "f").set_index("well")["f"]
    assert areas["A01"] == pytest.approx(90.0)
    assert np.isnan(areas["A02"]) and np.isnan(areas["A03"])


def test_control_drift_flags_a_plate_whose_controls_move_over_the_run():
    table = pd.DataFrame(
        {
            "role": ["negative_control"] * 6 + ["test"] * 3,
            "excluded_by": "",
            "window_start_min": [0, 0, 60, 60, 120, 120, 0, 60, 120],
            "area_um2": [100, 102, 110, 108, 140, 136, 50, 50, 50.0],
            "mean_intensity_reporter": [10, 10, 10, 10, 10.5, 10.5, 1, 2, 3.0],
        }
    )
    drift = control_drift(table, ["area_um2", "mean_intensity_reporter"]).set_index("feature")
    assert drift.loc["area_um2", "log_ratio"] == pytest.approx(np.log(138 / 101))
    notes = drift_notes(table, ["area_um2", "mean_intensity_reporter"], TimeWindows(60.0, max_control_drift=0.2))
    assert len(notes) == 1 and "area_um2 x1.37" in notes[0] and "mean_intensity_reporter" not in notes[0]


def _curves() -> pd.DataFrame:
    """Effects over time of two treatments on one feature (invented numbers for the figure)."""
    rows = []
    for treatment, shape in (("LOOM-107 10 uM", [0, 0, 0.2, 0.6, 0.6, 0.6]), ("LOOM-104 1 uM", [0.0] * 6)):
        for window, effect in enumerate(shape):
            rows.append(
                {
                    "feature": "mean_intensity_reporter",
                    "treatment": treatment,
                    "role": "test",
                    "scale": "log",
                    "window": window,
                    "window_start_min": 30.0 * window,
                    "window_end_min": 30.0 * window + 30,
                    "time_origin": "treatment",
                    "estimate": effect,
                    "ci_low": effect - 0.08,
                    "ci_high": effect + 0.08,
                    "band_low": effect - 0.12,
                    "band_high": effect + 0.12,
                    "p_value": 1e-6 if effect > 0.1 else 0.5,
                    "q_value": 1e-5 if effect > 0.1 else 0.6,
                    "hit": effect > 0.1,
                }
            )
    return pd.DataFrame(rows)


def test_effect_curves_have_time_axes_and_render_in_headless_chromium(tmp_path):
    import os
    import subprocess

    from skimage.io import imread
    from test_reports import _chromium

    from plateloom.report.time_panels import effect_curves_figure, kinetics_html

    curves = _curves()
    figure = effect_curves_figure(curves, "mean_intensity_reporter")
    assert figure.axes[0].get_xlabel() == "time after treatment (min)"
    assert "natural-log ratio" in figure.axes[0].get_ylabel()
    summary = pd.DataFrame(
        [
            {"feature": "mean_intensity_reporter", "treatment": "LOOM-107 10 uM", "onset_min": 60.0}
            | dict.fromkeys(["half_max_time_min", "peak_effect", "peak_ci_low", "peak_ci_high", "peak_time_min"], 1.0)
            | dict.fromkeys(["auc", "auc_ci_low", "auc_ci_high", "auc_q_value"], 1.0)
            | {"significant_windows": 4, "n_windows": 6}
        ]
    )
    html = kinetics_html(curves, summary, {"ci_level": 0.95, "hit_q_value": 0.05, "onset_windows": 2})
    # only the curve with a significant window is drawn; the summary lists it by onset
    assert "LOOM-107 10 uM" in html and 'alt="effects over time mean_intensity_reporter"' in html
    if _chromium() is None:
        if os.environ.get("PLATELOOM_REQUIRE_CHROMIUM"):
            pytest.fail("chromium is required here (PLATELOOM_REQUIRE_CHROMIUM is set) but not installed")
        pytest.skip("Debian package chromium not installed (.ci/run installs it)")
    page = tmp_path / "kinetics.html"
    page.write_text(f"<html><body style='margin:0;background:#fff'>{html}</body></html>", encoding="utf-8")
    shot = tmp_path / "shot.png"
    command = [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run"]
    command += [f"--user-data-dir={tmp_path / 'profile'}", "--window-size=900,900", f"--screenshot={shot}"]
    subprocess.run([*command, page.as_uri()], check=True, capture_output=True, timeout=120)
    pixels = imread(shot)[..., :3].astype(int)
    # the band's pale red (#b8322a at 15% on white) shows only if the figure was decoded and drawn
    band = (np.abs(pixels - np.array([241, 224, 223])).sum(axis=-1) < 25).sum()
    assert band > 1000, band


def test_treatment_time_is_given_for_every_plate_or_for_none(tmp_path):
    from plateloom.errors import InputError
    from plateloom.setup.screen_sheet import load_screen_sheet, treatment_times

    layout = tmp_path / "layout.csv"
    layout.write_text("well,role,condition,dose,dose_unit\nA01,negative_control,vehicle,,\n")
    header = "plate,batch,plate_format,layout,image_folder,treatment_time_min\n"
    sheet = tmp_path / "plates.csv"
    sheet.write_text(header + f"P1,day1,96,{layout},img/P1,-15\nP2,day1,96,{layout},img/P2,20.5\n")
    entries = load_screen_sheet(str(sheet))
    assert treatment_times(entries, str(sheet)) == {"P1": -15.0, "P2": 20.5}
    sheet.write_text(header + f"P1,day1,96,{layout},img/P1,-15\nP2,day1,96,{layout},img/P2,\n")
    with pytest.raises(InputError, match="P2.*give treatment_time_min for every plate"):
        treatment_times(load_screen_sheet(str(sheet)), str(sheet))
    sheet.write_text(header + f"P1,day1,96,{layout},img/P1,soon\n")
    with pytest.raises(InputError, match="row 2, column treatment_time_min.*'soon' is not a number"):
        load_screen_sheet(str(sheet))


def test_windows_count_from_the_treatment_when_it_is_given():
    # A plate treated 20 min after its first frame: frames before it belong to no window, and the
    # window columns read in minutes after treatment.
    from plateloom.plate.time_courses import time_course_table, window_cell_counts

    counts = pd.DataFrame(
        {"well": "A01", "site": 1, "frame": np.arange(8), "time_min": 10.0 * np.arange(8), "observations": 10}
    )
    cells = window_cell_counts(counts, 30.0, origin_min=20.0)
    assert cells["window"].tolist() == [0, 1] and cells["n_frames"].tolist() == [3, 3]
    windows = pd.DataFrame({"well": ["A01", "A01"], "window": [0, 1], "n_observations": [30, 30], "f": [1.0, 2.0]})
    profile = pd.DataFrame({"plate": ["P"], "well": ["A01"], "role": ["test"], "excluded_by": [""]})
    table = time_course_table(windows, cells, profile, 30.0, "treatment")
    assert table["window_start_min"].tolist() == [0.0, 30.0] and table["time_origin"].eq("treatment").all()


def _awkward_windows(n_batches: int, seed: int = 5, windows: int = 4) -> list[pd.DataFrame]:
    """Wells of a small screen repeated over ``windows`` time windows (planted truth for an equality
    check, not data): unequal plates per batch (the last batch has one plate), a treatment in one
    batch only, a well with no value in any window, a well kept for the cell count only, and a
    feature with no batch-to-batch variation (its batch variance at the boundary)."""
    rng = np.random.default_rng(seed)
    rows = []
    for b in range(n_batches):
        for p in range(3 if b < n_batches - 1 or n_batches == 1 else 1):
            plate = f"B{b}P{p}"
            for w in range(12):
                if w < 4:
                    role, treatment = "negative_control", "vehicle"
                elif w < 8 or b == 0:
                    role, treatment = "test", f"T{w % 4} 1 uM" if w < 8 else "T9 1 uM"
                else:
                    role, treatment = "test", f"T{w % 2} 1 uM"
                rows.append({"batch": f"d{b}", "plate": plate, "well": f"A{w:02d}", "role": role,
                             "treatment": treatment, "condition": treatment.split()[0], "dose": 1.0,
                             "dose_unit": "uM", "n_sites": 1, "count_only": False,
                             "batch_offset": rng.normal(0, 0.3), "plate_offset": rng.normal(0, 0.2)})  # fmt: skip
    wells = pd.DataFrame(rows)
    wells["batch_offset"] = wells.groupby("batch")["batch_offset"].transform("first")
    wells["plate_offset"] = wells.groupby("plate")["plate_offset"].transform("first")
    wells.loc[3, "count_only"] = True
    parts = []
    for window in range(windows):
        effect = np.where(wells["treatment"] == "T1 1 uM", 0.2 * window, 0.0)
        part = wells.assign(
            window=window,
            area_um2=wells["batch_offset"] + wells["plate_offset"] + effect + rng.normal(0, 0.1, len(wells)),
            solidity=wells["plate_offset"] + rng.normal(0, 0.1, len(wells)),
        )
        part.loc[5, ["area_um2", "solidity"]] = np.nan
        parts.append(part)
    return parts


@pytest.mark.parametrize("n_batches", [3, 1])
def test_shared_window_fits_equal_the_endpoint_fit_of_each_window(n_batches):
    # The shared path (design once, group sums of all windows at once, warm-started REML) gives the
    # rows of fit_feature_effects run on each window alone, on an unbalanced design.
    from plateloom.screen.effects import fit_feature_effects
    from plateloom.screen.window_fits import shared_window_effects

    parts = _awkward_windows(n_batches)
    catalogue = pd.DataFrame(
        {"treatment": ["T7 1 uM"], "condition": "T7", "dose": 1.0, "dose_unit": "uM", "role": "test"}
    )
    catalogue = pd.concat(
        [parts[0][["treatment", "condition", "dose", "dose_unit", "role"]].drop_duplicates(), catalogue]
    )
    for feature in ("area_um2", "solidity"):
        shared = shared_window_effects(parts, feature, "linear", (0.95, "exact", "satterthwaite"), catalogue)
        assert shared is not None and len(shared) == len(parts)
        for part, table in zip(parts, shared):
            alone = fit_feature_effects(part, feature, "linear", 0.95, "exact", catalogue, "", "satterthwaite")
            pd.testing.assert_frame_equal(table, alone, rtol=1e-6, atol=1e-9)
        notes = " ".join(shared[-1]["note"])
        assert "1 wells with a missing value left out" in notes and "no estimate" in notes
    assert "present in one batch only" in notes if n_batches > 1 else "one batch only" in notes
    if n_batches > 1:  # solidity has no batch offsets: its batch variance sits at the boundary
        assert "singular fit" in notes
    # where the path does not apply it says so, and the caller fits window by window
    assert shared_window_effects(parts, "area_um2", "linear", (0.95, "exact", "kenward_roger")) is None
    shifted = [parts[0], parts[1].iloc[::-1]]
    assert shared_window_effects(shifted, "area_um2", "linear", (0.95, "exact", "satterthwaite")) is None
