"""Well profiles: the well (not the cell) is the experimental unit, so cells are summarised per well."""

from __future__ import annotations

import glob
import os

import numpy as np
import pandas as pd
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from .collective import COUNT_COLUMNS
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
    codes, uniques = pd.factorize(cells["well"], sort=True)
    time_codes, times = pd.factorize(cells["time_min"].to_numpy(float), sort=True)
    counts = np.bincount(codes * len(times) + time_codes, minlength=len(uniques) * len(times)).reshape(len(uniques), -1)
    rates = {str(name): growth_rate_per_h(times, counts[i].astype(float)) for i, name in enumerate(np.asarray(uniques, dtype=object))}
    return pd.Series(rates, name="growth_rate_per_h", dtype=float)


# Columns of the cells table that the plate stage never reads (positions, ids, constant keys).
NOT_READ_FOR_PROFILES = ("plate", "object", "track", "parent_track", "centroid_x_um", "centroid_y_um", "chunk")


def _well_files(folders: list[str]) -> list[str]:
    files = sorted(glob.glob(os.path.join(folder, "well=*", "*.parquet")) for folder in folders)
    paths = [path for group in files for path in sorted(group)]
    if not paths:
        raise FileNotFoundError(f"no per-well tables under {folders}")
    return paths


def read_plate_dataset(folders: list[str], columns: list[str] | None = None) -> pd.DataFrame:
    """Read the per-well Parquet files under the given chunk folders (only ``columns`` if given).

    Files are read in sorted path order, so the row order is the same on every run.
    """
    return ds.dataset(_well_files(folders), format="parquet").to_table(columns=columns).to_pandas()


def read_cells_for_profiles(folders: list[str]) -> pd.DataFrame:
    """The cells tables of a plate with only the columns the plate stage needs (keys and features).

    Positions and object/track ids are not read. The files are read one at a time into arrays
    allocated once for the whole plate, so the peak memory stays near the size of the columns
    read (no second copy in Arrow's memory pool); the well column becomes a pandas Categorical.
    """
    paths = _well_files(folders)
    metadata = [pq.read_metadata(path) for path in paths]
    schema = pq.read_schema(paths[0])
    columns = [name for name in schema.names if name not in NOT_READ_FOR_PROFILES and name != "well"]
    total = sum(m.num_rows for m in metadata)
    arrays = {name: np.empty(total, dtype=schema.field(name).type.to_pandas_dtype()) for name in columns}
    well_codes = np.empty(total, np.int32)
    well_codes_by_name: dict[str, int] = {}
    start = 0
    for path, meta in zip(paths, metadata):
        table = pq.ParquetFile(path, read_dictionary=["well"]).read(columns=columns + ["well"], use_threads=True)
        stop = start + meta.num_rows
        for name in columns:
            arrays[name][start:stop] = table.column(name).to_numpy()
        well = table.column("well").combine_chunks()
        lookup = np.array([well_codes_by_name.setdefault(str(w), len(well_codes_by_name))
                           for w in well.dictionary.to_pylist()], np.int32)
        well_codes[start:stop] = lookup[well.indices.to_numpy()] if len(lookup) else 0
        start = stop
    cells = pd.DataFrame(arrays, copy=False)
    cells.insert(0, "well", pd.Categorical.from_codes(well_codes, categories=list(well_codes_by_name)))
    return cells


def _well_blocks(codes: np.ndarray, n_wells: int) -> tuple[np.ndarray, np.ndarray | None]:
    """Start of each well's rows (length n_wells + 1) and the row order that makes them contiguous
    (None when the rows already come well by well, as the per-well files are read)."""
    order = None
    if len(codes) > 1 and np.any(np.diff(codes) < 0):
        order = np.argsort(codes, kind="stable")
        codes = codes[order]
    return np.searchsorted(codes, np.arange(n_wells + 1)), order


