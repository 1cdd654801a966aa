"""Frame-to-frame linking as a linear assignment problem (Jaqaman et al. 2008, Nat. Methods 5:695).

The cost matrix is augmented with birth and death alternatives so that an object may start
or end a track instead of taking a poor link; links longer than the maximum displacement
are forbidden. A link may also pay for a change of appearance (nuclear brightness and size, a
bounded term), which tells fast movers apart where distance alone is ambiguous. The matrix is
sparse (candidate links from a KD-tree, plus the alternatives), so a frame of n objects costs
about O(n log n) to build and the assignment works on O(n) entries.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.sparse.csgraph import min_weight_full_bipartite_matching
from scipy.spatial import cKDTree


def sparse_assignment(
    n_rows: int, n_cols: int, rows: np.ndarray, cols: np.ndarray, costs: np.ndarray, alternative: float
) -> np.ndarray:
    """Column chosen for each row (or -1) in the LAP with 'no link' alternatives for every row and column.

    The augmented matrix of Jaqaman et al.: links (rows x cols), a transposed copy that keeps it
    square, and a 'no link' entry for every row and every column. Every full matching has
    n_rows + n_cols edges, so adding 1 to every cost keeps the optimum and avoids zero weights,
    which a sparse matrix would drop.
    """
    if n_rows == 0 or n_cols == 0 or len(rows) == 0:
        return np.full(n_rows, -1, dtype=np.int64)
    all_rows = np.concatenate([rows, n_rows + cols, np.arange(n_rows), n_rows + np.arange(n_cols)])
    all_cols = np.concatenate([cols, n_cols + rows, n_cols + np.arange(n_rows), np.arange(n_cols)])
    values = 1.0 + np.concatenate([costs, costs, np.full(n_rows, alternative), np.full(n_cols, alternative)])
    matrix = sparse.csr_matrix((values, (all_rows, all_cols)), shape=(n_rows + n_cols, n_cols + n_rows))
    row_index, col_index = min_weight_full_bipartite_matching(matrix)
    assigned = np.empty(n_rows + n_cols, dtype=np.int64)
    assigned[row_index] = col_index
    chosen = assigned[:n_rows]
    return np.where(chosen < n_cols, chosen, -1)


def _candidate_links(
    previous_um: np.ndarray, current_um: np.ndarray, reach_um: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(previous index, current index, distance um) of every pair closer than ``reach_um``, zero
    distances included."""
    pairs = cKDTree(previous_um).sparse_distance_matrix(cKDTree(current_um), reach_um, output_type="ndarray")
    return pairs["i"].astype(np.int64), pairs["j"].astype(np.int64), pairs["v"]


