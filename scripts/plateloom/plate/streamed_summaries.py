"""Well summaries streamed from a plate's per-well cells files: each well folder is read and
summarised in one pass (on the job's threads), so no plate-wide table of observations is made.
The results equal ``plateloom.plate.summaries`` on the whole table (a test says so)."""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor
from typing import NamedTuple

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from plateloom.columns import observation_features
from plateloom.errors import InputError
from plateloom.plate.summaries import COUNT_COLUMNS_OF_OBSERVATIONS, block_summaries, check_statistic, well_files
from plateloom.plate.time_courses import window_medians, window_table

# Columns of the cells table that the plate stage needs besides the features.
KEY_COLUMNS_FOR_PROFILES = ("site", "frame", "time_min", "touches_border")


def _site_frame_key(site: np.ndarray, frame: np.ndarray) -> np.ndarray:
    """One int64 per (site, frame): site in the high 32 bits, frame in the low ones."""
    return np.asarray(site, np.int64) * 2**32 + np.asarray(frame, np.int64)


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


def _well_codes(tables: list[pa.Table]) -> tuple[list[str], np.ndarray]:
    """(sorted well names, the code of each row's well in that order) of one folder's tables."""
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
    return names, (sorted_code[np.concatenate(code_parts)] if names else np.zeros(0, np.int64))


def _lowest_values(columns: list[np.ndarray], rows: np.ndarray) -> list[float]:
    """Smallest finite value of each column over ``rows`` (inf if none)."""
    with np.errstate(all="ignore"):
        return [np.where(np.isfinite(c[rows]), c[rows], np.inf).min(initial=np.inf) for c in columns]


def _summarise_well_folder(
    paths: list[str],
    features: list[str],
    excluded: dict[str, np.ndarray],
    with_log: bool,
    window: tuple[float, float] | None = None,
) -> dict[str, object]:
    """Read the files of one well folder and summarise every feature per well over its kept rows
    (not touching the border, site-frame not in ``excluded``: well -> site * 2**32 + frame keys);
    count its observations per site and frame; with ``window`` (length and origin in minutes),
    also the medians per time window (``plateloom.plate.time_courses``)."""
    tables = [
        pq.ParquetFile(path, read_dictionary=["well"]).read(
            columns=features + list(KEY_COLUMNS_FOR_PROFILES) + ["well"], use_threads=False
        )
        for path in paths
    ]
    names, codes = _well_codes(tables)
    table = pa.concat_tables(tables) if len(tables) > 1 else tables[0]
    keys = {c: table.column(c).to_numpy() for c in KEY_COLUMNS_FOR_PROFILES}
    columns = [table.column(f).to_numpy().astype(np.float64, copy=False) for f in features]
    median, mean_log = np.full((len(names), len(features)), np.nan), np.full((len(names), len(features)), np.nan)
    lowest = np.full((len(names), len(features)), np.inf)
    whole = ~keys["touches_border"].astype(bool)
    site_frame = _site_frame_key(keys["site"], keys["frame"])
    counts, windows = [], []
    for code, name in enumerate(names):
        rows = codes == code
        where = f"well {name} ({os.path.dirname(paths[0])})"
        counts.append(_site_frame_counts(site_frame[rows], keys["time_min"][rows], whole[rows], where))
        if name in excluded:
            rows &= ~np.isin(site_frame, excluded[name])
        if with_log:  # which features are strictly positive is judged, as for a whole table, on the rows not excluded
            lowest[code] = _lowest_values(columns, rows)
        kept = rows & whole
        n_kept = int(kept.sum())
        if n_kept == 0:
            continue
        # one row per feature, so each median partitions contiguous memory
        block = np.empty((len(features), n_kept))
        for j, column in enumerate(columns):
            np.compress(kept, column, out=block[j])
        if window is not None:
            windows.append((name, *window_medians(block, keys["time_min"][kept], *window)))
        median[code] = block_summaries(block, np.zeros(len(features), bool))
        if with_log:
            mean_log[code] = block_summaries(block, np.ones(len(features), bool))
    return {
        "names": names,
        "counts": counts,
        "median": median,
        "mean_log": mean_log,
        "lowest": lowest,
        "windows": windows,
    }


def _cells_features(path: str) -> list[str]:
    """The observation features of a cells table, after checking it has the key columns."""
    schema = pq.read_schema(path)
    missing = [c for c in ("well",) + KEY_COLUMNS_FOR_PROFILES if c not in schema.names]
    if missing:
        raise InputError(
            path,
            f"the cells table has no column {', '.join(missing)}.",
            "re-run the per-well jobs of this plate (delete its results/cells folder, then snakemake).",
        )
    return observation_features(list(schema.names))


def _joined_summaries(parts: list[dict], features: list[str], statistic: str, folders: list[str]) -> pd.DataFrame:
    """One row per well of all folders' summaries (mean_log where every kept value is > 0)."""
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
    return pd.DataFrame(summary, columns=features, index=pd.Index(names, name="well"))


def _joined_counts(parts: list[dict]) -> pd.DataFrame:
    per_well = [(name, count) for part in parts for name, count in zip(part["names"], part["counts"])]
    counts = pd.DataFrame(
        {
            c: np.concatenate([count[c] for _, count in per_well]) if per_well else np.zeros(0)
            for c in COUNT_COLUMNS_OF_OBSERVATIONS[1:]
        }
    )
    counts.insert(0, "well", np.repeat([name for name, _ in per_well], [len(count["site"]) for _, count in per_well]))
    return counts.astype({"site": np.int64, "frame": np.int64, "observations": np.int64, "whole": np.int64})


class StreamedSummaries(NamedTuple):
    """What one pass over a plate's cells files gives (see ``summarise_observation_files``)."""

    summaries: pd.DataFrame
    counts: pd.DataFrame
    windows: pd.DataFrame | None


def summarise_observation_files(
    folders: list[str],
    excluded_site_frames: pd.DataFrame,
    statistic: str = "median",
    threads: int = 1,
    window: tuple[float, float] | None = None,
) -> StreamedSummaries:
    """Stream the per-well cells files of a plate once, a well folder per task on ``threads`` threads.

    Returns (summaries, counts). summaries: one row per well (index ``well``), the summary of
    every observation feature over the observations kept (not touching the image border, not in
    a site-frame of ``excluded_site_frames``: columns well, site, frame), as
    ``observation_summaries`` computes it from the whole table. counts: the
    ``observation_counts`` of every observation. windows (with ``window``: length and origin
    in minutes): one row per (well, time window), the medians of the same kept observations in
    it (``plateloom.plate.time_courses.window_table``). No plate-wide table of observations is made:
    peak memory is about one well per thread.
    """
    check_statistic(statistic)
    paths = well_files(folders)
    groups: dict[str, list[str]] = {}
    for path in paths:
        groups.setdefault(os.path.basename(os.path.dirname(path)), []).append(path)
    features = _cells_features(paths[0])
    excluded: dict[str, np.ndarray] = {}
    for well, rows in excluded_site_frames.groupby(excluded_site_frames["well"].astype(str)):
        excluded[well] = _site_frame_key(rows["site"], rows["frame"])
    with ThreadPoolExecutor(max(1, threads)) as pool:
        parts = list(
            pool.map(
                lambda group: _summarise_well_folder(group, features, excluded, statistic == "mean_log", window),
                [groups[name] for name in sorted(groups)],
            )
        )
    windows = window_table([w for part in parts for w in part["windows"]], features) if window else None
    return StreamedSummaries(_joined_summaries(parts, features, statistic, folders), _joined_counts(parts), windows)
