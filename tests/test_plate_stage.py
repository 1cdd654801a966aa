"""The plate stage on planted plates: edge effect detected, removed by median polish, every exclusion in the ledger."""

import numpy as np
import pandas as pd
import pytest
from conftest import plate_tables

from plateloom.plate.exclusions import ExclusionRules
from plateloom.plate.stage import PlateDesign, PlateSettings, WellTables
from plateloom.setup.plate_formats import all_wells, is_edge_well, plate_format

FMT = plate_format(96)


def _plate(edge_ratio=1.2, seed=0):
    """Per-well tables of a planted 96-well plate: one observation per well and frame, a ring edge effect."""
    rng = np.random.default_rng(seed)
    wells = all_wells(FMT)
    roles = ["negative_control" if i % 8 == 0 else "positive_control" if i % 8 == 4 else "test" for i in range(96)]
    layout = pd.DataFrame(
        {
            "well": wells,
            "role": roles,
            "condition": [f"c{i % 6}" if r == "test" else r for i, r in enumerate(roles)],
            "dose": np.nan,
            "dose_unit": "",
        }
    )
    layout["treatment"] = layout["condition"]
    cells, tracks, qc = [], [], []
    for well, role in zip(wells, roles):
        level = 100.0 * (edge_ratio if is_edge_well(well, FMT) else 1.0) * (2.0 if role == "positive_control" else 1.0)
        n = 3 if well == "D05" else 20  # D05 has too few cells
        for frame in range(2):
            cells.append(
                pd.DataFrame(
                    {
                        "well": well,
                        "site": 1,
                        "frame": frame,
                        "object": np.arange(n),
                        "track": np.arange(n),
                        "touches_border": False,
                        "centroid_x_um": 0.0,
                        "centroid_y_um": 0.0,
                        "area_um2": level * np.exp(rng.normal(0, 0.02, n)),
                    }
                )
            )
            qc.append(
                {
                    "well": well,
                    "site": 1,
                    "frame": frame,
                    "n_objects": n,
                    "focus_score": 1.0,
                    "saturated_fraction_dna": 0.2 if (well, frame) == ("B03", 1) else 0.0,
                }
            )
        tracks.append(
            pd.DataFrame(
                {
                    "well": well,
                    "track": np.arange(n),
                    "speed_um_per_min": 1.0,
                    "straightness": 0.5,
                    "touches_border": False,
                }
            )
        )
    return pd.concat(cells, ignore_index=True), pd.concat(tracks, ignore_index=True), pd.DataFrame(qc), layout


def test_edge_effect_detected_and_removed_by_median_polish():
    cells, tracks, qc, layout = _plate()
    plain = plate_tables(cells, tracks, qc, layout)
    row = plain.edge.set_index("feature").loc["area_um2"]
    assert row["edge_shift"] == pytest.approx(np.log(1.2), abs=0.02) and row["p_value"] < 1e-6
    corrected = plate_tables(
        cells, tracks, qc, layout, settings=PlateSettings.defaults(positional_correction="median_polish")
    )
    row = corrected.edge.set_index("feature").loc["area_um2"]
    assert abs(row["edge_shift_corrected"]) < 0.25 * np.log(1.2)
    assert "area_um2_b_score" in corrected.profile and "area_um2_uncorrected" in corrected.profile


def test_every_exclusion_is_in_the_ledger_with_value_and_threshold():
    cells, tracks, qc, layout = _plate()
    rules = ExclusionRules.defaults(min_cells_per_well=5, max_saturated_fraction=0.05, min_plate_z_prime=0.99)
    tables = plate_tables(cells, tracks, qc, layout, rules=rules)
    ledger = tables.ledger.sort_values("level").reset_index(drop=True)
    assert ledger[["level", "well", "rule"]].values.tolist() == [
        ["plate", "", "min_plate_z_prime (area_um2)"],
        ["site_frame", "B03", "max_saturated_fraction"],
        ["well", "D05", "min_cells_per_well"],
    ]
    assert ledger.loc[2, "value"] == 3 and ledger.loc[2, "threshold"] == 5
    profile = tables.profile.set_index("well")
    assert profile.loc["D05", "excluded_by"].startswith("min_cells_per_well")
    assert (profile["plate_excluded_by"] != "").all()
    # the saturated site-frame is left out of the well profile: B03 keeps one frame
    assert profile.loc["B03", "n_frames"] == 1


