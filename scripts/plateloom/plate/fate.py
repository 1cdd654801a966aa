"""Per-well fate rates: cell-hours observed, divisions and deaths per cell-hour, cycle time.

The events come from the tracks table's ``end_event`` (plateloom.well.events); the exposure is the
nuclei seen per site-frame times the frame interval, so a rate is events per hour of one cell
being watched (the usual person-time rate of epidemiology, here cell-time).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

FATE_COLUMNS = (
    "cell_hours",
    "n_divisions",
    "n_deaths",
    "division_rate_per_cell_h",
    "death_rate_per_cell_h",
    "died_fraction",
    "cycle_time_min",
)


def frame_interval_min(counts: pd.DataFrame) -> float:
    """The frame interval (min): the median step between the distinct imaging times; NaN with one."""
    times = np.unique(counts["time_min"].dropna().to_numpy(float)) if "time_min" in counts else np.array([])
    return float(np.median(np.diff(times))) if len(times) > 1 else float("nan")


def well_fate(counts: pd.DataFrame, tracks: pd.DataFrame) -> pd.DataFrame:
    """One row per well with a count: the FATE_COLUMNS (see the README's outputs for units).

    ``counts``: observations per well, site and frame (``observation_counts``); ``tracks``: the
    tracks table with well, site, track, parent_track, duration_min and end_event. cell_hours =
    nuclei summed over site-frames x frame interval / 60. died_fraction = deaths / (nuclei in
    each site's first frame + divisions), the cells that could have died. cycle_time_min = median
    over complete cycles (a daughter that divides again) of birth to division. No rows when the
    tracks carry no end_event (results from before events were recorded).
    """
    if "end_event" not in tracks.columns or counts.empty:
        return pd.DataFrame(columns=list(FATE_COLUMNS), index=pd.Index([], name="well"))
    interval = frame_interval_min(counts)
    observations = counts.assign(well=counts["well"].astype(str))
    exposure = observations.groupby("well")["observations"].sum() * interval / 60.0
    first_frame = observations.groupby(["well", "site"])["frame"].transform("min")
    at_start = observations[observations["frame"] == first_frame].groupby("well")["observations"].sum()
    ends = tracks.assign(well=tracks["well"].astype(str))
    divisions = (ends["end_event"] == "division").groupby(ends["well"]).sum()
    deaths = (ends["end_event"] == "death").groupby(ends["well"]).sum()
    complete = ends[(ends["parent_track"] >= 0) & (ends["end_event"] == "division")]
    cycle = (complete["duration_min"] + interval).groupby(complete["well"]).median()
    fate = pd.DataFrame({"cell_hours": exposure})
    fate["n_divisions"] = divisions.reindex(fate.index).fillna(0).astype(np.int64)
    fate["n_deaths"] = deaths.reindex(fate.index).fillna(0).astype(np.int64)
    hours = fate["cell_hours"].where(fate["cell_hours"] > 0)
    fate["division_rate_per_cell_h"] = fate["n_divisions"] / hours
    fate["death_rate_per_cell_h"] = fate["n_deaths"] / hours
    could_die = at_start.reindex(fate.index).fillna(0) + fate["n_divisions"]
    fate["died_fraction"] = fate["n_deaths"] / could_die.where(could_die > 0)
    fate["cycle_time_min"] = cycle.reindex(fate.index)
    fate.index.name = "well"
    return fate[list(FATE_COLUMNS)]
