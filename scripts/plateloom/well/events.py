"""Cell fate events per track: divisions and deaths, each with its frame and the measures behind it.

A division is a mother track whose daughters were linked by ``divisions.find_divisions`` (its
rounding confirmed there). A death is a track that ends early, away from the border, without
daughters, after its nucleus condenses (shrinks and brightens: pyknosis) or its reporter jumps: the signs a
time-lapse of a nuclear stain shows when a cell dies (common practice in live-cell fate calls;
the thresholds are config ``fate``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

# A daughter starts about one nuclear diameter from its mother's centre: the default reach of a
# division link, and how close a new track must start to a track's end to explain it as one.
DAUGHTER_REACH_DIAMETERS = 1.25

EVENT_COLUMNS = (
    "site",
    "track",
    "event",
    "frame",
    "time_min",
    "x_um",
    "y_um",
    "nuclear_ratio",
    "area_ratio",
    "reporter_ratio",
)


@dataclass(frozen=True)
class DeathRule:
    """A track dies if in one of its last two frames (ratios to its median before them) its nucleus
    condenses (mean intensity >= ``min_brightening`` and area <= ``max_area_ratio``), or its reporter
    (``reporter_channel``, if any) >= ``min_reporter_ratio``; and no track starts within
    ``successor_distance_um`` of its end in the next two frames (a mitotic nucleus also condenses:
    a new track there is an unlinked division or a re-segmented cell, not a death)."""

    min_brightening: float
    max_area_ratio: float
    min_reporter_ratio: float
    nuclei_channel: str
    reporter_channel: str | None = None
    min_edge_distance_um: float = 10.0  # the track's last centroid at least this far from the field's edge
    successor_distance_um: float = 15.0  # no track starts this close in the next two frames (a division)


def division_distance_um(config: dict) -> float | None:
    """Largest distance (um) of a daughter's start from its mother, or None when divisions are not
    called (config ``fate.divisions`` off, or frames further apart than
    ``fate.max_division_frame_interval_min``). Default 1.25 nuclear diameters: a daughter starts
    about one diameter from the mother's centre."""
    fate, interval = config["fate"], config["images"]["frame_interval_min"]
    if not fate["divisions"] or (interval is not None and interval > fate["max_division_frame_interval_min"]):
        return None
    chosen = config["tracking"]["division_max_distance_um"]
    return float(chosen) if chosen else DAUGHTER_REACH_DIAMETERS * float(config["segmentation"]["nucleus_diameter_um"])


def _ratios_to_median_before(sorted_cells: pd.DataFrame, column: str, keys: list[str]) -> pd.Series:
    """Per observation: its value over its track's median before the track's last two frames
    (NaN where that median is missing or not positive)."""
    from_end = sorted_cells.groupby(keys, sort=False).cumcount(ascending=False)
    values = sorted_cells[column].astype(float)
    baseline = values.where(from_end >= 2).groupby([sorted_cells[k] for k in keys], sort=False).transform("median")
    return (values / baseline).where(baseline > 0)


KEYS = ["site", "track"]


@dataclass(frozen=True)
class _Measured:
    """One well's observations in track order and, per observation, its ratios to its track's median
    before the track's last two frames (nuclear intensity, area, reporter; NaN without one)."""

    ordered: pd.DataFrame
    nuclear: pd.Series
    area: pd.Series
    reporter: pd.Series


def _measured(cells: pd.DataFrame, rule: DeathRule) -> _Measured:
    ordered = cells.sort_values(KEYS + ["frame"], kind="stable")
    reporter = (
        _ratios_to_median_before(ordered, f"mean_intensity_{rule.reporter_channel}", KEYS)
        if rule.reporter_channel
        else pd.Series(np.nan, index=ordered.index)
    )
    return _Measured(
        ordered,
        _ratios_to_median_before(ordered, f"mean_intensity_{rule.nuclei_channel}", KEYS),
        _ratios_to_median_before(ordered, "area_um2", KEYS),
        reporter,
    )


def death_events(cells: pd.DataFrame, rule: DeathRule) -> pd.DataFrame:
    """Deaths in the observations of one well (see ``DeathRule`` and the module docstring).

    ``cells`` needs site, track, frame, parent_track, touches_border, centroid_x_um, centroid_y_um,
    area_um2, mean_intensity_<nuclei channel> (and of the reporter channel, if the rule has one).
    The event's frame is the first of the last two frames that shows a sign.
    """
    return _deaths(_measured(cells, rule), rule)


