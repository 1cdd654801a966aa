"""Collective dynamics of one well: neighbour graph, phase synchrony, directed coupling, event spreading.

Every readout is a property of the well (not of single cells), so it flows through plate
normalization, batch correction and the effects model like any other well feature.

- Neighbour graph: Delaunay triangulation of the nuclear centroids of each frame, edges
  longer than a maximum removed; two tracks are neighbours when they are joined in at least a
  set fraction of the frames both are present.
- Synchrony: Kuramoto (1975) order parameter r = |mean_k exp(i theta_k)| of the reporter phases,
  the phase taken from the analytic signal (Hilbert transform) of each linearly detrended
  trace; and the mean Pearson correlation of neighbours' detrended traces at lag 0.
- Directed coupling: Granger (1969) F-test in both directions for every neighbour pair and
  every pair at graph distance 2, lag order chosen by an information criterion, all pairs at
  once; Benjamini-Hochberg over the well's tests.
- Event spreading: Knox (1964) space-time test of per-cell events (a track that ends with a
  sharp reporter change), Monte Carlo permutation of the event times within each site.
"""

from __future__ import annotations

import zlib
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import signal
from scipy.spatial import cKDTree

from plateloom.settings import FromSchema
from plateloom.stats import bh_qvalues
from plateloom.well.granger import granger_tests
from plateloom.well.neighbours import pairs_at_distance_two, track_neighbour_pairs
from plateloom.well.track_stats import (
    dominant_frequency,
    fill_inner_gaps,
    row_spans,
    track_matrix,
)


@dataclass(frozen=True)
class CollectiveSettings(FromSchema):
    """Settings of the collective readouts (config section ``collective``; physical units)."""

    SECTION = "collective"

    enabled: bool
    max_edge_um: float
    min_edge_fraction: float
    min_overlap_frames: int
    max_lag_frames: int
    lag_criterion: str
    coupling_q_value: float
    synchrony_level: float
    event_jump_ratio: float
    event_radius_um: float
    event_window_frames: int
    n_permutations: int
    seed: int


# ---------------------------------------------------------------------------------------------
# Traces


def detrend_rows(matrix: np.ndarray) -> np.ndarray:
    """Each row minus its least-squares line over its finite entries (NaN kept)."""
    finite = np.isfinite(matrix)
    t = np.broadcast_to(np.arange(matrix.shape[1], dtype=float), matrix.shape)
    n = finite.sum(axis=1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        t_mean = np.where(finite, t, 0).sum(axis=1, keepdims=True) / n
        v_mean = np.where(finite, matrix, 0).sum(axis=1, keepdims=True) / n
        dt = np.where(finite, t - t_mean, 0)
        slope = (dt * np.where(finite, matrix - v_mean, 0)).sum(axis=1, keepdims=True) / (dt**2).sum(
            axis=1, keepdims=True
        )
    slope = np.nan_to_num(slope)
    return np.where(finite, matrix - v_mean - slope * (t - t_mean), np.nan)


def analytic_phases(detrended: np.ndarray) -> np.ndarray:
    """Phase (radians) of the analytic signal of each row over its contiguous finite span (NaN elsewhere).

    Rows with the same span are transformed together (scipy.signal.hilbert).
    """
    phases = np.full(detrended.shape, np.nan)
    for first, last, rows in _span_groups(np.isfinite(detrended), 4):
        phases[rows, first:last] = np.angle(signal.hilbert(detrended[rows, first:last], axis=1))
    return phases


def _span_groups(finite: np.ndarray, shortest: int):
    """(first, stop, rows) for each span of finite columns shared by rows, spans of at least ``shortest`` frames."""
    has, start, stop = row_spans(finite)
    keep = has & (stop - start >= shortest)
    for first, last in sorted(set(zip(start[keep].tolist(), stop[keep].tolist()))):
        yield first, last, np.flatnonzero(keep & (start == first) & (stop == last))


def remove_dominant_oscillation(detrended: np.ndarray, padding: int = 16) -> np.ndarray:
    """Each row minus its least-squares sinusoid at the row's periodogram peak (over its finite span).

    A periodic component shared by two traces makes each predict the other whatever their
    coupling (Granger's test assumes stationary series without deterministic parts), so the
    directed tests run on what is left. Rows with the same span are done together.
    """
    residual = np.array(detrended, dtype=float)
    for first, last, rows in _span_groups(np.isfinite(detrended), 6):
        n = last - first
        block = np.nan_to_num(detrended[rows, first:last])
        peak = dominant_frequency(block, padding, below_nyquist=True)  # at Nyquist the sine column is all 0
        angle = 2 * np.pi * peak[:, None] * np.arange(n)[None, :]
        design = np.stack([np.sin(angle), np.cos(angle)], axis=2)  # (rows, n, 2)
        coefficients = np.linalg.solve(
            np.einsum("rni,rnj->rij", design, design), np.einsum("rni,rn->ri", design, block)[..., None]
        )
        residual[rows, first:last] = block - (design @ coefficients)[..., 0]
    return residual


def kuramoto_order(phases: np.ndarray, axis: int = 0) -> np.ndarray:
    """Kuramoto order parameter r = |mean exp(i theta)| along ``axis``, NaN phases ignored (1 = identical phases)."""
    unit = np.exp(1j * np.nan_to_num(phases))
    finite = np.isfinite(phases)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.abs(np.where(finite, unit, 0).sum(axis=axis)) / finite.sum(axis=axis)


def corrected_order_squared(phases: np.ndarray, axis: int = 0) -> np.ndarray:
    """(N r^2 - 1) / (N - 1) along ``axis``: an unbiased estimate of |E exp(i theta)|^2, 0 for independent
    uniform phases whatever N (r alone is about 1/sqrt(N) then), 1 for identical phases; NaN for N < 2."""
    return _corrected(kuramoto_order(phases, axis=axis), np.isfinite(phases).sum(axis=axis))


def _corrected(order: np.ndarray, n: np.ndarray) -> np.ndarray:
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n >= 2, (n * order**2 - 1) / (n - 1), np.nan)


