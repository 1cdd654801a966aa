"""Frame-to-frame linking as a linear assignment problem (Jaqaman et al. 2008, Nat. Methods 5:695).

The cost matrix is augmented with birth and death alternatives so that an object may start
or end a track instead of taking a poor link; links longer than the maximum displacement
are forbidden.
"""

from __future__ import annotations

import numpy as np
from scipy.optimize import linear_sum_assignment
from scipy.spatial import cKDTree

FORBIDDEN = 1e12


def link_frames(previous_um: np.ndarray, current_um: np.ndarray, max_displacement_um: float) -> np.ndarray:
    """Match objects of two consecutive frames.

    ``previous_um`` (n, 2) and ``current_um`` (m, 2) are centroids in micrometres. Returns an
    int array of length m: for each current object the index of the previous object it
    continues, or -1 when it starts a new track.
    """
    n, m = len(previous_um), len(current_um)
    links = np.full(m, -1, dtype=np.int64)
    if n == 0 or m == 0:
        return links
    pairs = cKDTree(previous_um).sparse_distance_matrix(cKDTree(current_um), max_displacement_um, output_type="coo_matrix")
    if pairs.nnz == 0:
        return links
    alternative = max_displacement_um**2  # any allowed link (cost d^2 <= this) beats ending plus starting
    cost = np.full((n + m, m + n), FORBIDDEN)
    link_cost = pairs.data**2
    cost[pairs.row, pairs.col] = link_cost                      # previous i -> current j
    cost[n + pairs.col, m + pairs.row] = link_cost              # the transposed block keeps the matrix square
    cost[np.arange(n), m + np.arange(n)] = alternative          # previous i ends
    cost[n + np.arange(m), np.arange(m)] = alternative          # current j starts
    rows, cols = linear_sum_assignment(cost)
    chosen = (rows < n) & (cols < m) & (cost[rows, cols] < FORBIDDEN)
    links[cols[chosen]] = rows[chosen]
    return links


def track_features(frame: np.ndarray, track: np.ndarray, x_um: np.ndarray, y_um: np.ndarray,
                   frame_interval_min: float, min_frames: int) -> dict[str, np.ndarray]:
    """Per-track motility from observations (arrays of equal length, any order).

    Returns arrays indexed by track id order (sorted unique ``track``): n_frames, duration_min,
    path_length_um, net_displacement_um, speed_um_per_min (path length / duration) and
    straightness (net displacement / path length). Tracks shorter than ``min_frames`` get NaN.
    """
    order = np.lexsort((frame, track))
    frame, track, x_um, y_um = frame[order], track[order], x_um[order], y_um[order]
    tracks, start, counts = np.unique(track, return_index=True, return_counts=True)
    same = track[1:] == track[:-1]
    step = np.where(same, np.hypot(np.diff(x_um), np.diff(y_um)), 0.0)
    path = np.add.reduceat(np.append(step, 0.0), start) if len(track) else np.array([])
    # reduceat sums from each start to the next start; the last step of a track is a jump to the next track, zeroed above
    end = start + counts - 1
    duration = (frame[end] - frame[start]) * frame_interval_min
    net = np.hypot(x_um[end] - x_um[start], y_um[end] - y_um[start])
    valid = counts >= min_frames
    with np.errstate(invalid="ignore", divide="ignore"):
        speed = np.where(valid & (duration > 0), path / duration, np.nan)
        straightness = np.where(valid & (path > 0), net / path, np.nan)
    return {"track": tracks, "n_frames": counts, "duration_min": duration, "path_length_um": path,
            "net_displacement_um": net, "speed_um_per_min": speed, "straightness": straightness}