def _smallest_per_pair(
    rows: np.ndarray, cols: np.ndarray, distance: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The smallest distance of every (row, col) pair listed more than once."""
    order = np.lexsort((distance, cols, rows))
    rows, cols, distance = rows[order], cols[order], distance[order]
    first = np.ones(len(rows), bool)
    first[1:] = (rows[1:] != rows[:-1]) | (cols[1:] != cols[:-1])
    return rows[first], cols[first], distance[first]


APPEARANCE_CAP = 16.0  # a change of appearance costs at most this squared number of its SDs (4 SDs)


@dataclass(frozen=True)
class Appearance:
    """Appearance of the objects of two frames for the link cost: features (columns, e.g. log
    nuclear intensity and log area) already divided by the SD of their change along a link, and
    ``weight_um2``, the squared distance one SD of change costs."""

    previous: np.ndarray
    current: np.ndarray
    weight_um2: float

    def penalty(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Cost (um^2) of the appearance change of each candidate link, at most weight x APPEARANCE_CAP."""
        change = np.square(self.current[cols] - self.previous[rows]).sum(axis=1)
        return self.weight_um2 * np.minimum(change, APPEARANCE_CAP)


def link_frames(
    previous_um: np.ndarray,
    current_um: np.ndarray,
    max_displacement_um: float,
    predicted_um: np.ndarray | None = None,
    appearance: Appearance | None = None,
) -> np.ndarray:
    """Match objects of two consecutive frames.

    ``previous_um`` (n, 2) and ``current_um`` (m, 2) are centroids in micrometres. With
    ``predicted_um`` (n, 2), each previous object's expected position this frame (its last
    position plus its last step, a constant-velocity prediction), a link costs the smaller of the
    squared distances to the last and to the predicted position, so persistent movers keep their
    track while a cell that turns or stops is no worse off. With ``appearance``, a link also pays
    for the change of its object's appearance (Gaussian log-likelihood in both terms, the
    appearance term capped so that a cell that rounds up or condenses can still be linked). Returns
    an int array of length m: for each current object the index of the previous object it
    continues, or -1 when it starts a new track.
    """
    n, m = len(previous_um), len(current_um)
    links = np.full(m, -1, dtype=np.int64)
    if n == 0 or m == 0:
        return links
    rows, cols, distance = _candidate_links(previous_um, current_um, max_displacement_um)
    if predicted_um is not None:
        ahead = _candidate_links(predicted_um, current_um, max_displacement_um)
        rows, cols, distance = _smallest_per_pair(
            np.concatenate([rows, ahead[0]]), np.concatenate([cols, ahead[1]]), np.concatenate([distance, ahead[2]])
        )
    if len(rows) == 0:
        return links
    # Any allowed link (distance <= max_displacement, any appearance) beats ending one track plus
    # starting another.
    costs, alternative = distance**2, max_displacement_um**2
    if appearance is not None:
        costs = costs + appearance.penalty(rows, cols)
        alternative += appearance.weight_um2 * APPEARANCE_CAP
    successor = sparse_assignment(n, m, rows, cols, costs, alternative)
    linked = successor >= 0
    links[successor[linked]] = np.nonzero(linked)[0]
    return links


def track_features(
    frame: np.ndarray, track: np.ndarray, x_um: np.ndarray, y_um: np.ndarray, frame_interval_min: float, min_frames: int
) -> dict[str, np.ndarray]:
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
    # reduceat sums from each start to the next start; the last step of a track is a jump to the
    # next track, zeroed above
    end = start + counts - 1
    duration = (frame[end] - frame[start]) * frame_interval_min
    net = np.hypot(x_um[end] - x_um[start], y_um[end] - y_um[start])
    valid = counts >= min_frames
    with np.errstate(invalid="ignore", divide="ignore"):
        speed = np.where(valid & (duration > 0), path / duration, np.nan)
        straightness = np.where(valid & (path > 0), net / path, np.nan)
    return {
        "track": tracks,
        "n_frames": counts,
        "duration_min": duration,
        "path_length_um": path,
        "net_displacement_um": net,
        "speed_um_per_min": speed,
        "straightness": straightness,
    }


def _track_ends(frame: np.ndarray, track: np.ndarray, x: np.ndarray, y: np.ndarray) -> pd.DataFrame:
    order = np.lexsort((frame, track))
    data = pd.DataFrame({"track": track[order], "frame": frame[order], "x": x[order], "y": y[order]})
    grouped = data.groupby("track", sort=True)
    first, last = grouped.first(), grouped.last()
    return pd.DataFrame(
        {
            "start_frame": first["frame"],
            "start_x": first["x"],
            "start_y": first["y"],
            "end_frame": last["frame"],
            "end_x": last["x"],
            "end_y": last["y"],
        }
    )


def _relabel(track: np.ndarray, frame: np.ndarray) -> np.ndarray:
    """Consecutive ids 0, 1, ... in order of first appearance (frame, then old id): deterministic."""
    order = np.lexsort((track, frame))
    _, first = np.unique(track[order], return_index=True)
    old_in_order = track[order][np.sort(first)]
    mapping = pd.Series(np.arange(len(old_in_order)), index=old_in_order)
    return mapping.loc[track].to_numpy(np.int64)


def close_gaps(
    frame: np.ndarray,
    track: np.ndarray,
    x_um: np.ndarray,
    y_um: np.ndarray,
    max_gap_frames: int,
    max_displacement_um: float,
) -> np.ndarray:
    """Join track segments across up to ``max_gap_frames`` missed frames (the gap-closing LAP).

    A segment ending at frame e may continue as a segment starting at s, 2 <= s - e <= max_gap + 1,
    within max_displacement_um x sqrt(s - e) (diffusive scaling); cost d^2 / (s - e). Returns new
    track ids (consecutive, in order of first appearance).
    """
    if max_gap_frames < 1 or len(track) == 0:
        return _relabel(track, frame)
    ends = _track_ends(frame, track, x_um, y_um)
    ids = ends.index.to_numpy()
    radius = max_displacement_um * np.sqrt(max_gap_frames + 1)
    pairs = cKDTree(ends[["end_x", "end_y"]].to_numpy()).sparse_distance_matrix(
        cKDTree(ends[["start_x", "start_y"]].to_numpy()), radius, output_type="coo_matrix"
    )
    gap = ends["start_frame"].to_numpy()[pairs.col] - ends["end_frame"].to_numpy()[pairs.row]
    allowed = (
        (gap >= 2) & (gap <= max_gap_frames + 1) & (pairs.data <= max_displacement_um * np.sqrt(np.maximum(gap, 1)))
    )
    rows, cols = pairs.row[allowed], pairs.col[allowed]
    costs = pairs.data[allowed] ** 2 / gap[allowed]
    successor = sparse_assignment(len(ids), len(ids), rows, cols, costs, max_displacement_um**2)
    root = np.arange(len(ids))
    predecessor = np.full(len(ids), -1)
    predecessor[successor[successor >= 0]] = np.nonzero(successor >= 0)[0]
    for i in np.argsort(ends["start_frame"].to_numpy(), kind="stable"):  # chains follow time order
        if predecessor[i] >= 0:
            root[i] = root[predecessor[i]]
    joined = pd.Series(ids[root], index=ids).loc[track].to_numpy()
    return _relabel(joined, frame)