@pytest.mark.parametrize(("method", "negative_at", "positive_at"), [("percent_activity", 0.0, 100.0)])
def test_percent_activity_puts_controls_at_0_and_100(method, negative_at, positive_at):
    # normalized percent activity: 0 at the negative, 100 at the positive controls' median (common practice)
    cells, tracks, qc, layout = _plate(edge_ratio=1.0)
    settings = PlateSettings.defaults(normalization=method)
    tables = plate_tables(cells, tracks, qc, layout, settings=settings)
    profile = tables.profile[tables.profile["excluded_by"] == ""]
    neg = profile.loc[profile["role"] == "negative_control", f"area_um2_{method}"]
    pos = profile.loc[profile["role"] == "positive_control", f"area_um2_{method}"]
    assert np.median(neg) == pytest.approx(negative_at, abs=1e-9)
    assert np.median(pos) == pytest.approx(positive_at, abs=1e-9)


def test_percent_of_control_is_the_percentage_of_the_negative_controls_median():
    cells, tracks, qc, layout = _plate(edge_ratio=1.0)
    settings = PlateSettings.defaults(normalization="percent_of_control")
    tables = plate_tables(cells, tracks, qc, layout, settings=settings)
    profile = tables.profile[tables.profile["excluded_by"] == ""]
    neg = profile.loc[profile["role"] == "negative_control"]
    assert np.median(neg["area_um2_percent_of_control"]) == pytest.approx(100.0, abs=1e-9)
    ratio = profile["area_um2_percent_of_control"] / profile["area_um2"]
    np.testing.assert_allclose(ratio, 100.0 / np.median(neg["area_um2"]), rtol=1e-12)


def test_single_well_treatment_and_image_qc_are_reported():
    cells, tracks, qc, layout = _plate(edge_ratio=1.0)
    layout.loc[layout["well"] == "A02", "treatment"] = "lonely 1 uM"
    tables = plate_tables(cells, tracks, qc, layout)
    assert "treatment 'lonely 1 uM' has a single kept well on this plate" in tables.warnings
    assert tables.site_summary["site_frames"] == 192 and tables.site_summary["saturated_fraction_max"] == pytest.approx(
        0.2
    )
    assert tables.profile["fraction_observations_used"].between(0, 1).all()


def test_collective_readouts_join_the_profile_as_features_and_their_counts_do_not():
    cells, tracks, qc, layout = _plate()
    wells = layout["well"].to_numpy()
    collective = pd.DataFrame(
        {
            "plate": "P1",
            "well": wells,
            "phase_order_rep": np.linspace(0, 1, len(wells)),
            "spreading_index": 1.0,
            "n_events": 3,
            "spreading_p_value": 0.5,
            "n_neighbour_links": 10,
            "n_coupling_tests": 20,
        }
    )
    tables = plate_tables(cells, tracks, qc, layout, collective=collective)
    profile = tables.profile.set_index("well")
    np.testing.assert_allclose(profile.loc[wells, "phase_order_rep"], np.linspace(0, 1, len(wells)))
    assert "phase_order_rep_robust_z" in profile and "spreading_index_robust_z" in profile
    assert "n_events_robust_z" not in profile and "spreading_p_value_robust_z" not in profile
    # no readout columns (collective readouts switched off): the profile is as without the table
    keys_only = collective[["plate", "well"]]
    plain = plate_tables(cells, tracks, qc, layout, collective=keys_only)
    assert list(plain.profile.columns) == list(plate_tables(cells, tracks, qc, layout).profile.columns)


