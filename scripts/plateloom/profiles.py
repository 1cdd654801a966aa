"""Well profiles: the well (not the cell) is the experimental unit, so cells are summarised per well."""

from __future__ import annotations

import glob
import os

import numpy as np
import pandas as pd
import pyarrow.dataset as ds

from .plate_formats import is_edge_well, parse_well, plate_format
from .trackstats import growth_rate_per_h

TRACK_FEATURES = ("speed_um_per_min", "straightness", "walk_speed_um_per_min", "persistence_time_min")
REPORTER_TRACK_PREFIXES = ("track_mean_", "track_cv_", "period_min_", "peaks_per_h_", "max_rate_per_min_")
NON_FEATURE_COLUMNS = ("plate", "well", "site", "frame", "time_min", "object", "track", "parent_track", "touches_border",
                       "centroid_x_um", "centroid_y_um", "chunk")


def observation_features(columns: list[str]) -> list[str]:
    """The measured per-observation features among a cells table's columns."""
    return [c for c in columns if c not in NON_FEATURE_COLUMNS]


def track_feature_columns(columns: list[str]) -> list[str]:
    """The per-track features summarised per well: motility, walk fit, reporter dynamics."""
    return [c for c in columns if c in TRACK_FEATURES or c.startswith(REPORTER_TRACK_PREFIXES)]


def well_growth_rates(cells: pd.DataFrame) -> pd.Series:
    """Per well: exponential growth rate of the nucleus count (1/h), from counts summed over sites per frame."""
    if "time_min" not in cells.columns or cells.empty:
        return pd.Series(dtype=float, name="growth_rate_per_h")
    counts = cells.groupby(["well", "time_min"]).size().reset_index(name="count")
    rates = {well: growth_rate_per_h(group["time_min"].to_numpy(float), group["count"].to_numpy(float))
             for well, group in counts.groupby("well")}
    return pd.Series(rates, name="growth_rate_per_h", dtype=float)


def read_plate_dataset(folders: list[str], columns: list[str] | None = None) -> pd.DataFrame:
    """Read the per-well Parquet files under the given chunk folders (only ``columns`` if given).

    Files are read in sorted path order, so the row order is the same on every run.
    """
    files = sorted(glob.glob(os.path.join(folder, "well=*", "*.parquet")) for folder in folders)
    paths = [path for group in files for path in sorted(group)]
    if not paths:
        raise FileNotFoundError(f"no per-well tables under {folders}")
    return ds.dataset(paths, format="parquet").to_table(columns=columns).to_pandas()


def _summary(table: pd.DataFrame, features: list[str], statistic: str) -> pd.DataFrame:
    grouped = table.groupby("well")[features]
    if statistic == "median":
        return grouped.median()
    if statistic != "mean_log":
        raise ValueError(f"unknown well summary {statistic!r}; use median or mean_log")
    positive = [f for f in features if (table[f].dropna() > 0).all()]
    summary = grouped.median()
    if positive:
        summary[positive] = np.exp(np.log(table[positive]).groupby(table["well"]).mean())
    return summary


def summarise_wells(cells: pd.DataFrame, tracks: pd.DataFrame, layout: pd.DataFrame, plate: str, batch: str,
                    wells: int, statistic: str = "median") -> pd.DataFrame:
    """One row per analysed well: keys, layout, counts and the median of every feature.

    cell_count is the mean number of nuclei per site and frame, growth_rate_per_h the slope of
    log(nuclei per frame) against time; observation features are
    summarised over observations not touching the image border; speed and straightness over
    tracks with enough frames (see tracking.min_track_frames). ``statistic`` is "median" or
    "mean_log" (exp of the mean of natural logs, for skewed positive features; features
    with non-positive values fall back to the median).
    """
    fmt = plate_format(wells)
    whole = cells[~cells["touches_border"]]
    features = observation_features(list(cells.columns))
    medians = _summary(whole, features, statistic)
    per_frame = cells.groupby(["well", "site", "frame"]).size().groupby("well").mean().rename("cell_count")
    n_obs = cells.groupby("well").size().rename("n_observations")
    sites = cells.groupby("well")["site"].nunique().rename("n_sites")
    frames = cells.groupby("well")["frame"].nunique().rename("n_frames")
    usable = tracks[tracks["speed_um_per_min"].notna() & ~tracks["touches_border"]]
    motion = _summary(usable, track_feature_columns(list(tracks.columns)), statistic)
    growth = well_growth_rates(cells)
    n_tracks = usable.groupby("well").size().rename("n_tracks")
    analysed = layout[layout["role"] != "empty"].set_index("well")
    profile = analysed.join([per_frame, growth, n_obs, sites, frames, n_tracks, medians, motion], how="left")
    profile["cell_count"] = profile["cell_count"].fillna(0.0)
    for column in ("n_observations", "n_tracks"):
        profile[column] = profile[column].fillna(0).astype(np.int64)
    profile = profile.reset_index()
    position = np.array([parse_well(w) for w in profile["well"]]).reshape(-1, 2)
    profile.insert(0, "plate", plate)
    profile.insert(1, "batch", batch)
    profile.insert(3, "row", position[:, 0] + 1)
    profile.insert(4, "column", position[:, 1] + 1)
    profile.insert(5, "is_edge", [is_edge_well(w, fmt) for w in profile["well"]])
    return profile


def well_features(profile: pd.DataFrame) -> list[str]:
    """The feature columns of a well-profile table (cell_count, medians, motility)."""
    fixed = {"plate", "batch", "well", "row", "column", "is_edge", "role", "condition", "dose", "dose_unit",
             "treatment", "n_observations", "n_sites", "n_frames", "n_tracks", "excluded_by", "plate_excluded_by",
             "cell_count_outlier", "fraction_observations_used"}
    derived = ("_robust_z", "_percent_of_control", "_b_score", "_uncorrected")
    return [c for c in profile.columns if c not in fixed and not c.endswith(derived)]
