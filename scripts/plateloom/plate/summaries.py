"""Well profiles: the well (not the cell) is the experimental unit, so cells are summarised per well."""

from __future__ import annotations

import glob
import os

import numpy as np
import pandas as pd
import pyarrow.dataset as ds

from plateloom.columns import OBJECT_IDS_AND_POSITIONS, observation_features, track_features
from plateloom.setup.plate_formats import PlateFormat, is_edge_well, parse_well, plate_format
from plateloom.well.track_stats import growth_rate_per_h


# columns of the cells table never read for the well summaries (keys of other tables, positions)
def well_growth_rates(counts: pd.DataFrame) -> pd.Series:
    """Per well: exponential growth rate of the nucleus count (1/h), from counts summed over sites per frame.

    ``counts`` is an ``observation_counts`` table (observations per well, site and frame with its time).
    """
    times_known = counts["time_min"].notna().to_numpy() if "time_min" in counts.columns else np.zeros(len(counts), bool)
    if not times_known.any():
        return pd.Series(dtype=float, name="growth_rate_per_h")
    counts = counts[times_known]
    codes, uniques = pd.factorize(counts["well"], sort=True)
    time_codes, times = pd.factorize(counts["time_min"].to_numpy(float), sort=True)
    totals = np.bincount(
        codes * len(times) + time_codes, counts["observations"].to_numpy(float), minlength=len(uniques) * len(times)
    ).reshape(len(uniques), -1)
    rates = {str(name): growth_rate_per_h(times, totals[i]) for i, name in enumerate(np.asarray(uniques, dtype=object))}
    return pd.Series(rates, name="growth_rate_per_h", dtype=float)


COUNT_COLUMNS_OF_OBSERVATIONS = ("well", "site", "frame", "time_min", "observations", "whole")


def observation_counts(cells: pd.DataFrame) -> pd.DataFrame:
    """Observations per well, site and frame: columns well, site, frame, time_min (NaN when the
    table has no times), observations and whole (those not touching the image border)."""
    keys = cells[["well", "site", "frame"]].copy()
    keys["well"] = keys["well"].astype(str)
    keys["time_min"] = cells["time_min"].to_numpy(float) if "time_min" in cells.columns else np.nan
    keys["whole"] = ~cells["touches_border"].to_numpy(bool)
    grouped = keys.groupby(["well", "site", "frame", "time_min"], sort=True, dropna=False)["whole"]
    counts = grouped.agg(observations="size", whole="sum").reset_index()
    return counts.astype({"site": np.int64, "frame": np.int64, "observations": np.int64, "whole": np.int64})


# Columns of the cells table that the plate stage never reads (positions, ids, constant keys).
NOT_READ_FOR_PROFILES = ("plate", "chunk", *OBJECT_IDS_AND_POSITIONS)


def well_files(folders: list[str]) -> list[str]:
    files = sorted(glob.glob(os.path.join(folder, "well=*", "*.parquet")) for folder in folders)
    paths = [path for group in files for path in sorted(group)]
    if not paths:
        raise FileNotFoundError(f"no per-well tables under {folders}")
    return paths


def read_plate_dataset(folders: list[str], columns: list[str] | None = None) -> pd.DataFrame:
    """Read the per-well Parquet files under the given chunk folders (only ``columns`` if given).

    Files are read in sorted path order, so the row order is the same on every run.
    """
    return ds.dataset(well_files(folders), format="parquet").to_table(columns=columns).to_pandas()


def _well_blocks(codes: np.ndarray, n_wells: int) -> tuple[np.ndarray, np.ndarray | None]:
    """Start of each well's rows (length n_wells + 1) and the row order that makes them contiguous
    (None when the rows already come well by well, as the per-well files are read)."""
    order = None
    if len(codes) > 1 and np.any(np.diff(codes) < 0):
        order = np.argsort(codes, kind="stable")
        codes = codes[order]
    return np.searchsorted(codes, np.arange(n_wells + 1)), order


def block_summaries(block: np.ndarray, use_log: np.ndarray) -> np.ndarray:
    """Per row of a (features, observations) block: the median, or exp(mean(log)) where ``use_log``;
    NaN values ignored, NaN when a row has no finite value; the same values as ``np.median``.
    ``block`` is reordered in place (partitioned around its middle)."""
    features, n = block.shape
    if n == 0:
        return np.full(features, np.nan)
    high = n // 2
    # one partition point (several make numpy's partition several times slower); for an even
    # count the lower middle value is the largest of the lower part
    block.partition(high, axis=1)
    summary = block[:, high].copy() if n % 2 else (block[:, :high].max(axis=1) + block[:, high]) / 2
    has_nan = np.isnan(block[:, high:]).any(axis=1)  # NaN sorts last: any NaN lies at or above ``high``
    with np.errstate(all="ignore"):
        for j in np.flatnonzero(has_nan | use_log):
            finite = block[j][~np.isnan(block[j])]
            if not len(finite):
                summary[j] = np.nan
            else:
                summary[j] = np.exp(np.log(finite).mean()) if use_log[j] else np.median(finite)
    return summary


def check_statistic(statistic: str) -> None:
    if statistic not in ("median", "mean_log"):
        raise ValueError(f"unknown well summary {statistic!r}; use median or mean_log")