def _write_cells_folders(tmp_path, cells: pd.DataFrame) -> list[str]:
    """The cells table as the per-well stage writes it: one Parquet file per well folder."""
    from plateloom.io.tables import write_parquet

    folder = tmp_path / "cells" / "plate=P1" / "chunk-000"
    for well, rows in cells.groupby("well"):
        write_parquet(rows.reset_index(drop=True), str(folder / f"well={well}" / "part-0.parquet"), {})
    return [str(folder)]


@pytest.mark.parametrize("statistic", ["median", "mean_log"])
def test_well_summaries_streamed_from_files_equal_pandas_and_the_in_memory_path(tmp_path, statistic):
    # Reference: pandas groupby median (NaN skipped) / exp of the mean log, on the observations kept
    # (not touching the border, not in an excluded site-frame); and the whole-table path.
    from plateloom.plate.stage import build_plate_tables_from_files
    from plateloom.plate.streamed_summaries import summarise_observation_files
    from plateloom.plate.summaries import (
        observation_counts,
        read_plate_dataset,
    )

    rng = np.random.default_rng(5)
    cells, tracks, qc, layout = _plate()
    cells = cells.assign(
        time_min=cells["frame"] * 10.0,
        touches_border=rng.random(len(cells)) < 0.1,
        glcm_correlation_nuclear=rng.normal(0, 1, len(cells)),
        nearest_neighbour_um=np.where(rng.random(len(cells)) < 0.2, np.nan, rng.lognormal(0, 1, len(cells))),
    )
    cells.loc[cells["well"] == "C07", "nearest_neighbour_um"] = np.nan  # a well with no finite value
    qc.loc[(qc["well"] == "E02") & (qc["frame"] == 0), "focus_score"] = 0.1  # an excluded site-frame
    rules = ExclusionRules.defaults(min_focus_score=0.5)
    folders = _write_cells_folders(tmp_path, cells)
    excluded = pd.DataFrame({"well": ["E02"], "site": [1], "frame": [0]})
    summaries, counts, _ = summarise_observation_files(folders, excluded, statistic, threads=2)
    kept = cells[~cells["touches_border"] & ~((cells["well"] == "E02") & (cells["frame"] == 0))]
    features = ["area_um2", "glcm_correlation_nuclear", "nearest_neighbour_um"]
    if statistic == "median":
        expected = kept.groupby("well")[features].median()
    else:
        expected = kept.groupby("well")[features].median()
        logs = np.log(kept[["area_um2", "nearest_neighbour_um"]]).groupby(kept["well"]).mean()
        expected[["area_um2", "nearest_neighbour_um"]] = np.exp(
            logs
        )  # "glcm_correlation_nuclear" has negative values: median
    pd.testing.assert_frame_equal(summaries[features], expected.loc[summaries.index], check_names=False, rtol=1e-12)
    assert (
        summaries.loc["C07", "nearest_neighbour_um"] != summaries.loc["C07", "nearest_neighbour_um"]
    )  # NaN, not dropped
    expected_counts = cells.groupby(["well", "site", "frame"]).agg(
        observations=("object", "size"), whole=("touches_border", lambda t: int((~t).sum()))
    )
    pd.testing.assert_frame_equal(
        counts.set_index(["well", "site", "frame"])[["observations", "whole"]], expected_counts, check_dtype=False
    )
    pd.testing.assert_frame_equal(observation_counts(cells), counts)
    settings = PlateSettings.defaults(well_summary=statistic)
    streamed = build_plate_tables_from_files(
        folders, WellTables(tracks, qc), PlateDesign("P1", "d1", 96, layout), settings, rules, 2
    )
    whole = plate_tables(read_plate_dataset(folders), tracks, qc, layout, settings=settings, rules=rules)
    pd.testing.assert_frame_equal(streamed.profile, whole.profile, rtol=1e-12)
    pd.testing.assert_frame_equal(streamed.ledger, whole.ledger)