def _column_summaries(cells: pd.DataFrame, keep: np.ndarray, codes: np.ndarray, names: list[str],
                      features: list[str], statistic: str) -> pd.DataFrame:
    """Per-well summary of every feature over the kept rows, well by well on contiguous blocks of rows.

    "median" is the median; "mean_log" is exp(mean(log)) for strictly positive features and the
    median for the others. NaN values are ignored. Memory: one well's block at a time.
    """
    if statistic not in ("median", "mean_log"):
        raise ValueError(f"unknown well summary {statistic!r}; use median or mean_log")
    bounds, order = _well_blocks(codes, len(names))
    columns = [cells[f].to_numpy(np.float64) for f in features]
    if order is not None:
        columns, keep = [c[order] for c in columns], keep[order]
    positive = [statistic == "mean_log" and bool(np.all(c[np.isfinite(c)] > 0)) for c in columns]
    result = np.full((len(names), len(features)), np.nan)
    for well in range(len(names)):
        rows = slice(bounds[well], bounds[well + 1])
        kept = keep[rows]
        if not kept.any():
            continue
        # one row per feature, so each median partitions contiguous memory
        block = np.stack([c[rows][kept] for c in columns]) if features else np.empty((0, int(kept.sum())))
        has_nan = np.isnan(block).any(axis=1)
        with np.errstate(all="ignore"):
            median = np.median(block, axis=1) if features else np.empty(0)
            for j in np.flatnonzero(has_nan | np.asarray(positive, bool)):
                finite = block[j][~np.isnan(block[j])]
                if not len(finite):
                    median[j] = np.nan
                else:
                    median[j] = np.exp(np.log(finite).mean()) if positive[j] else np.median(finite)
        result[well] = median
    return pd.DataFrame(result, columns=features, index=pd.Index(names, name="well"))


def summarise_wells(cells: pd.DataFrame, tracks: pd.DataFrame, layout: pd.DataFrame, plate: str, batch: str,
                    wells: int, statistic: str = "median") -> pd.DataFrame:
    """One row per analysed well: keys, layout, counts and the median of every feature.

    cell_count is the mean number of nuclei per site and frame, growth_rate_per_h the slope of
    log(nuclei per frame) against time; observation features are summarised over
    observations not touching the image border; speed and straightness over tracks with
    enough frames (see tracking.min_track_frames). ``statistic`` is "median" or "mean_log"
    (exp of the mean of natural logs, for skewed positive features; features with
    non-positive values fall back to the median). Works column by column on integer well
    codes, so memory stays near the size of the table read.
    """
    fmt = plate_format(wells)
    codes, uniques = pd.factorize(cells["well"], sort=True)
    names = [str(name) for name in np.asarray(uniques, dtype=object)]
    n_wells = len(names)
    whole = ~cells["touches_border"].to_numpy(bool)
    medians = _column_summaries(cells, whole, codes, names, observation_features(list(cells.columns)), statistic)
    site, frame = cells["site"].to_numpy(np.int64), cells["frame"].to_numpy(np.int64)
    n_site, n_frame = int(site.max(initial=0)) + 1, int(frame.max(initial=0)) + 1
    per_site_frame = np.bincount((codes.astype(np.int64) * n_site + site) * n_frame + frame,
                                 minlength=n_wells * n_site * n_frame).reshape(n_wells, n_site, n_frame)
    present = per_site_frame > 0
    counts = pd.DataFrame({
        "cell_count": per_site_frame.sum(axis=(1, 2)) / np.maximum(present.sum(axis=(1, 2)), 1),
        "n_observations": np.bincount(codes, minlength=n_wells),
        "n_sites": present.any(axis=2).sum(axis=1),
        "n_frames": present.any(axis=1).sum(axis=1),
    }, index=pd.Index(names, name="well"))
    usable = tracks[tracks["speed_um_per_min"].notna() & ~tracks["touches_border"]]
    track_codes, track_wells = pd.factorize(usable["well"], sort=True)
    motion = _column_summaries(usable, np.ones(len(usable), bool), track_codes,
                               [str(w) for w in np.asarray(track_wells, dtype=object)],
                               track_feature_columns(list(tracks.columns)), statistic)
    growth = well_growth_rates(cells)
    n_tracks = usable.groupby("well", observed=True).size().rename("n_tracks")
    n_tracks.index = n_tracks.index.astype(str)
    analysed = layout[layout["role"] != "empty"].set_index("well")
    profile = analysed.join([counts[["cell_count"]], growth, counts[["n_observations", "n_sites", "n_frames"]],
                             n_tracks, medians, motion], how="left")
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
             "cell_count_outlier", "fraction_observations_used", *COUNT_COLUMNS}
    derived = ("_robust_z", "_percent_of_control", "_b_score", "_uncorrected")
    return [c for c in profile.columns if c not in fixed and not c.endswith(derived)]