def _column_summaries(
    cells: pd.DataFrame, keep: np.ndarray, codes: np.ndarray, names: list[str], features: list[str], statistic: str
) -> pd.DataFrame:
    """Per-well summary of every feature over the kept rows, well by well on contiguous blocks of rows.

    "median" is the median; "mean_log" is exp(mean(log)) for strictly positive features and the
    median for the others. NaN values are ignored. Memory: one well's block at a time.
    """
    check_statistic(statistic)
    bounds, order = _well_blocks(codes, len(names))
    columns = [cells[f].to_numpy(np.float64) for f in features]
    if order is not None:
        columns, keep = [c[order] for c in columns], keep[order]
    use_log = np.array([statistic == "mean_log" and bool(np.all(c[np.isfinite(c)] > 0)) for c in columns], bool)

    def summarise(well: int) -> np.ndarray:
        rows = slice(bounds[well], bounds[well + 1])
        kept = keep[rows]
        if not kept.any():
            return np.full(len(features), np.nan)
        # one row per feature, so each median partitions contiguous memory
        return block_summaries(
            np.stack([c[rows][kept] for c in columns]) if features else np.empty((0, int(kept.sum()))), use_log
        )

    result = np.array([summarise(well) for well in range(len(names))]).reshape(len(names), len(features))
    return pd.DataFrame(result, columns=features, index=pd.Index(names, name="well"))


def observation_summaries(cells: pd.DataFrame, statistic: str = "median") -> pd.DataFrame:
    """Per well (index ``well``): the summary of every observation feature of a cells table over the
    observations not touching the image border (see ``summarise_wells`` for ``statistic``)."""
    codes, uniques = pd.factorize(cells["well"], sort=True)
    names = [str(name) for name in np.asarray(uniques, dtype=object)]
    whole = ~cells["touches_border"].to_numpy(bool)
    return _column_summaries(cells, whole, codes, names, observation_features(list(cells.columns)), statistic)


def summarise_wells(
    counts: pd.DataFrame,
    summaries: pd.DataFrame,
    tracks: pd.DataFrame,
    layout: pd.DataFrame,
    plate: str,
    batch: str,
    wells: int,
    statistic: str = "median",
) -> pd.DataFrame:
    """One row per analysed well: keys, layout, counts and the summary of every feature.

    ``counts`` is the ``observation_counts`` of the observations used and ``summaries`` their
    per-well feature summaries (``observation_summaries`` or ``summarise_observation_files``).
    cell_count is the mean number of nuclei per site and frame, growth_rate_per_h the slope of
    log(nuclei per frame) against time; observation features are summarised over
    observations not touching the image border; speed and straightness over tracks with
    enough frames (see tracking.min_track_frames). ``statistic`` is "median" or "mean_log"
    (exp of the mean of natural logs, for skewed positive features; features with
    non-positive values fall back to the median).
    """
    analysed = layout[layout["role"] != "empty"].set_index("well")
    well_counts = _well_counts(counts)
    motion, n_tracks = _track_summaries(tracks, statistic)
    profile = analysed.join(
        [
            well_counts[["cell_count"]],
            well_growth_rates(counts),
            well_counts[["n_observations", "n_sites", "n_frames"]],
            n_tracks,
            summaries,
            motion,
        ],
        how="left",
    )
    profile["cell_count"] = profile["cell_count"].fillna(0.0)
    for column in ("n_observations", "n_tracks", "n_sites", "n_frames"):  # 0 for a well with no usable frame
        profile[column] = profile[column].fillna(0).astype(np.int64)
    return _with_position(profile.reset_index(), plate, batch, plate_format(wells))


def _well_counts(counts: pd.DataFrame) -> pd.DataFrame:
    """Per well: cell_count (mean nuclei per imaged site and frame), observations, sites, frames."""
    codes, uniques = pd.factorize(counts["well"], sort=True)
    names = [str(name) for name in np.asarray(uniques, dtype=object)]
    n_wells = len(names)
    site, frame = counts["site"].to_numpy(np.int64), counts["frame"].to_numpy(np.int64)
    observations = counts["observations"].to_numpy(np.int64)
    n_site, n_frame = int(site.max(initial=0)) + 1, int(frame.max(initial=0)) + 1
    per_site_frame = np.bincount(
        (codes.astype(np.int64) * n_site + site) * n_frame + frame, observations, minlength=n_wells * n_site * n_frame
    ).reshape(n_wells, n_site, n_frame)
    present = per_site_frame > 0
    return pd.DataFrame(
        {
            "cell_count": per_site_frame.sum(axis=(1, 2)) / np.maximum(present.sum(axis=(1, 2)), 1),
            "n_observations": np.bincount(codes, observations, minlength=n_wells).astype(np.int64),
            "n_sites": present.any(axis=2).sum(axis=1),
            "n_frames": present.any(axis=1).sum(axis=1),
        },
        index=pd.Index(names, name="well"),
    )


def _track_summaries(tracks: pd.DataFrame, statistic: str) -> tuple[pd.DataFrame, pd.Series]:
    """Per well: the summary of every per-track feature over whole tracks, and their number."""
    usable = tracks[tracks["speed_um_per_min"].notna() & ~tracks["touches_border"]]
    track_codes, track_wells = pd.factorize(usable["well"], sort=True)
    motion = _column_summaries(
        usable,
        np.ones(len(usable), bool),
        track_codes,
        [str(w) for w in np.asarray(track_wells, dtype=object)],
        track_features(list(tracks.columns)),
        statistic,
    )
    n_tracks = usable.groupby("well", observed=True).size().rename("n_tracks")
    n_tracks.index = n_tracks.index.astype(str)
    return motion, n_tracks


def _with_position(profile: pd.DataFrame, plate: str, batch: str, fmt: PlateFormat) -> pd.DataFrame:
    """The profile with plate, batch, row, column (1-based) and is_edge in front."""
    position = np.array([parse_well(w) for w in profile["well"]]).reshape(-1, 2)
    profile.insert(0, "plate", plate)
    profile.insert(1, "batch", batch)
    profile.insert(3, "row", position[:, 0] + 1)
    profile.insert(4, "column", position[:, 1] + 1)
    profile.insert(5, "is_edge", [is_edge_well(w, fmt) for w in profile["well"]])
    return profile
