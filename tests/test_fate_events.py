"""Fate events (divisions, deaths) and the per-well fate rates.

Detection is scored on planted truth: realistic time-lapses (plateloom.demo.realistic_timelapse)
in which nuclei round up (brighter, saturated, glowing) and divide into two daughters, or condense
and vanish. A found event matches a planted one of its kind within one frame and 12 um, each
planted event at most once. The field's 10-um rim is left out of the scoring on both sides (a cell
there may leave the field), and so are divisions in the last two frames (their daughters cannot be
seen twice). The per-well rates are checked against hand-counted small cases.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import tifffile
from conftest import nuclear_only_settings

from plateloom.demo.realistic_timelapse import TimeLapseSettings, simulate_time_lapse
from plateloom.io.images import index_plate_images
from plateloom.plate.fate import well_fate
from plateloom.well.events import DeathRule, death_events, end_events, fate_events
from plateloom.well.stage import analyse_well

PIXEL_UM, INTERVAL_MIN, RIM_UM, MATCH_UM = 0.65, 5.0, 10.0, 12.0


def _inside(x: pd.Series, y: pd.Series, extent_um: tuple[float, float]) -> np.ndarray:
    return np.asarray(np.minimum.reduce([x, y, extent_um[1] - x, extent_um[0] - y]) >= RIM_UM)


def _matched(found: pd.DataFrame, planted: pd.DataFrame) -> int:
    used: set[int] = set()
    for frame, x, y in zip(found["frame"], found["x"], found["y"]):
        close = np.hypot(planted["x"] - x, planted["y"] - y) <= MATCH_UM
        near = planted[(abs(planted["frame"] - frame) <= 1) & close]
        near = near[~near.index.isin(used)]
        if len(near):
            used.add(near.index[0])
    return len(used)


def _scores(tmp_path, seed: int) -> dict[str, np.ndarray]:
    """(matched, found, planted) per event kind on one simulated site."""
    lapse = simulate_time_lapse(seed, TimeLapseSettings(speed_um_per_min=0.5, frames=16))
    folder = tmp_path / f"seed{seed}"
    folder.mkdir()
    tifffile.imwrite(folder / "B02_s1_nuclear.tif", lapse.images, photometric="minisblack")
    index = index_plate_images(str(folder), "{well}_s{site}_{channel}.tif", 96, ["nuclear"])
    settings = nuclear_only_settings(PIXEL_UM, frame_interval_min=INTERVAL_MIN)
    cells, _, _ = analyse_well(index, "B02", settings)
    found = fate_events(cells, settings.death_rule, INTERVAL_MIN).rename(columns={"x_um": "x", "y_um": "y"})
    n_frames, height, width = lapse.images.shape
    extent = (height * PIXEL_UM, width * PIXEL_UM)
    truth = lapse.cells.rename(columns={"x_um": "x", "y_um": "y"})
    divisions = (
        truth[truth["event"] == "division"]
        .groupby("parent")[["frame", "x", "y"]]
        .agg({"frame": "min", "x": "mean", "y": "mean"})
    )
    planted = {
        "division": divisions[divisions["frame"] <= n_frames - 2].reset_index(drop=True),
        "death": truth.loc[truth["event"] == "death", ["frame", "x", "y"]].reset_index(drop=True),
    }
    scores = {}
    for kind, true in planted.items():
        true = true[_inside(true["x"], true["y"], extent)]
        mine = found[found["event"] == kind]
        mine = mine[_inside(mine["x"], mine["y"], extent)]
        scores[kind] = np.array([_matched(mine, true), len(mine), len(true)])
    return scores


@pytest.mark.slow
def test_divisions_and_deaths_are_found_on_planted_time_lapses(tmp_path):
    # 24 seeded sites of 16 frames (5 min, 0.5 um/min). Measured when written: divisions precision
    # and recall 0.90 (37 of 41 found, 37 of 41 right), deaths 0.93 and 0.93 (26 of 28): the issue's
    # goal of 0.90 for both. At 1 um/min (not asserted): divisions 0.79/0.79, deaths 0.92/0.82.
    total = {"division": np.zeros(3, int), "death": np.zeros(3, int)}
    for seed in range(1, 49, 2):
        for kind, score in _scores(tmp_path, seed).items():
            total[kind] += score
    for kind, (matched, found, planted) in total.items():
        assert planted >= 25, (kind, planted)
        assert matched / found >= 0.9 and matched / planted >= 0.9, (kind, total[kind])


def test_divisions_and_deaths_are_found_on_two_planted_sites(tmp_path):
    total = {"division": np.zeros(3, int), "death": np.zeros(3, int)}
    for seed in (5, 7, 9):
        for kind, score in _scores(tmp_path, seed).items():
            total[kind] += score
    # Measured when written: divisions 6 found, 6 right, of 7 planted; deaths 5, 5, 5.
    assert total["division"][2] == 7 and total["death"][2] == 5, total
    assert total["division"][0] >= 5 and total["death"][0] >= 4, total
    assert all(matched >= found - 1 for matched, found, _ in total.values()), total


def _track(site, track, frames, intensity, area, edge=50.0, parent=-1, x=50.0):
    return pd.DataFrame(
        {
            "site": site,
            "track": track,
            "frame": frames,
            "parent_track": parent,
            "touches_border": False,
            "edge_distance_um": edge,
            "centroid_x_um": x,
            "centroid_y_um": 50.0,
            "area_um2": area,
            "mean_intensity_dna": intensity,
        }
    )


RULE = DeathRule(1.3, 0.75, 2.0, "dna", None, min_edge_distance_um=10.0, successor_distance_um=15.0)


def test_the_death_rule_calls_condensation_and_nothing_else():
    # Hand-built tracks on one site imaged for frames 0-9 (track 9 runs to the end):
    steady = [100.0] * 6
    cells = pd.concat(
        [
            _track(1, 0, range(8), steady + [140, 150], [50.0] * 6 + [35, 30]),  # condenses at frame 6: death
            _track(1, 1, range(8), steady + [140, 150], [50.0] * 8, x=200.0),  # brighter, not smaller: no
            _track(1, 2, range(8), steady + [100, 100], [50.0] * 6 + [30, 30], x=300.0),  # smaller only: no
            _track(1, 3, range(8), steady + [140, 150], [50.0] * 6 + [35, 30], edge=6.0, x=400.0),  # at edge
            _track(1, 4, range(8), steady + [140, 150], [50.0] * 6 + [35, 30], x=500.0),  # followed, below
            _track(1, 5, range(8, 10), [90.0, 90.0], [40.0, 40.0], x=505.0),  # starts 5 um away a frame later
            _track(1, 6, range(2), [100.0, 150.0], [50.0, 30.0], x=600.0),  # too short to judge
            _track(1, 9, range(10), [100.0] * 10, [50.0] * 10, x=700.0),
        ],
        ignore_index=True,
    )
    deaths = death_events(cells, RULE)
    assert deaths["track"].tolist() == [0]
    assert deaths["frame"].tolist() == [6]
    assert deaths["nuclear_ratio"].iloc[0] == pytest.approx(1.4) and deaths["area_ratio"].iloc[0] == pytest.approx(0.7)


def test_well_fate_rates_by_hand():
    # One well, one site, frames at 0, 10, 20 min with 4, 5, 6 nuclei: 15 nucleus-frames x 10 min =
    # 2.5 cell-hours. Tracks: one division, one death; a daughter born at 0 min that divides after
    # 20 min (duration 10 min + one interval) is a complete cycle of 20 min.
    counts = pd.DataFrame(
        {
            "well": "B02",
            "site": 1,
            "frame": [0, 1, 2],
            "time_min": [0.0, 10.0, 20.0],
            "observations": [4, 5, 6],
            "whole": [4, 5, 6],
        }
    )
    tracks = pd.DataFrame(
        {
            "well": "B02",
            "site": 1,
            "track": [0, 1, 2, 3],
            "parent_track": [-1, 7, -1, -1],
            "duration_min": [10.0, 10.0, 20.0, 20.0],
            "end_event": ["death", "division", "", ""],
        }
    )
    fate = well_fate(counts, tracks).loc["B02"]
    assert fate["cell_hours"] == pytest.approx(2.5)
    assert fate["n_divisions"] == 1 and fate["n_deaths"] == 1
    assert fate["division_rate_per_cell_h"] == pytest.approx(0.4)
    assert fate["death_rate_per_cell_h"] == pytest.approx(0.4)
    assert fate["died_fraction"] == pytest.approx(1 / (4 + 1))
    assert fate["cycle_time_min"] == pytest.approx(20.0)
    assert well_fate(counts, tracks.drop(columns="end_event")).empty


def test_a_well_without_events_writes_the_schema_of_a_well_with_events(tmp_path):
    # Found by the four-reader check: an empty text column became Arrow's null type in one well's file
    # and text in the others, so the folder no longer opened as one table.
    import pyarrow.parquet as pq

    from plateloom.io.tables import write_parquet

    quiet = _track(1, 0, range(4), [100.0] * 4, [50.0] * 4)
    dying = pd.concat([quiet, _track(1, 1, range(8), [100.0] * 6 + [140, 150], [50.0] * 6 + [35, 30], x=200.0)])
    for cells in (quiet, dying, quiet.iloc[:0]):
        events = fate_events(cells, RULE, 5.0)
        path = tmp_path / f"{len(cells)}.parquet"
        write_parquet(events.assign(plate="P1", well="A01"), str(path), {})
    schemas = {str(pq.read_schema(path).remove_metadata()) for path in tmp_path.glob("*.parquet")}
    assert len(schemas) == 1, schemas
    # the tracks' end_event, with tracks and events, with tracks and none, and without tracks
    tracks = pd.DataFrame({"track": [0, 1]})
    for name, table, events in (
        ("some", tracks, fate_events(dying, RULE, 5.0)),
        ("none", tracks, fate_events(quiet, RULE, 5.0)),
        ("empty", tracks.iloc[:0], fate_events(quiet, RULE, 5.0)),
    ):
        ended = table.assign(end_event=end_events(table, events), plate="P1", well="A01")
        write_parquet(ended, str(tmp_path / f"tracks_{name}.parquet"), {})
    schemas = {str(pq.read_schema(path).remove_metadata()) for path in tmp_path.glob("tracks_*.parquet")}
    assert len(schemas) == 1, schemas