def _deaths(measured: _Measured, rule: DeathRule) -> pd.DataFrame:
    ordered, nuclear, area, reporter = measured.ordered, measured.nuclear, measured.area, measured.reporter
    last_frame = ordered.groupby("site")["frame"].transform("max")
    grouped = ordered.groupby(KEYS, sort=False)
    length, end = grouped["frame"].transform("size"), grouped["frame"].transform("max")
    mothers = pd.MultiIndex.from_frame(ordered.loc[ordered["parent_track"] >= 0, ["site", "parent_track"]])
    is_mother = pd.Series(pd.MultiIndex.from_frame(ordered[KEYS]).isin(mothers), index=ordered.index)
    at_edge = ordered["touches_border"].astype(bool)
    if "edge_distance_um" in ordered.columns:
        at_edge = at_edge | (ordered["edge_distance_um"] < rule.min_edge_distance_um)
    end_at_edge = at_edge.groupby([ordered[k] for k in KEYS], sort=False).transform("last").astype(bool)
    candidate = (length >= 3) & (end < last_frame) & ~is_mother & ~end_at_edge
    in_tail = grouped.cumcount(ascending=False) < 2
    condensed = (nuclear >= rule.min_brightening) & (area <= rule.max_area_ratio)
    sign = condensed | (reporter >= rule.min_reporter_ratio)
    hits = ordered[candidate & in_tail & sign].drop_duplicates(KEYS, keep="first")
    ends = ordered.drop_duplicates(KEYS, keep="last").set_index(KEYS).loc[pd.MultiIndex.from_frame(hits[KEYS])]
    succeeded = _followed_by_a_start(ordered, ends, rule.successor_distance_um)
    return _event_rows(hits[~succeeded], "death", nuclear, area, reporter)


def _followed_by_a_start(ordered: pd.DataFrame, ends: pd.DataFrame, distance_um: float) -> np.ndarray:
    """For each track end (rows of ``ends``, indexed by site and track): does another track start
    within ``distance_um`` of it one or two frames later?"""
    if ends.empty:
        return np.zeros(0, bool)
    starts = ordered.drop_duplicates(["site", "track"], keep="first")
    starts = starts[starts["frame"] > starts.groupby("site")["frame"].transform("min")]
    ended = ends.reset_index()[["site", "track", "frame", "centroid_x_um", "centroid_y_um"]]
    pairs = ended.reset_index().merge(
        starts[["site", "frame", "centroid_x_um", "centroid_y_um"]], on="site", suffixes=("", "_start")
    )
    gap = pairs["frame_start"] - pairs["frame"]
    near = np.hypot(
        pairs["centroid_x_um_start"] - pairs["centroid_x_um"], pairs["centroid_y_um_start"] - pairs["centroid_y_um"]
    )
    followed = pairs.loc[(gap >= 1) & (gap <= 2) & (near <= distance_um), "index"].unique()
    return np.isin(np.arange(len(ended)), followed)


def division_events(cells: pd.DataFrame, rule: DeathRule) -> pd.DataFrame:
    """Divisions in the observations of one well: one row per mother (parent_track of daughters),
    at its last frame, with the frame of the division (the daughters' first) and the mother's
    rounding (nuclear mean intensity in its last frame over its track's median before)."""
    return _divisions(_measured(cells, rule))


def _divisions(measured: _Measured) -> pd.DataFrame:
    ordered = measured.ordered
    daughters = ordered[ordered["parent_track"] >= 0]
    first_of_daughters = daughters.groupby(["site", "parent_track"])["frame"].min()
    last = ordered.drop_duplicates(KEYS, keep="last")
    mothers = last[pd.MultiIndex.from_frame(last[KEYS]).isin(first_of_daughters.index)]
    no_reporter = pd.Series(np.nan, index=ordered.index)
    rows = _event_rows(mothers, "division", measured.nuclear, measured.area, no_reporter)
    rows["frame"] = first_of_daughters.reindex(pd.MultiIndex.from_frame(mothers[KEYS])).to_numpy(np.int64)
    return rows


def _event_rows(
    rows: pd.DataFrame, event: str, nuclear: pd.Series, area: pd.Series, reporter: pd.Series
) -> pd.DataFrame:
    return pd.DataFrame(
        {
            "site": rows["site"].to_numpy(np.int64),
            "track": rows["track"].to_numpy(np.int64),
            "event": event,
            "frame": rows["frame"].to_numpy(np.int64),
            "time_min": np.nan,
            "x_um": rows["centroid_x_um"].to_numpy(float),
            "y_um": rows["centroid_y_um"].to_numpy(float),
            "nuclear_ratio": nuclear.loc[rows.index].to_numpy(float),
            "area_ratio": area.loc[rows.index].to_numpy(float),
            "reporter_ratio": reporter.loc[rows.index].to_numpy(float),
        },
        columns=list(EVENT_COLUMNS),
    )


def fate_events(cells: pd.DataFrame, rule: DeathRule, frame_interval_min: float) -> pd.DataFrame:
    """Every division and death of one well's tracks, ordered by site, frame and track."""
    if cells.empty:
        return pd.DataFrame({c: pd.Series(dtype=_dtype(c)) for c in EVENT_COLUMNS})
    measured = _measured(cells, rule)
    events = pd.concat([_divisions(measured), _deaths(measured, rule)], ignore_index=True)
    events["time_min"] = events["frame"] * frame_interval_min
    return events.sort_values(["site", "frame", "track"], kind="stable").reset_index(drop=True)


def _dtype(column: str) -> str:
    return {"site": "int64", "track": "int64", "frame": "int64", "event": "object"}.get(column, "float64")


def end_events(tracks: pd.DataFrame, events: pd.DataFrame) -> pd.Series:
    """Per track: how it ends ("division", "death" or "" when it is still seen at the last frame,
    leaves the field or is lost)."""
    ended = tracks["track"].map(events.set_index("track")["event"])
    return pd.Series(np.where(ended.notna(), ended, ""), index=tracks.index, dtype=object)
