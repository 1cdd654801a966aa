"""Divisions: a new track next to a continuing one whose nucleus rounded up just before.

A mitotic nucleus rounds up, condenses and brightens, then two daughters appear where it was
(common practice in live-cell lineage calls). Candidates are pairs of a track starting at frame t
and a track continuing from t - 1 to t within a distance; a LAP per frame (as in the linking,
Jaqaman et al. 2008) picks at most one daughter per mother and frame.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.spatial import cKDTree

from plateloom.well.tracking import sparse_assignment


def rounding_ratios(frame: np.ndarray, track: np.ndarray, intensity: np.ndarray) -> np.ndarray:
    """Per observation: its nuclear intensity over its track's median (NaN where the median is
    not positive)."""
    median = pd.Series(intensity).groupby(track).transform("median").to_numpy(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(median > 0, intensity / median, np.nan)


@dataclass(frozen=True)
class DivisionRule:
    """Which start-next-to-a-continuing-track pairs count as divisions.

    ``max_distance_um``: the new start within this distance of the mother's previous position.
    ``intensity`` (per observation, the nuclear channel's mean) and ``min_rounding``: if given, the
    mother rounds up before it divides: its intensity in one of its last two frames at least
    ``min_rounding`` times its track's median. ``min_daughter_frames``: both daughters seen this often.
    """

    max_distance_um: float
    intensity: np.ndarray | None = None
    min_rounding: float = 1.0
    min_daughter_frames: int = 1


def _first_rows(mask: np.ndarray, track: np.ndarray, ids: np.ndarray) -> np.ndarray:
    """Row of each of ``ids`` among the rows in ``mask`` (its first)."""
    rows = np.flatnonzero(mask)
    order = np.argsort(track[rows], kind="stable")
    position = np.searchsorted(track[rows][order], ids)
    return rows[order][position]


def _kept_pairs(
    frame: np.ndarray,
    track: np.ndarray,
    t: int,
    new: np.ndarray,
    continuing: np.ndarray,
    rounding: np.ndarray,
    xy_um: tuple[np.ndarray, np.ndarray],
    rule: DivisionRule,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(new index, continuing index, distance um) of the candidate pairs at frame ``t`` the rule keeps."""
    x_um, y_um = xy_um
    now, before, later = frame == t, frame == t - 1, frame >= t
    new_rows, mother_rows = _first_rows(now, track, new), _first_rows(before, track, continuing)
    has_earlier = np.isin(continuing, track[frame == t - 2])
    earlier_rows = mother_rows.copy()
    earlier_rows[has_earlier] = _first_rows(frame == t - 2, track, continuing[has_earlier])
    start_xy = np.column_stack([x_um[new_rows], y_um[new_rows]])
    mother_xy = np.column_stack([x_um[mother_rows], y_um[mother_rows]])
    pairs: sparse.coo_matrix = cKDTree(start_xy).sparse_distance_matrix(
        cKDTree(mother_xy), rule.max_distance_um, output_type="coo_matrix"
    )
    size = int(track.max()) + 1
    new_length = np.bincount(track, minlength=size)[new]
    sister_length = np.bincount(track[later], minlength=size)[continuing]
    keep = (new_length[pairs.row] >= rule.min_daughter_frames) & (sister_length[pairs.col] >= rule.min_daughter_frames)
    if rule.intensity is not None:
        keep &= np.fmax(rounding[mother_rows], rounding[earlier_rows])[pairs.col] >= rule.min_rounding
    return pairs.row[keep], pairs.col[keep], pairs.data[keep]


def split_dim_heads(frame: np.ndarray, track: np.ndarray, intensity: np.ndarray, share: float = 0.5) -> np.ndarray:
    """Track ids with each track's leading observations dimmer than ``share`` of its median given
    their own id: the glow around a rounded, saturated mother is segmented as a faint object that the
    linking then joins to a daughter, which would make the daughter start a frame too early."""
    median = pd.Series(intensity).groupby(track).transform("median").to_numpy(float)
    bright = intensity >= share * median
    first_bright = pd.Series(np.where(bright, frame, np.iinfo(np.int64).max)).groupby(track).transform("min")
    head = ~bright & (frame < first_bright.to_numpy())
    out = track.copy()
    if not head.any():
        return out
    heads = np.unique(track[head])
    out[head] = int(track.max()) + 1 + np.searchsorted(heads, track[head])
    return out


def find_divisions(
    frame: np.ndarray,
    track: np.ndarray,
    x_um: np.ndarray,
    y_um: np.ndarray,
    max_distance_um: float,
    rule: DivisionRule | None = None,
) -> tuple[np.ndarray, pd.DataFrame]:
    """Divisions: a track starting at frame t next to a track that continues from t - 1 to t.

    Each such pair (cost: distance of the new start to the continuing track's position at t - 1)
    that ``rule`` keeps is chosen by a LAP per frame, so a mother divides at most once per frame.
    With intensities, dim leading observations of a track are split off first (``split_dim_heads``).
    The mother's track ends at t - 1; from t on, both daughters get their own track ids. Returns
    new track ids and a table (track, parent_track) listing every daughter.
    """
    rule = rule or DivisionRule(max_distance_um)
    track = track.copy() if rule.intensity is None else split_dim_heads(frame, track, rule.intensity)
    rounding = rounding_ratios(frame, track, rule.intensity) if rule.intensity is not None else np.array([])
    next_id = int(track.max()) + 1 if len(track) else 0
    parents: list[tuple[int, int]] = []
    first_frame = int(frame.min()) if len(frame) else 0
    seen = np.unique(track[frame == first_frame])
    for t in np.unique(frame)[1:]:
        tracks_now, tracks_before = np.unique(track[frame == t]), np.unique(track[frame == t - 1])
        # a track that starts here: one back after a gap (gap closing) is not a new daughter
        new = np.setdiff1d(tracks_now, seen)
        seen = np.union1d(seen, tracks_now)
        continuing = np.intersect1d(tracks_now, tracks_before)
        if len(new) == 0 or len(continuing) == 0:
            continue
        rows, cols, distance = _kept_pairs(frame, track, t, new, continuing, rounding, (x_um, y_um), rule)
        chosen = sparse_assignment(len(new), len(continuing), rows, cols, distance**2, max_distance_um**2)
        for daughter_index, mother_index in enumerate(chosen):
            if mother_index < 0:
                continue
            mother = int(continuing[mother_index])
            track[(track == mother) & (frame >= t)] = next_id
            seen = np.append(seen, next_id)
            parents += [(int(new[daughter_index]), mother), (next_id, mother)]
            next_id += 1
    return track, pd.DataFrame(parents, columns=["track", "parent_track"])
