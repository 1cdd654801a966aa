"""Well time courses: every observation feature of a well summarised per time window.

A live-cell well is imaged for hours; its profile (one median over all frames) says how much a
treatment changed the cells, its time course says when. Time is cut into windows of a fixed
length (``kinetics.window_min``) counted from the time origin: the first frame, or the
treatment when the screen sheet gives ``treatment_time_min`` for the plate. A window's value is
the median of the observations in it that do not touch the image border (as for the profile),
and its cell count the mean number of nuclei per site and frame in it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.columns import KEY_COLUMNS
from plateloom.plate.summaries import block_summaries

# Keys copied from the well profile to every row of the time course, so the screen stage selects
# wells and designs its model from this table alone.
PROFILE_KEYS = (*KEY_COLUMNS, "excluded_by", "plate_excluded_by", "n_sites")


@dataclass(frozen=True)
class TimeWindows:
    """How a plate's time is cut: window length (min), the origin (minutes since the first frame)
    and its name ("first_frame" or "treatment"), and the largest drift of a negative-control
    feature over the run (|natural-log ratio| of the last to the first window) before the plate
    report flags it."""

    window_min: float
    origin_min: float = 0.0
    origin_name: str = "first_frame"
    max_control_drift: float = 0.2


WINDOW_COLUMNS = ("window", "window_start_min", "window_end_min", "time_origin", "n_frames", "n_observations")


def window_index(time_min: np.ndarray, window_min: float, origin_min: float = 0.0) -> np.ndarray:
    """Window number of each time (minutes): floor((t - origin) / window_min); -1 for a time
    before the origin or unknown (NaN)."""
    if not window_min > 0:
        raise ValueError(f"kinetics.window_min must be positive, got {window_min}")
    relative = (np.asarray(time_min, float) - origin_min) / window_min
    with np.errstate(invalid="ignore"):
        number = np.floor(relative)
    return np.where(np.isfinite(number) & (number >= 0), number, -1).astype(np.int64)


def window_medians(block: np.ndarray, times: np.ndarray, window_min: float, origin_min: float = 0.0):
    """Per time window of one well: (window numbers, medians (windows x features), observations).

    ``block`` is (features, observations) of the kept observations and ``times`` their times in
    minutes; NaN values are ignored as in the well profile. ``block`` is not changed.
    """
    window = window_index(times, window_min, origin_min)
    numbers = np.unique(window[window >= 0])
    medians = np.full((len(numbers), block.shape[0]), np.nan)
    counts = np.zeros(len(numbers), np.int64)
    no_log = np.zeros(block.shape[0], bool)
    for i, number in enumerate(numbers):
        inside = window == number
        counts[i] = int(inside.sum())
        medians[i] = block_summaries(block[:, inside], no_log)  # boolean indexing copies
    return numbers, medians, counts


def window_table(parts: list[tuple[str, np.ndarray, np.ndarray, np.ndarray]], features: list[str]) -> pd.DataFrame:
    """One row per (well, window) from ``window_medians`` results tagged with their well."""
    rows = [
        pd.DataFrame(medians, columns=features).assign(well=well, window=numbers, n_observations=counts)
        for well, numbers, medians, counts in parts
        if len(numbers)
    ]
    if not rows:
        return pd.DataFrame(columns=["well", "window", "n_observations", *features])
    return pd.concat(rows, ignore_index=True)


def window_cell_counts(counts: pd.DataFrame, window_min: float, origin_min: float = 0.0) -> pd.DataFrame:
    """Per (well, window) of an ``observation_counts`` table: cell_count (mean nuclei per site and
    frame) and n_frames (frames with observations)."""
    window = window_index(counts["time_min"].to_numpy(float), window_min, origin_min)
    inside = counts.assign(window=window)[window >= 0]
    grouped = inside.groupby(["well", "window"], observed=True)
    table = pd.DataFrame({"cell_count": grouped["observations"].mean(), "n_frames": grouped["frame"].nunique()})
    table = table.reset_index()
    table["well"] = table["well"].astype(str)
    return table


def time_course_table(
    windows: pd.DataFrame,
    cell_counts: pd.DataFrame,
    profile: pd.DataFrame,
    window_min: float,
    origin_name: str,
) -> pd.DataFrame:
    """The plate's time-course table: profile keys, window columns, cell_count and the window
    medians of every observation feature, one row per (well, window), sorted by well and window.

    ``origin_name`` is "first_frame" or "treatment"; the window columns count minutes from it.
    """
    windows = windows.assign(well=windows["well"].astype(str))
    table = cell_counts.merge(windows, on=["well", "window"], how="left")
    table["n_observations"] = table["n_observations"].fillna(0).astype(np.int64)
    keys = profile[[c for c in PROFILE_KEYS if c in profile.columns]].assign(well=lambda t: t["well"].astype(str))
    table = keys.merge(table, on="well", how="inner").sort_values(["well", "window"], kind="stable")
    table["window_start_min"] = table["window"] * window_min  # minutes from the origin
    table["window_end_min"] = table["window_start_min"] + window_min
    table["time_origin"] = origin_name
    features = [c for c in windows.columns if c not in ("well", "window", "n_observations")]
    front = [c for c in PROFILE_KEYS if c in table.columns] + list(WINDOW_COLUMNS) + ["cell_count"]
    return table[front + features].reset_index(drop=True)


def control_drift(table: pd.DataFrame, features: list[str]) -> pd.DataFrame:
    """Per feature: the median over kept negative-control wells of each window, and the drift
    between the first and the last window as a natural-log ratio (positive features) or in
    control-median units (others), for the plate report."""
    kept = table["excluded_by"].fillna("") == "" if "excluded_by" in table.columns else True
    controls = table[(table["role"] == "negative_control") & kept]
    if controls.empty:
        return pd.DataFrame(columns=["feature", "first", "last", "log_ratio"])
    medians = controls.groupby("window_start_min")[features].median().sort_index()
    first, last = medians.iloc[0], medians.iloc[-1]
    with np.errstate(divide="ignore", invalid="ignore"):
        log_ratio = np.where((first > 0) & (last > 0), np.log(last / first), np.nan)
    return pd.DataFrame(
        {"feature": features, "first": first.to_numpy(), "last": last.to_numpy(), "log_ratio": log_ratio}
    )


def observation_windows(cells: pd.DataFrame, features: list[str], windows: TimeWindows) -> pd.DataFrame:
    """``window_table`` of a cells table held in memory (observations touching the border left out)."""
    whole = cells[~cells["touches_border"].to_numpy(bool)]
    parts = []
    for well, rows in whole.groupby(whole["well"].astype(str), sort=True, observed=True):
        block = np.ascontiguousarray(rows[features].to_numpy(np.float64).T)
        times = rows["time_min"].to_numpy(float)
        parts.append((str(well), *window_medians(block, times, windows.window_min, windows.origin_min)))
    return window_table(parts, features)


def drift_notes(table: pd.DataFrame, features: list[str], windows: TimeWindows) -> list[str]:
    """Plate-report warnings for negative-control features that drift over the run by more than
    ``windows.max_control_drift`` (natural-log ratio of the last to the first window)."""
    drift = control_drift(table, features)
    drifting = drift[np.abs(drift["log_ratio"]) > windows.max_control_drift]
    if drifting.empty:
        return []
    listed = ", ".join(f"{row.feature} x{np.exp(row.log_ratio):.2f}" for row in drifting.itertuples())
    return [
        f"negative controls drift over the run (last window / first window): {listed}; over "
        f"kinetics.max_control_drift = {windows.max_control_drift:g} (natural-log ratio). Effects over "
        "time are measured against controls of the same window, but a drift this large points to focus, "
        "bleaching, medium or temperature changes: look at the control time courses below"
    ]
