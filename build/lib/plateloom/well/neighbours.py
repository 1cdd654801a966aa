"""The neighbour graph of a well: Delaunay triangulation of the nuclear centroids of each frame,
kept along tracks."""

from __future__ import annotations

import numpy as np
from scipy import sparse
from scipy.spatial import Delaunay, QhullError


def delaunay_edges(xy: np.ndarray, max_edge_um: float) -> np.ndarray:
    """Edges (i, j), i < j, of the Delaunay triangulation of points ``xy`` (n, 2; um) no longer than ``max_edge_um``."""
    n = len(xy)
    if n < 2:
        return np.empty((0, 2), np.int64)
    if n == 2:
        edges = np.array([[0, 1]])
    else:
        try:
            simplices = Delaunay(xy).simplices
            edges = np.concatenate([simplices[:, [0, 1]], simplices[:, [1, 2]], simplices[:, [0, 2]]])
        except QhullError:  # all points on a line: the triangulation degenerates to the chain along it
            centred = xy - xy.mean(axis=0)
            direction = np.linalg.svd(centred, full_matrices=False)[2][0]
            order = np.argsort(centred @ direction, kind="stable")
            edges = np.column_stack([order[:-1], order[1:]])
        edges = np.unique(np.sort(edges, axis=1), axis=0)
    length = np.hypot(*(xy[edges[:, 0]] - xy[edges[:, 1]]).T)
    return edges[length <= max_edge_um].astype(np.int64)


def track_neighbour_pairs(
    frame: np.ndarray, track: np.ndarray, x: np.ndarray, y: np.ndarray, max_edge_um: float, min_fraction: float
) -> np.ndarray:
    """Pairs of track ids (a < b) joined by a Delaunay edge in >= ``min_fraction`` of the frames both are present."""
    ids = np.unique(track)
    if len(ids) < 2:
        return np.empty((0, 2), np.int64)
    rows = np.searchsorted(ids, track)
    n_frames = int(frame.max()) + 1
    present = np.zeros((len(ids), n_frames), bool)
    present[rows, frame] = True
    keys = []
    order = np.argsort(frame, kind="stable")
    bounds = np.searchsorted(frame[order], np.arange(n_frames + 1))
    for f in range(n_frames):
        members = order[bounds[f] : bounds[f + 1]]
        edges = delaunay_edges(np.column_stack([x[members], y[members]]), max_edge_um)
        a, b = rows[members[edges[:, 0]]], rows[members[edges[:, 1]]]
        keys.append(np.minimum(a, b) * len(ids) + np.maximum(a, b))
    joined_keys, joined = (
        np.unique(np.concatenate(keys), return_counts=True) if keys else (np.empty(0, int), np.empty(0, int))
    )
    a, b = joined_keys // len(ids), joined_keys % len(ids)
    together = (present[a] & present[b]).sum(axis=1)
    keep = joined >= min_fraction * together
    return np.column_stack([ids[a[keep]], ids[b[keep]]]).astype(np.int64)


def pairs_at_distance_two(pairs: np.ndarray) -> np.ndarray:
    """Pairs (a < b) of nodes two edges apart in the graph of ``pairs`` and not joined directly."""
    if len(pairs) == 0:
        return np.empty((0, 2), np.int64)
    nodes, index = np.unique(pairs, return_inverse=True)
    index = index.reshape(-1, 2)
    n = len(nodes)
    adjacency = sparse.coo_matrix((np.ones(len(index)), (index[:, 0], index[:, 1])), shape=(n, n)).tocsr()
    adjacency = ((adjacency + adjacency.T) > 0).astype(np.int64)
    two = sparse.triu(adjacency @ adjacency, k=1).tocsr()
    two = two - two.multiply(adjacency)
    two.eliminate_zeros()
    a, b = two.nonzero()
    return np.column_stack([nodes[a], nodes[b]]).astype(np.int64)