def pair_correlations(traces: np.ndarray, pairs_rows: np.ndarray, min_overlap: int) -> np.ndarray:
    """Pearson correlation at lag 0 of rows a and b of ``traces`` over frames both have (NaN if < ``min_overlap``)."""
    a, b = traces[pairs_rows[:, 0]], traces[pairs_rows[:, 1]]
    both = np.isfinite(a) & np.isfinite(b)
    n = both.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        a_c = np.where(both, a - np.where(both, a, 0).sum(1, keepdims=True) / n[:, None], 0)
        b_c = np.where(both, b - np.where(both, b, 0).sum(1, keepdims=True) / n[:, None], 0)
        r = (a_c * b_c).sum(1) / np.sqrt((a_c**2).sum(1) * (b_c**2).sum(1))
    return np.where(n >= min_overlap, r, np.nan)


# ---------------------------------------------------------------------------------------------
# Events and their spreading


def knox_test(
    x: np.ndarray,
    y: np.ndarray,
    frame: np.ndarray,
    group: np.ndarray,
    radius_um: float,
    window_frames: int,
    n_permutations: int,
    rng: np.random.Generator,
) -> tuple[int, float, float]:
    """Knox (1964) test of space-time clustering of events, Monte Carlo over permuted event times.

    Counts pairs of events of the same ``group`` (site) within ``radius_um`` and
    ``window_frames``; the times are permuted within each group ``n_permutations`` times.
    Returns (observed count, mean permuted count, p-value (1 + #{permuted >= observed}) / (1 + n)).
    """
    group = np.asarray(group)
    close_pairs = [np.empty((0, 2), np.int64)]
    for g in np.unique(group):  # pairs close in space, from a KD-tree (memory grows with close pairs, not n^2)
        members = np.flatnonzero(group == g)
        pairs = cKDTree(np.column_stack([x[members], y[members]])).query_pairs(radius_um, output_type="ndarray")
        close_pairs.append(members[pairs.reshape(-1, 2)])
    i, j = np.concatenate(close_pairs).T
    observed = int((np.abs(frame[i] - frame[j]) <= window_frames).sum())
    if len(i) == 0:
        return observed, 0.0, 1.0
    times = np.broadcast_to(np.asarray(frame, float), (n_permutations, len(frame))).copy()
    for g in np.unique(group):
        members = np.flatnonzero(group == g)
        times[:, members] = rng.permuted(times[:, members], axis=1)
    permuted = (np.abs(times[:, i] - times[:, j]) <= window_frames).sum(axis=1)
    return observed, float(permuted.mean()), float((1 + (permuted >= observed).sum()) / (1 + n_permutations))


