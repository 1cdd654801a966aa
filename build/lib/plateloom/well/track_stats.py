"""Per-track statistics over time: mean squared displacement with a persistent-random-walk fit,
and the dynamics of a reporter along each track.

Tracks are laid out as a (tracks x frames) matrix with NaN where a track has no observation,
so every statistic is computed for all tracks of a well at once.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.signal import find_peaks

PERSISTENCE_GRID_SIZE = 400


def track_matrix(
    frame: np.ndarray, track: np.ndarray, values: np.ndarray, track_ids: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """(track ids, matrix) with matrix[i, t] the value of track i at frame t (NaN where absent).

    Frames index the columns directly (0 .. max frame); ``track_ids`` fixes the row order.
    """
    ids = np.unique(track) if track_ids is None else np.asarray(track_ids)
    n_frames = int(frame.max()) + 1 if len(frame) else 0
    matrix = np.full((len(ids), n_frames), np.nan)
    rows = np.searchsorted(ids, track)
    matrix[rows, frame.astype(np.int64)] = values
    return ids, matrix


def mean_squared_displacement(x: np.ndarray, y: np.ndarray, max_lag: int) -> tuple[np.ndarray, np.ndarray]:
    """Time-averaged MSD of every track (rows of ``x``, ``y`` in um) at lags 1..max_lag frames.

    Returns (msd, pairs), each (tracks, max_lag): the mean of squared displacements over all
    pairs of observations ``lag`` frames apart (um^2) and the number of such pairs (NaN MSD
    where there are none).
    """
    tracks, frames = x.shape
    msd = np.full((tracks, max_lag), np.nan)
    pairs = np.zeros((tracks, max_lag), np.int64)
    for lag in range(1, min(max_lag, frames - 1) + 1):
        squared = (x[:, lag:] - x[:, :-lag]) ** 2 + (y[:, lag:] - y[:, :-lag]) ** 2
        valid = np.isfinite(squared)
        pairs[:, lag - 1] = valid.sum(axis=1)
        with np.errstate(invalid="ignore"):
            msd[:, lag - 1] = np.where(valid, squared, 0.0).sum(axis=1) / pairs[:, lag - 1]
    return msd, pairs


def persistent_walk_msd(lag_min: np.ndarray, speed: float, persistence_min: float) -> np.ndarray:
    """MSD (um^2) of a 2-D persistent random walk (Fürth 1920): 2 S^2 P [t - P (1 - exp(-t / P))].

    ``speed`` S is the root-mean-square speed (um/min), ``persistence_min`` P the persistence
    time: ballistic S^2 t^2 for t << P, diffusive 4 D t with D = S^2 P / 2 for t >> P.
    """
    t = np.asarray(lag_min, float)
    return 2 * speed**2 * persistence_min * (t - persistence_min * (1 - np.exp(-t / persistence_min)))


def fit_persistent_walk(
    msd: np.ndarray, pairs: np.ndarray, frame_interval_min: float, min_points: int = 3
) -> tuple[np.ndarray, np.ndarray]:
    """Speed (um/min) and persistence time (min) of each track from its MSD curve.

    Least squares of the persistent-random-walk MSD, weighted by the number of pairs at each
    lag, over a log grid of persistence times (0.1 frame interval to 100 x the longest lag);
    for each persistence time the squared speed has a closed form. A best persistence at an
    end of the grid means the track is purely diffusive or purely ballistic over its lags:
    its persistence is NaN (not identifiable) while its speed stays. Tracks with fewer than
    ``min_points`` lags get NaN for both.
    """
    tracks, max_lag = msd.shape
    lags = np.arange(1, max_lag + 1) * frame_interval_min
    grid = np.geomspace(0.1 * frame_interval_min, 100 * lags[-1] if max_lag else 1.0, PERSISTENCE_GRID_SIZE)
    shape = 2 * grid[:, None] * (lags[None, :] - grid[:, None] * (1 - np.exp(-lags[None, :] / grid[:, None])))
    weight = np.where(np.isfinite(msd), pairs, 0).astype(float)
    values = np.where(np.isfinite(msd), msd, 0.0)
    cross = (weight * values) @ shape.T  # (tracks, grid)
    norm = weight @ (shape**2).T
    with np.errstate(invalid="ignore", divide="ignore"):
        speed_squared = cross / norm
        residual = (weight * values**2).sum(axis=1)[:, None] - cross**2 / norm
    residual = np.where(np.isfinite(residual), residual, np.inf)
    best = np.argmin(residual, axis=1)
    speed = np.sqrt(np.maximum(speed_squared[np.arange(tracks), best], 0.0))
    persistence = grid[best].astype(float)
    enough = (weight > 0).sum(axis=1) >= min_points
    speed = np.where(enough, speed, np.nan)
    persistence = np.where(enough & (best > 0) & (best < len(grid) - 1), persistence, np.nan)
    return speed, persistence


def row_spans(finite: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per row of a (rows, frames) mask: has any True, first True column, one past the last True column."""
    has = finite.any(axis=1)
    start = np.where(has, finite.argmax(axis=1), 0)
    stop = np.where(has, finite.shape[1] - finite[:, ::-1].argmax(axis=1), 0)
    return has, start, stop


