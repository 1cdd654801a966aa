"""Linking along a site, frame by frame, with a record of how hard the linking distance binds.

``FrameLinker`` gives each frame's objects the track of the object they continue in the previous
usable frame (``plateloom.well.tracking.link_frames``, with each object's last step as its
predicted move) and counts, per frame, the links close to
the cutoff and the plausible links the cutoff forbade. When config gives no linking distance, it
is estimated from the first two frames: twice the 95th percentile of the displacements of
unambiguous pairs (mutual nearest neighbours whose nearest distance is under half the second
nearest), so slow and fast screens both get a cutoff above their own movement. Unambiguous pairs
favour the slower cells, so the estimate then grows with the links made (twice the 95th
percentile of every link length so far), up to the median nearest-neighbour spacing.
"""

from __future__ import annotations

import numpy as np
from scipy.spatial import cKDTree

from plateloom.well.tracking import link_frames

NEAR_CUTOFF = 0.8  # a link longer than this share of the cutoff is "near the cutoff"
CUT_OFF_REACH = 2.0  # an unlinked pair closer than this many cutoffs, both free, is a link the cutoff forbade
ESTIMATE_FACTOR = 2.0  # estimated cutoff: this x the 95th percentile of unambiguous displacements
MIN_UNAMBIGUOUS_PAIRS = 10


def unambiguous_displacements(previous_um: np.ndarray, current_um: np.ndarray) -> np.ndarray:
    """Displacements (um) of mutual nearest neighbours between two frames whose nearest distance is
    under half the second nearest."""
    if len(previous_um) < 2 or len(current_um) < 2:
        return np.empty(0)
    forward_d, forward_i = cKDTree(previous_um).query(current_um, k=2)
    _, backward_i = cKDTree(current_um).query(previous_um, k=1)
    mutual = backward_i[forward_i[:, 0]] == np.arange(len(current_um))
    clear = forward_d[:, 0] < 0.5 * forward_d[:, 1]
    return forward_d[mutual & clear, 0]


def estimate_linking_distance(previous_um: np.ndarray, current_um: np.ndarray) -> float:
    """A linking distance (um) from two consecutive frames: ESTIMATE_FACTOR x the 95th percentile of
    unambiguous displacements; with too few of them, half the median nearest-neighbour distance."""
    displacements = unambiguous_displacements(previous_um, current_um)
    if len(displacements) >= MIN_UNAMBIGUOUS_PAIRS:
        return float(ESTIMATE_FACTOR * np.percentile(displacements, 95))
    if len(current_um) >= 2:
        spacing, _ = cKDTree(current_um).query(current_um, k=2)
        return float(0.5 * np.median(spacing[:, 1]))
    return float("nan")


class FrameLinker:
    """Frame-to-frame linking along a site (see the module docstring). ``max_displacement_um``
    None: estimated from the first two frames with objects. After each frame, ``last`` holds its
    counts: links, links_near_cutoff, links_cut_off, linking_distance_um."""

    def __init__(self, max_displacement_um: float | None):
        self.max_displacement_um = max_displacement_um
        self.estimated = max_displacement_um is None
        self.link_lengths: list[float] = []
        self.break_links()
        self.next_track = 0
        self.last: dict[str, float] = {}

    def break_links(self) -> None:
        self.previous_xy, self.previous_tracks = np.empty((0, 2)), np.empty(0, dtype=np.int64)
        self.previous_step = np.empty((0, 2))

    def tracks_of(self, xy: np.ndarray) -> np.ndarray:
        """Track ids of this frame's objects (centroids in um), continuing the previous frame's."""
        if self.max_displacement_um is None and len(self.previous_xy) and len(xy):
            estimate = estimate_linking_distance(self.previous_xy, xy)
            self.max_displacement_um = estimate if np.isfinite(estimate) else None
        links = self._links(xy)
        if self.estimated and self._grow_cutoff(xy, links):
            links = self._links(xy)
        cutoff = self.max_displacement_um
        self.last = self._counts(xy, links, cutoff)
        previous = self.previous_tracks
        tracks = np.where(links >= 0, previous[np.clip(links, 0, None)] if len(previous) else -1, -1)
        new = tracks < 0
        tracks[new] = self.next_track + np.arange(new.sum())
        self.next_track += int(new.sum())
        linked = links >= 0
        self.previous_step = np.zeros_like(xy, dtype=float)
        self.previous_step[linked] = xy[linked] - self.previous_xy[links[linked]]
        self.previous_xy, self.previous_tracks = xy, tracks.astype(np.int64)
        return self.previous_tracks

    def _links(self, xy: np.ndarray) -> np.ndarray:
        cutoff = self.max_displacement_um
        if not cutoff:
            return np.full(len(xy), -1, np.int64)
        return link_frames(self.previous_xy, xy, cutoff, self.previous_xy + self.previous_step)

    def _grow_cutoff(self, xy: np.ndarray, links: np.ndarray) -> bool:
        """Raise an estimated cutoff when the links made so far say the cells move further: to
        ESTIMATE_FACTOR x the 95th percentile of every link length seen, at most the median
        nearest-neighbour spacing (beyond it no frame-to-frame link can be trusted). True if raised."""
        linked = links >= 0
        self.link_lengths.extend(np.hypot(*(xy[linked] - self.previous_xy[links[linked]]).T))
        if len(self.link_lengths) < MIN_UNAMBIGUOUS_PAIRS or len(xy) < 2 or not self.max_displacement_um:
            return False
        spacing, _ = cKDTree(xy).query(xy, k=2)
        wanted = min(ESTIMATE_FACTOR * np.percentile(self.link_lengths, 95), float(np.median(spacing[:, 1])))
        if wanted <= self.max_displacement_um:
            return False
        self.max_displacement_um = float(wanted)
        return True

    def _counts(self, xy: np.ndarray, links: np.ndarray, cutoff: float | None) -> dict[str, float]:
        linked = links >= 0
        counts = {"links": int(linked.sum()), "links_near_cutoff": 0, "links_cut_off": 0}
        counts["linking_distance_um"] = float(cutoff) if cutoff else float("nan")
        if not cutoff or len(self.previous_xy) == 0 or len(xy) == 0:
            return counts
        length = np.hypot(*(xy[linked] - self.previous_xy[links[linked]]).T)
        counts["links_near_cutoff"] = int(np.sum(length > NEAR_CUTOFF * cutoff))
        free_previous = np.ones(len(self.previous_xy), bool)
        free_previous[links[linked]] = False
        distance, nearest = cKDTree(self.previous_xy).query(xy[~linked], k=1)
        forbidden = (distance > cutoff) & (distance <= CUT_OFF_REACH * cutoff) & free_previous[nearest]
        counts["links_cut_off"] = int(len(np.unique(nearest[forbidden])))
        return counts
