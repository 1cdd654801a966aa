"""Well profiles: the well (not the cell) is the experimental unit, so cells are summarised per well."""

from __future__ import annotations

import glob
import os
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.parquet as pq

from plateloom.columns import observation_features, track_features
from plateloom.errors import InputError
from plateloom.setup.plate_formats import is_edge_well, parse_well, plate_format
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


def _well_blocks(codes: np.ndarray, n_wells: int) -> tuple[np.ndarray, np.ndarray | None]:
    """Start of each well's rows (length n_wells + 1) and the row order that makes them contiguous
    (None when the rows already come well by well, as the per-well files are read)."""
    order = None
    if len(codes) > 1 and np.any(np.diff(codes) < 0):
        order = np.argsort(codes, kind="stable")
        codes = codes[order]
    return np.searchsorted(codes, np.arange(n_wells + 1)), order


def _block_summaries(block: np.ndarray, use_log: np.ndarray) -> np.ndarray:
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


def _check_statistic(statistic: str) -> None:
    if statistic not in ("median", "mean_log"):
        raise ValueError(f"unknown well summary {statistic!r}; use median or mean_log")


def _column_summaries(
    cells: pd.DataFrame, keep: np.ndarray, codes: np.ndarray, names: list[str], features: list[str], statistic: str
) -> pd.DataFrame:
    """Per-well summary of every feature over the kept rows, well by well on contiguous blocks of rows.

    "median" is the median; "mean_log" is exp(mean(log)) for strictly positive features and the
    median for the others. NaN values are ignored. Memory: one well's block at a time.
    """
    _check_statistic(statistic)
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
        return _block_summaries(
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


def _site_frame_key(site: np.ndarray, frame: np.ndarray) -> np.ndarray:
    """One int64 per (site, frame): site in the high 32 bits, frame in the low ones."""
    return np.asarray(site, np.int64) * 2**32 + np.asarray(frame, np.int64)


# Columns of the cells table that the plate stage needs besides the features.
KEY_COLUMNS_FOR_PROFILES = ("site", "frame", "time_min", "touches_border")


def _site_frame_counts(key: np.ndarray, time_min: np.ndarray, whole: np.ndarray, where: str) -> dict[str, np.ndarray]:
    """Observations (and whole ones) per site and frame (``_site_frame_key``) of one well, sorted by site and frame."""
    if len(key) and np.all(key[1:] >= key[:-1]):  # rows written site by site, frame by frame: no sort
        first = np.flatnonzero(np.concatenate([[True], key[1:] != key[:-1]]))
        unique = key[first]
        inverse = np.cumsum(np.concatenate([[False], key[1:] != key[:-1]]))
    else:
        unique, first, inverse = np.unique(key, return_index=True, return_inverse=True)
    times = time_min[first].astype(np.float64)
    if not np.array_equal(time_min.astype(np.float64), times[inverse], equal_nan=True):
        raise InputError(
            where,
            "a frame has observations with different time_min values.",
            "re-run the per-well job of this well: every observation of a frame has the frame's time.",
        )
    return {
        "site": unique >> 32,
        "frame": unique & (2**32 - 1),
        "time_min": times,
        "observations": np.bincount(inverse, minlength=len(unique)),
        "whole": np.bincount(inverse, whole, minlength=len(unique)).astype(np.int64),
    }


def _summarise_well_folder(
    paths: list[str], features: list[str], excluded: dict[str, np.ndarray], with_log: bool
) -> dict[str, object]:
    """Read the files of one well folder and summarise every feature per well over its kept rows
    (not touching the border, site-frame not in ``excluded``: well -> site * 2**32 + frame keys);
    count its observations per site and frame."""
    tables = [
        pq.ParquetFile(path, read_dictionary=["well"]).read(
            columns=features + list(KEY_COLUMNS_FOR_PROFILES) + ["well"], use_threads=False
        )
        for path in paths
    ]
    codes_by_name: dict[str, int] = {}
    code_parts = []
    for table in tables:
        well = table.column("well").combine_chunks()
        lookup = np.array(
            [codes_by_name.setdefault(str(w), len(codes_by_name)) for w in well.dictionary.to_pylist()], np.int64
        )
        code_parts.append(lookup[well.indices.to_numpy()] if len(lookup) else np.zeros(0, np.int64))
    names = sorted(codes_by_name)
    sorted_code = np.empty(len(names), np.int64)
    sorted_code[[codes_by_name[name] for name in names]] = np.arange(len(names))
    codes = sorted_code[np.concatenate(code_parts)] if names else np.zeros(0, np.int64)
    table = pa.concat_tables(tables) if len(tables) > 1 else tables[0]
    keys = {c: table.column(c).to_numpy() for c in KEY_COLUMNS_FOR_PROFILES}
    columns = [table.column(f).to_numpy().astype(np.float64, copy=False) for f in features]
    median, mean_log = np.full((len(names), len(features)), np.nan), np.full((len(names), len(features)), np.nan)
    lowest = np.full((len(names), len(features)), np.inf)
    whole = ~keys["touches_border"].astype(bool)
    site_frame = _site_frame_key(keys["site"], keys["frame"])
    counts = []
    for code, name in enumerate(names):
        rows = codes == code
        counts.append(
            _site_frame_counts(
                site_frame[rows], keys["time_min"][rows], whole[rows], f"well {name} ({os.path.dirname(paths[0])})"
            )
        )
        if name in excluded:
            rows &= ~np.isin(site_frame, excluded[name])
        if with_log:  # which features are strictly positive is judged, as for a whole table, on the rows not excluded
            with np.errstate(all="ignore"):
                lowest[code] = [np.where(np.isfinite(c[rows]), c[rows], np.inf).min(initial=np.inf) for c in columns]
        kept = rows & whole
        n_kept = int(kept.sum())
        if n_kept == 0:
            continue
        # one row per feature, so each median partitions contiguous memory
        block = np.empty((len(features), n_kept))
        for j, column in enumerate(columns):
            np.compress(kept, column, out=block[j])
        median[code] = _block_summaries(block, np.zeros(len(features), bool))
        if with_log:
            mean_log[code] = _block_summaries(block, np.ones(len(features), bool))
    return {"names": names, "counts": counts, "median": median, "mean_log": mean_log, "lowest": lowest}


def summarise_observation_files(
    folders: list[str], excluded_site_frames: pd.DataFrame, statistic: str = "median", threads: int = 1
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Stream the per-well cells files of a plate once, a well folder per task on ``threads`` threads.

    Returns (summaries, counts). summaries: one row per well (index ``well``), the summary of
    every observation feature over the observations kept (not touching the image border, not in
    a site-frame of ``excluded_site_frames``: columns well, site, frame), as
    ``observation_summaries`` computes it from the whole table. counts: the
    ``observation_counts`` of every observation. No plate-wide table of observations is made:
    peak memory is about one well per thread.
    """
    _check_statistic(statistic)
    paths = _well_files(folders)
    groups: dict[str, list[str]] = {}
    for path in paths:
        groups.setdefault(os.path.basename(os.path.dirname(path)), []).append(path)
    schema = pq.read_schema(paths[0])
    missing = [c for c in ("well",) + KEY_COLUMNS_FOR_PROFILES if c not in schema.names]
    if missing:
        raise InputError(
            paths[0],
            f"the cells table has no column {', '.join(missing)}.",
            "re-run the per-well jobs of this plate (delete its results/cells folder, then snakemake).",
        )
    features = observation_features(list(schema.names))
    excluded: dict[str, np.ndarray] = {}
    for well, rows in excluded_site_frames.groupby(excluded_site_frames["well"].astype(str)):
        excluded[well] = _site_frame_key(rows["site"], rows["frame"])
    with ThreadPoolExecutor(max(1, threads)) as pool:
        parts = list(
            pool.map(
                lambda group: _summarise_well_folder(group, features, excluded, statistic == "mean_log"),
                [groups[name] for name in sorted(groups)],
            )
        )
    names = [name for part in parts for name in part["names"]]
    if len(set(names)) != len(names):
        raise InputError(
            ", ".join(folders),
            "a well's observations are split over several well folders.",
            "keep one folder per well (well=<name>): re-run the per-well jobs of this plate.",
        )
    shape = (len(names), len(features))
    summary = np.concatenate([part["median"] for part in parts]).reshape(shape)
    if statistic == "mean_log":
        lowest = np.concatenate([part["lowest"] for part in parts]).reshape(shape).min(axis=0, initial=np.inf)
        summary = np.where(lowest > 0, np.concatenate([part["mean_log"] for part in parts]).reshape(shape), summary)
    summaries = pd.DataFrame(summary, columns=features, index=pd.Index(names, name="well"))
    per_well = [(name, count) for part in parts for name, count in zip(part["names"], part["counts"])]
    counts = pd.DataFrame(
        {
            c: np.concatenate([count[c] for _, count in per_well]) if per_well else np.zeros(0)
            for c in COUNT_COLUMNS_OF_OBSERVATIONS[1:]
        }
    )
    counts.insert(0, "well", np.repeat([name for name, _ in per_well], [len(count["site"]) for _, count in per_well]))
    return summaries, counts.astype({"site": np.int64, "frame": np.int64, "observations": np.int64, "whole": np.int64})


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
    fmt = plate_format(wells)
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
    well_counts = pd.DataFrame(
        {
            "cell_count": per_site_frame.sum(axis=(1, 2)) / np.maximum(present.sum(axis=(1, 2)), 1),
            "n_observations": np.bincount(codes, observations, minlength=n_wells).astype(np.int64),
            "n_sites": present.any(axis=2).sum(axis=1),
            "n_frames": present.any(axis=1).sum(axis=1),
        },
        index=pd.Index(names, name="well"),
    )
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
    growth = well_growth_rates(counts)
    n_tracks = usable.groupby("well", observed=True).size().rename("n_tracks")
    n_tracks.index = n_tracks.index.astype(str)
    analysed = layout[layout["role"] != "empty"].set_index("well")
    profile = analysed.join(
        [
            well_counts[["cell_count"]],
            growth,
            well_counts[["n_observations", "n_sites", "n_frames"]],
            n_tracks,
            summaries,
            motion,
        ],
        how="left",
    )
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