def fill_inner_gaps(matrix: np.ndarray) -> np.ndarray:
    """Each row with NaNs between observed values linearly interpolated (NaN outside its span kept)."""
    return pd.DataFrame(np.asarray(matrix, dtype=float)).interpolate(axis=1, limit_area="inside").to_numpy()


def dominant_frequency(detrended: np.ndarray, padding: int, below_nyquist: bool = False) -> np.ndarray:
    """Per row (complete series of equal length n): frequency (cycles per frame) of the largest peak of the
    periodogram zero-padded ``padding`` x, among frequencies of at least one cycle over the series (and
    strictly below the Nyquist frequency if ``below_nyquist``)."""
    n = detrended.shape[1]
    power = np.abs(np.fft.rfft(detrended, n=padding * n, axis=1)) ** 2
    frequency = np.fft.rfftfreq(padding * n)
    allowed = (frequency >= 1.0 / n) & ((frequency < 0.5) if below_nyquist else True)
    return frequency[np.flatnonzero(allowed)[power[:, allowed].argmax(axis=1)]]


def _filled_segments(matrix: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Linear interpolation across inner gaps of every row; first and last observed frame per row."""
    has_any, first, stop = row_spans(np.isfinite(matrix))
    return fill_inner_gaps(matrix), first, np.where(has_any, stop - 1, -1)


def reporter_dynamics(
    matrix: np.ndarray, frame_interval_min: float, min_frames: int, padding: int = 32
) -> dict[str, np.ndarray]:
    """Dynamics of a reporter along each track (rows of ``matrix``, grey levels per frame).

    Per track, over its span from first to last observation (inner gaps interpolated):
    mean (grey levels), cv (SD / mean), period_min (the period of the largest peak of the
    periodogram of the linearly detrended trace, zero-padded ``padding`` x for a finer
    frequency grid, among periods no longer than the span), peaks_per_h (local maxima of the
    detrended trace standing out by at least half its SD, per hour) and max_rate_per_min
    (largest absolute change between consecutive frames, grey levels per minute). Tracks
    spanning fewer than ``min_frames`` frames (period: fewer than max(min_frames, 6)) get NaN.
    """
    tracks = len(matrix)
    out = {name: np.full(tracks, np.nan) for name in ("mean", "cv", "period_min", "peaks_per_h", "max_rate_per_min")}
    if tracks == 0 or matrix.shape[1] == 0:
        return out
    filled, first, last = _filled_segments(matrix)
    span = last - first + 1
    for length in np.unique(span[span >= max(min_frames, 2)]):
        rows = np.flatnonzero(span == length)
        segment = filled[rows[:, None], first[rows, None] + np.arange(length)[None, :]]
        mean = segment.mean(axis=1)
        out["mean"][rows] = mean
        with np.errstate(invalid="ignore", divide="ignore"):
            out["cv"][rows] = segment.std(axis=1, ddof=1) / mean
        out["max_rate_per_min"][rows] = np.abs(np.diff(segment, axis=1)).max(axis=1) / frame_interval_min
        time = np.arange(length) * frame_interval_min
        design = np.column_stack([np.ones(length), time - time.mean()])
        coefficients, *_ = np.linalg.lstsq(design, segment.T, rcond=None)
        detrended = segment - (design @ coefficients).T
        duration_h = (length - 1) * frame_interval_min / 60.0
        for row, trace in zip(rows, detrended):
            peaks, _ = find_peaks(trace, prominence=0.5 * trace.std())
            out["peaks_per_h"][row] = len(peaks) / duration_h
        if length < max(min_frames, 6):
            continue
        out["period_min"][rows] = frame_interval_min / dominant_frequency(detrended, padding)
    return out


def growth_rate_per_h(time_min: np.ndarray, count: np.ndarray) -> float:
    """Exponential growth rate (1/h): least-squares slope of log(count) against time; NaN if undefined.

    Frames with no cells are left out (log 0); fewer than 2 frames give NaN.
    """
    keep = count > 0
    if keep.sum() < 2 or np.ptp(time_min[keep]) == 0:
        return float("nan")
    slope = np.polyfit(time_min[keep], np.log(count[keep]), 1)[0]
    return float(slope * 60.0)