def reporter_events(
    frame: np.ndarray, track: np.ndarray, values: np.ndarray, at_border: np.ndarray, last_frame: int, jump_ratio: float
) -> np.ndarray:
    """Row indices of events: the last observation of a track that ends before ``last_frame``, away
    from the border, with the reporter at >= ``jump_ratio`` times the track's median before it."""
    order = np.lexsort((frame, track))
    track_sorted = track[order]
    ends = np.flatnonzero(np.r_[track_sorted[1:] != track_sorted[:-1], True])
    starts = np.r_[0, ends[:-1] + 1]
    lengths = ends - starts + 1
    last_rows = order[ends]
    candidate = (lengths >= 3) & (frame[last_rows] < last_frame) & ~at_border[last_rows]
    events = []
    for start, end, row in zip(starts[candidate], ends[candidate], last_rows[candidate]):
        before = np.median(values[order[start:end]])
        if before > 0 and values[row] >= jump_ratio * before:
            events.append(row)
    return np.asarray(events, np.int64)


# ---------------------------------------------------------------------------------------------
# Per well

# The readouts worth modelling, as screen.features entries ({reporter}: the reporter channel's name).
MODELLED_READOUTS = (
    "phase_order_{reporter}",
    "neighbour_correlation_{reporter}",
    "coupled_link_fraction_{reporter}",
    "coupled_link_fraction_d2_{reporter}",
    "spreading_index",
)


def _site_traces(cells: pd.DataFrame, channel: str, ids: np.ndarray) -> np.ndarray:
    _, values = track_matrix(
        cells["frame"].to_numpy(), cells["track"].to_numpy(), cells[f"mean_intensity_{channel}"].to_numpy(float), ids
    )
    return detrend_rows(fill_inner_gaps(values))


def _directed_tests(traces: np.ndarray, rows: np.ndarray, settings: CollectiveSettings) -> np.ndarray:
    """p-values of both directions of every pair (rows into ``traces``), over each pair's common span."""
    if len(rows) == 0:
        return np.empty(0)
    a, b = traces[rows[:, 0]], traces[rows[:, 1]]
    both = np.isfinite(a) & np.isfinite(b)
    _, start, stop = row_spans(both)
    both &= (both.sum(axis=1) == stop - start)[:, None]  # pairs whose common frames have a gap are not tested
    shortest = max(
        settings.min_overlap_frames, 3 * settings.max_lag_frames + 2
    )  # leaves >= 1 residual df at the top lag
    p_values = np.full((len(rows), 2), np.nan)
    for first, last, group in _span_groups(both, shortest):
        x, y = a[group, first:last], b[group, first:last]
        _, _, p_values[group, 0] = granger_tests(y, x, settings.max_lag_frames, settings.lag_criterion)
        _, _, p_values[group, 1] = granger_tests(x, y, settings.max_lag_frames, settings.lag_criterion)
    return p_values.ravel()


def well_collective_readouts(
    cells: pd.DataFrame, reporters: list[str], settings: CollectiveSettings, frame_interval_min: float, well: str
) -> dict[str, float]:
    """One row of collective readouts for a well from its cells table (columns site, frame, track,
    centroid_x_um, centroid_y_um, touches_border, mean_intensity_<reporter>).

    Per reporter: phase_order (the squared Kuramoto order parameter corrected for the number
    of cells, (N r^2 - 1) / (N - 1), averaged over frames with >= 3 phases, then sites; 0 for
    independent phases, 1 for identical ones), time_to_synchrony_min (first time r reaches
    ``synchrony_level``; censored at the end of imaging, one interval after the last frame),
    neighbour_correlation (mean over neighbour track pairs), coupled_link_fraction (share of
    directed neighbour links with a Granger q-value <= ``coupling_q_value``; BH over all of the
    well's tests; each trace's dominant oscillation removed first) and the same for pairs at
    graph distance 2. spreading_index = (observed + 1) / (expected + 1) Knox pairs of events of
    the first reporter (1: no clustering beyond chance).
    """
    sums = {c: {"order": [], "time": [], "corr": [], "p1": [], "p2": []} for c in reporters}
    n_links, event_parts = 0, []
    for site, part in cells.groupby("site", sort=True):
        frame, track = part["frame"].to_numpy(np.int64), part["track"].to_numpy(np.int64)
        x, y = part["centroid_x_um"].to_numpy(float), part["centroid_y_um"].to_numpy(float)
        pairs = track_neighbour_pairs(frame, track, x, y, settings.max_edge_um, settings.min_edge_fraction)
        n_links += len(pairs)
        ids = np.unique(track)
        rows = (np.searchsorted(ids, pairs), np.searchsorted(ids, pairs_at_distance_two(pairs)))
        for channel in reporters:
            _add_site_readouts(sums[channel], _site_traces(part, channel, ids), rows, settings, frame_interval_min)
        if reporters:
            at_border = part["touches_border"].to_numpy(bool)
            values = part[f"mean_intensity_{reporters[0]}"].to_numpy(float)
            ended = reporter_events(frame, track, values, at_border, int(frame.max()), settings.event_jump_ratio)
            event_parts.append(pd.DataFrame({"site": site, "frame": frame[ended], "x": x[ended], "y": y[ended]}))
    row: dict[str, float] = {}
    n_tests = 0
    for channel in reporters:
        readouts, tests = _channel_readouts(sums[channel], settings.coupling_q_value)
        row.update({f"{name}_{channel}": value for name, value in readouts.items()})
        n_tests = max(n_tests, tests)
    events = (
        pd.concat(event_parts, ignore_index=True) if event_parts else pd.DataFrame(columns=["site", "frame", "x", "y"])
    )
    row.update(_spreading(events, settings, well, bool(reporters)))
    row["n_neighbour_links"] = n_links
    row["n_coupling_tests"] = n_tests
    row["n_events"] = len(events)
    return row