@pytest.mark.parametrize("n", [1, 2, 7, 8, 1001])
def test_block_medians_equal_numpy_median_with_and_without_nan(n):
    # Reference: numpy.median / numpy.nanmedian, row by row (odd and even counts, NaN rows, all-NaN row).
    from plateloom.plate.summaries import block_summaries

    rng = np.random.default_rng(n)
    block = rng.normal(size=(5, n))
    block[1, rng.random(n) < 0.3] = np.nan
    block[2, :] = np.nan
    block[3, 0] = np.nan
    expected = np.array(
        [
            np.median(row) if not np.isnan(row).any() else (np.nanmedian(row) if np.isfinite(row).any() else np.nan)
            for row in block
        ]
    )
    np.testing.assert_array_equal(block_summaries(block.copy(), np.zeros(5, bool)), expected)


@pytest.mark.parametrize("shuffle", [False, True])
def test_site_frame_counts_equal_pandas_for_sorted_and_shuffled_rows(shuffle):
    # Reference: pandas groupby size / sum over (site, frame).
    from plateloom.plate.streamed_summaries import _site_frame_counts, _site_frame_key

    rng = np.random.default_rng(21)
    table = pd.DataFrame({"site": np.repeat([1, 1, 2, 4], 50), "frame": np.tile(np.repeat(np.arange(5), 10), 4)})
    table["time_min"] = table["frame"] * 7.5
    table["whole"] = rng.random(len(table)) < 0.8
    table = table.sample(frac=1.0, random_state=3) if shuffle else table.sort_values(["site", "frame"], kind="stable")
    counts = _site_frame_counts(
        _site_frame_key(table["site"], table["frame"]), table["time_min"].to_numpy(), table["whole"].to_numpy(), "test"
    )
    expected = table.groupby(["site", "frame"]).agg(
        n=("whole", "size"), whole=("whole", "sum"), time=("time_min", "first")
    )
    np.testing.assert_array_equal(counts["site"], expected.index.get_level_values(0))
    np.testing.assert_array_equal(counts["frame"], expected.index.get_level_values(1))
    np.testing.assert_array_equal(counts["observations"], expected["n"])
    np.testing.assert_array_equal(counts["whole"], expected["whole"])
    np.testing.assert_array_equal(counts["time_min"], expected["time"])


def test_streamed_fan_in_names_the_file_when_a_cells_table_lacks_a_key_column(tmp_path):
    # Common practice: a bad input names the file and the fix, never a bare Arrow error.
    from plateloom.errors import InputError
    from plateloom.plate.streamed_summaries import summarise_observation_files

    cells, _, _, _ = _plate()
    folders = _write_cells_folders(tmp_path, cells)  # this table has no time_min column
    with pytest.raises(InputError, match="time_min") as error:
        summarise_observation_files(folders, pd.DataFrame({"well": [], "site": [], "frame": []}))
    assert "part-0.parquet" in str(error.value) and "re-run the per-well jobs" in str(error.value)


def test_fate_counts_are_integers_and_zero_for_a_well_without_cells():
    # A well with no usable frame (every image unreadable) has no counts; its fate counts are 0, not
    # missing, so the column is int64 on every plate (readers refuse to stack int64 and float files).
    cells, tracks, qc, layout = _plate()
    cells = cells[cells["well"] != "B02"].assign(time_min=lambda t: t["frame"] * 10.0)
    tracks = tracks[tracks["well"] != "B02"].assign(parent_track=-1, duration_min=10.0, end_event="")
    tracks.loc[tracks.index[:3], "end_event"] = "death"
    profile = plate_tables(cells, tracks, qc, layout).profile.set_index("well")
    assert profile["n_deaths"].dtype == profile["n_divisions"].dtype == np.int64
    assert profile.loc["B02", ["n_deaths", "n_divisions", "cell_hours"]].tolist() == [0, 0, 0.0]
    assert profile["n_deaths"].sum() == 3 and profile.loc["A01", "cell_hours"] == pytest.approx(20 * 2 * 10 / 60)
