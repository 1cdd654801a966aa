"""The plate stage on planted plates: edge effect detected, removed by median polish, every exclusion in the ledger."""

import numpy as np
import pandas as pd
import pytest

from plateloom.exclusions import ExclusionRules
from plateloom.plate_formats import all_wells, is_edge_well, plate_format
from plateloom.plate_stage import PlateSettings, build_plate_tables

FMT = plate_format(96)


def _plate(edge_ratio=1.2, seed=0):
    """Per-well tables of a planted 96-well plate: one observation per well and frame, a ring edge effect."""
    rng = np.random.default_rng(seed)
    wells = all_wells(FMT)
    roles = ["negative_control" if i % 8 == 0 else "positive_control" if i % 8 == 4 else "test" for i in range(96)]
    layout = pd.DataFrame({"well": wells, "role": roles, "condition": [f"c{i % 6}" if r == "test" else r for i, r in enumerate(roles)],
                           "dose": np.nan, "dose_unit": ""})
    layout["treatment"] = layout["condition"]
    cells, tracks, qc = [], [], []
    for well, role in zip(wells, roles):
        level = 100.0 * (edge_ratio if is_edge_well(well, FMT) else 1.0) * (2.0 if role == "positive_control" else 1.0)
        n = 3 if well == "D05" else 20  # D05 has too few cells
        for frame in range(2):
            cells.append(pd.DataFrame({"well": well, "site": 1, "frame": frame, "object": np.arange(n), "track": np.arange(n),
                                       "touches_border": False, "centroid_x_um": 0.0, "centroid_y_um": 0.0,
                                       "area_um2": level * np.exp(rng.normal(0, 0.02, n))}))
            qc.append({"well": well, "site": 1, "frame": frame, "n_objects": n, "focus_score": 1.0, "saturated_fraction_dna": 0.2 if (well, frame) == ("B03", 1) else 0.0})
        tracks.append(pd.DataFrame({"well": well, "track": np.arange(n), "speed_um_per_min": 1.0, "straightness": 0.5,
                                    "touches_border": False}))
    return pd.concat(cells, ignore_index=True), pd.concat(tracks, ignore_index=True), pd.DataFrame(qc), layout


def test_edge_effect_detected_and_removed_by_median_polish():
    cells, tracks, qc, layout = _plate()
    plain = build_plate_tables(cells, tracks, qc, layout, "P1", "d1", 96, PlateSettings(), ExclusionRules())
    row = plain.edge.set_index("feature").loc["area_um2"]
    assert row["edge_shift"] == pytest.approx(np.log(1.2), abs=0.02) and row["p_value"] < 1e-6
    corrected = build_plate_tables(cells, tracks, qc, layout, "P1", "d1", 96,
                                   PlateSettings(positional_correction="median_polish"), ExclusionRules())
    row = corrected.edge.set_index("feature").loc["area_um2"]
    assert abs(row["edge_shift_corrected"]) < 0.25 * np.log(1.2)
    assert "area_um2_b_score" in corrected.profile and "area_um2_uncorrected" in corrected.profile


def test_every_exclusion_is_in_the_ledger_with_value_and_threshold():
    cells, tracks, qc, layout = _plate()
    rules = ExclusionRules(min_cells_per_well=5, max_saturated_fraction=0.05, min_plate_z_prime=0.99)
    tables = build_plate_tables(cells, tracks, qc, layout, "P1", "d1", 96, PlateSettings(), rules)
    ledger = tables.ledger.sort_values("level").reset_index(drop=True)
    assert ledger[["level", "well", "rule"]].values.tolist() == [
        ["plate", "", "min_plate_z_prime (area_um2)"], ["site_frame", "B03", "max_saturated_fraction"],
        ["well", "D05", "min_cells_per_well"]]
    assert ledger.loc[2, "value"] == 3 and ledger.loc[2, "threshold"] == 5
    profile = tables.profile.set_index("well")
    assert profile.loc["D05", "excluded_by"].startswith("min_cells_per_well")
    assert (profile["plate_excluded_by"] != "").all()
    # the saturated site-frame is left out of the well profile: B03 keeps one frame
    assert profile.loc["B03", "n_frames"] == 1


def test_percent_of_control_puts_controls_at_0_and_100():
    cells, tracks, qc, layout = _plate(edge_ratio=1.0)
    tables = build_plate_tables(cells, tracks, qc, layout, "P1", "d1", 96, PlateSettings(normalization="percent_of_control"),
                                ExclusionRules())
    profile = tables.profile[tables.profile["excluded_by"] == ""]
    neg = profile.loc[profile["role"] == "negative_control", "area_um2_percent_of_control"]
    pos = profile.loc[profile["role"] == "positive_control", "area_um2_percent_of_control"]
    assert np.median(neg) == pytest.approx(0.0, abs=1e-9) and np.median(pos) == pytest.approx(100.0, abs=1e-9)


def test_single_well_treatment_and_image_qc_are_reported():
    cells, tracks, qc, layout = _plate(edge_ratio=1.0)
    layout.loc[layout["well"] == "A02", "treatment"] = "lonely 1 uM"
    tables = build_plate_tables(cells, tracks, qc, layout, "P1", "d1", 96, PlateSettings(), ExclusionRules())
    assert "treatment 'lonely 1 uM' has a single kept well on this plate" in tables.warnings
    assert tables.site_summary["site_frames"] == 192 and tables.site_summary["saturated_fraction_max"] == pytest.approx(0.2)
    assert tables.profile["fraction_observations_used"].between(0, 1).all()


def test_collective_readouts_join_the_profile_as_features_and_their_counts_do_not():
    cells, tracks, qc, layout = _plate()
    wells = layout["well"].to_numpy()
    collective = pd.DataFrame({"plate": "P1", "well": wells, "phase_order_rep": np.linspace(0, 1, len(wells)),
                               "spreading_index": 1.0, "n_events": 3, "spreading_p_value": 0.5,
                               "n_neighbour_links": 10, "n_coupling_tests": 20})
    tables = build_plate_tables(cells, tracks, qc, layout, "P1", "d1", 96, PlateSettings(), ExclusionRules(), collective)
    profile = tables.profile.set_index("well")
    np.testing.assert_allclose(profile.loc[wells, "phase_order_rep"], np.linspace(0, 1, len(wells)))
    assert "phase_order_rep_robust_z" in profile and "spreading_index_robust_z" in profile
    assert "n_events_robust_z" not in profile and "spreading_p_value_robust_z" not in profile
    # no readout columns (collective readouts switched off): the profile is as without the table
    keys_only = collective[["plate", "well"]]
    plain = build_plate_tables(cells, tracks, qc, layout, "P1", "d1", 96, PlateSettings(), ExclusionRules(), keys_only)
    assert list(plain.profile.columns) == list(
        build_plate_tables(cells, tracks, qc, layout, "P1", "d1", 96, PlateSettings(), ExclusionRules()).profile.columns)