def _add_site_readouts(
    sums: dict[str, list],
    traces: np.ndarray,
    rows: tuple[np.ndarray, np.ndarray],
    settings: CollectiveSettings,
    frame_interval_min: float,
) -> None:
    """Append one site's phase order, time to synchrony, neighbour correlations and Granger p-values
    (neighbours, neighbours of neighbours) of one reporter to ``sums``."""
    phases = analytic_phases(traces)
    order, n_phases = kuramoto_order(phases, axis=0), np.isfinite(phases).sum(axis=0)
    counted = n_phases >= 3
    if counted.any():
        sums["order"].append(float(np.mean(_corrected(order, n_phases)[counted])))
        reached = np.flatnonzero(counted & (order >= settings.synchrony_level))
        end = traces.shape[1] * frame_interval_min
        sums["time"].append(float(reached[0] * frame_interval_min) if len(reached) else end)
    sums["corr"].append(pair_correlations(traces, rows[0], settings.min_overlap_frames))
    residual = remove_dominant_oscillation(traces)
    sums["p1"].append(_directed_tests(residual, rows[0], settings))
    sums["p2"].append(_directed_tests(residual, rows[1], settings))


def _channel_readouts(sums: dict[str, list], coupling_q_value: float) -> tuple[dict[str, float], int]:
    """The well's readouts of one reporter (names without the channel suffix) and its number of tests."""
    correlations = np.concatenate(sums["corr"]) if sums["corr"] else np.empty(0)
    p1 = np.concatenate(sums["p1"]) if sums["p1"] else np.empty(0)
    p2 = np.concatenate(sums["p2"]) if sums["p2"] else np.empty(0)
    q = bh_qvalues(np.concatenate([p1, p2]))
    q1, q2 = q[: len(p1)], q[len(p1) :]
    readouts = {
        "phase_order": float(np.mean(sums["order"])) if sums["order"] else np.nan,
        "time_to_synchrony_min": float(np.mean(sums["time"])) if sums["time"] else np.nan,
        "neighbour_correlation": _nanmean(correlations),
        "coupled_link_fraction": _fraction_below(q1, coupling_q_value),
        "coupled_link_fraction_d2": _fraction_below(q2, coupling_q_value),
    }
    return readouts, int(np.isfinite(q).sum())


def _spreading(events: pd.DataFrame, settings: CollectiveSettings, well: str, has_reporter: bool) -> dict[str, float]:
    """spreading_index and its permutation p-value from the Knox test of the well's events."""

    if not has_reporter:
        return {"spreading_index": np.nan, "spreading_p_value": np.nan}
    if len(events) < 2:
        return {"spreading_index": 1.0, "spreading_p_value": np.nan}
    rng = np.random.default_rng([settings.seed, zlib.crc32(str(well).encode())])
    observed, expected, p_value = knox_test(
        events["x"].to_numpy(float),
        events["y"].to_numpy(float),
        events["frame"].to_numpy(float),
        events["site"].to_numpy(),
        settings.event_radius_um,
        settings.event_window_frames,
        settings.n_permutations,
        rng,
    )
    return {"spreading_index": (observed + 1.0) / (expected + 1.0), "spreading_p_value": p_value}


def _nanmean(values: np.ndarray) -> float:
    finite = values[np.isfinite(values)]
    return float(finite.mean()) if len(finite) else np.nan


def _fraction_below(q: np.ndarray, level: float) -> float:
    finite = q[np.isfinite(q)]
    return float((finite <= level).mean()) if len(finite) else np.nan
