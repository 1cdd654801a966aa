"""Per-observation measures in physical units, vectorised over labels.

Every measure is computed from the object pixels of the whole frame at once (``np.bincount``
over label ids), not object by object, the convex hulls (for solidity) included. Shape
measures reproduce scikit-image's ``regionprops`` definitions (tests check equality): area,
perimeter (4-connected border weighted as in ``skimage.measure.perimeter``), axis lengths and
eccentricity from the second central moments, solidity from the convex hull of the pixel-edge
midpoints.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.spatial import cKDTree

from plateloom.well.object_pixels import ObjectPixels, neighbour_values
from plateloom.well.texture import GLCM_PROPERTIES, TextureSettings, glcm_measures

SQRT2 = np.sqrt(2.0)
# Weights of skimage.measure.perimeter: a border pixel's code is 1 + 2 x (4-neighbours on the
# border) + 10 x (diagonal neighbours on the border); each code adds this length.
PERIMETER_WEIGHTS = np.zeros(50)
PERIMETER_WEIGHTS[[5, 7, 15, 17, 25, 27]] = 1.0
PERIMETER_WEIGHTS[[21, 33]] = SQRT2
PERIMETER_WEIGHTS[[13, 23]] = (1 + SQRT2) / 2


def perimeters(labels: np.ndarray, pixels: ObjectPixels) -> tuple[np.ndarray, np.ndarray]:
    """Perimeter of every object in pixels (as ``skimage.measure.perimeter(mask, 4)`` of each object's mask)
    and, per object pixel, whether it lies on the object's 4-connected border."""
    padded = pixels.padded_labels(1)
    own = pixels.label
    at = pixels.in_padded(1)
    interior = np.ones(len(own), bool)
    for dy, dx in ((-1, 0), (1, 0), (0, -1), (0, 1)):
        interior &= neighbour_values(padded, at, dy, dx) == own
    border_image = np.zeros(np.add(labels.shape, 2), bool)
    on_border, lab = at[~interior], own[~interior]
    border_image.ravel()[on_border] = True
    code = np.ones(len(lab), np.int64)
    for dy, dx, weight in (
        (-1, 0, 2),
        (1, 0, 2),
        (0, -1, 2),
        (0, 1, 2),
        (-1, -1, 10),
        (-1, 1, 10),
        (1, -1, 10),
        (1, 1, 10),
    ):
        same = (neighbour_values(padded, on_border, dy, dx) == lab) & neighbour_values(border_image, on_border, dy, dx)
        code += weight * same
    return np.bincount(lab, PERIMETER_WEIGHTS[code], minlength=pixels.count + 1)[1:], ~interior


def _convex_minorant(group: np.ndarray, y: np.ndarray, x: np.ndarray) -> np.ndarray:
    """Which points lie on the convex minorant of x as a function of y, per group (points sorted
    by group, then y): every point not strictly left of the chord between its neighbours on the
    chain is dropped, all groups and all such points at once, until none is (the vertices that
    Andrew's monotone chain keeps)."""
    alive = np.arange(len(group))
    while len(alive) >= 3:
        a, b, c = alive[:-2], alive[1:-1], alive[2:]
        same = (group[a] == group[b]) & (group[b] == group[c])
        cross = (y[b] - y[a]) * (x[c] - x[a]) - (x[b] - x[a]) * (y[c] - y[a])
        drop = same & (cross <= 0)
        if not drop.any():
            break
        keep = np.ones(len(alive), bool)
        keep[1:-1] = ~drop
        alive = alive[keep]
    on_chain = np.zeros(len(group), bool)
    on_chain[alive] = True
    return on_chain


def _envelope_at(
    obj: np.ndarray, y: np.ndarray, x: np.ndarray, query_obj: np.ndarray, query_y: np.ndarray
) -> np.ndarray:
    """x of each object's chain (vertices sorted by object, then y) at the query heights, by interpolation."""
    span = int(max(y.max(), query_y.max())) + 2
    keys = obj * span + y
    query = query_obj * span + query_y
    right = np.searchsorted(keys, query, side="left")
    exact = keys[np.minimum(right, len(keys) - 1)] == query
    left = np.maximum(right - 1, 0)
    right = np.minimum(right, len(keys) - 1)
    with np.errstate(invalid="ignore", divide="ignore"):
        fraction = (query_y - y[left]) / (y[right] - y[left])
    return np.where(exact, x[right], x[left] + fraction * (x[right] - x[left]))


def convex_areas(pixels: ObjectPixels, border: np.ndarray) -> np.ndarray:
    """Pixels of each object's convex hull image (as ``regionprops``' ``area_convex``).

    The hull is that of the midpoints of the border pixels' edges (coordinates doubled so they
    are integers); pixel centres inside or on it are counted. Row by row the hull spans from
    the convex minorant of the leftmost points to the concave majorant of the rightmost ones,
    both found for all objects at once.
    """
    n = pixels.count
    rows, cols, labels = pixels.row[border], pixels.col[border], pixels.label[border]
    point_y = np.concatenate([2 * rows - 1, 2 * rows + 1, 2 * rows, 2 * rows])
    point_x = np.concatenate([2 * cols, 2 * cols, 2 * cols - 1, 2 * cols + 1])
    point_label = np.tile(labels, 4)
    # one integer key (label, then y, then x), sorted and decoded: faster than a three-key lexsort
    span_y, span_x = int(point_y.max(initial=0)) + 2, int(point_x.max(initial=0)) + 2
    key = np.sort((point_label.astype(np.int64) * span_y + point_y + 1) * span_x + point_x + 1)
    label_and_y, point_x = np.divmod(key, span_x)
    point_label, point_y = np.divmod(label_and_y, span_y)
    point_x, point_y = point_x - 1, point_y - 1
    first = np.ones(len(key), bool)
    first[1:] = (point_label[1:] != point_label[:-1]) | (point_y[1:] != point_y[:-1])
    starts = np.flatnonzero(first)
    line_label, line_y = point_label[starts], point_y[starts]
    leftmost = point_x[starts]
    rightmost = np.maximum.reduceat(point_x, starts)
    # both chains in one run (its cost is per round, not per object): the right one as the
    # minorant of -x, in groups n + label
    on_chain = _convex_minorant(
        np.concatenate([line_label, line_label + n]),
        np.concatenate([line_y, line_y]),
        np.concatenate([leftmost, -rightmost]),
    )
    keep_left, keep_right = on_chain[: len(line_label)], on_chain[len(line_label) :]
    pixel_rows = line_y % 2 == 0  # doubled y of pixel centres is even
    query_label, query_y = line_label[pixel_rows], line_y[pixel_rows]
    low = _envelope_at(
        line_label[keep_left], line_y[keep_left], leftmost[keep_left].astype(float), query_label, query_y
    )
    high = _envelope_at(
        line_label[keep_right], line_y[keep_right], rightmost[keep_right].astype(float), query_label, query_y
    )
    inside = np.floor(high / 2 + 1e-9) - np.ceil(low / 2 - 1e-9) + 1
    return np.bincount(query_label, np.maximum(inside, 0), minlength=n + 1)[1:]


def _empty_table(columns: list[str]) -> pd.DataFrame:
    dtypes = {"touches_border": "bool", "object": "int64"}
    return pd.DataFrame({c: pd.Series(dtype=dtypes.get(c, "float64")) for c in columns})


def _shape_measures(
    labels: np.ndarray, pixels: ObjectPixels, area: np.ndarray, pixel_size_um: float
) -> dict[str, np.ndarray]:
    """Area, perimeter, moments-based axes and eccentricity, solidity, isoperimetric quotient, centroid, border
    flag (``area`` in pixels)."""
    safe_area = np.where(area > 0, area, 1.0)
    cy, cx = pixels.sums(pixels.row.astype(float)) / safe_area, pixels.sums(pixels.col.astype(float)) / safe_area
    dy, dx = pixels.row - cy[pixels.label - 1], pixels.col - cx[pixels.label - 1]
    vyy, vxx, vxy = pixels.sums(dy * dy) / safe_area, pixels.sums(dx * dx) / safe_area, pixels.sums(dy * dx) / safe_area
    half_trace, root = (vyy + vxx) / 2, np.sqrt(((vyy - vxx) / 2) ** 2 + vxy**2)
    major, minor = half_trace + root, np.maximum(half_trace - root, 0.0)
    perimeter, border = perimeters(labels, pixels)
    convex = convex_areas(pixels, border)
    return {
        "object": np.arange(1, pixels.count + 1, dtype=np.int64),
        "area_um2": area * pixel_size_um**2,
        "perimeter_um": perimeter * pixel_size_um,
        "eccentricity": np.sqrt(1 - minor / np.where(major > 0, major, 1.0)),
        "solidity": area / np.where(convex > 0, convex, 1.0),
        "major_axis_um": 4 * np.sqrt(major) * pixel_size_um,
        "minor_axis_um": 4 * np.sqrt(minor) * pixel_size_um,
        "isoperimetric_quotient": np.where(perimeter > 0, 4 * np.pi * area / np.maximum(perimeter, 1e-12) ** 2, np.nan),
        "centroid_x_um": cx * pixel_size_um,
        "centroid_y_um": cy * pixel_size_um,
        "touches_border": _touching_border(labels, pixels.count),
        "edge_distance_um": _edge_distance_px(cx, cy, labels.shape) * pixel_size_um,
    }


def _edge_distance_px(cx: np.ndarray, cy: np.ndarray, shape: tuple[int, ...]) -> np.ndarray:
    """Distance (pixels) from each centroid to the nearest edge of the field (pixel edges, not centres)."""
    height, width = shape[-2], shape[-1]
    return np.minimum(np.minimum(cx + 0.5, width - 0.5 - cx), np.minimum(cy + 0.5, height - 0.5 - cy))


def _intensity_measures(
    planes: np.ndarray,
    channels: list[str],
    background: np.ndarray,
    pixels: ObjectPixels,
    area: np.ndarray,
    saturated: np.ndarray | None = None,
) -> dict[str, np.ndarray]:
    """Per channel: mean and integrated intensity above background, SD of intensity (``area`` in
    pixels), and the fraction of the object's pixels at the camera's ceiling (``saturated``:
    per-channel masks of the raw frame, or None when nothing is saturated)."""
    safe_area = np.where(area > 0, area, 1.0)
    table = {}
    for index, channel in enumerate(channels):
        value = planes[index].ravel()[pixels.index].astype(np.float64)
        mean = pixels.sums(value) / safe_area
        variance = np.maximum(pixels.sums(value * value) / safe_area - mean**2, 0.0)
        table[f"mean_intensity_{channel}"] = mean - background[index]
        table[f"integrated_intensity_{channel}"] = (mean - background[index]) * area
        table[f"std_intensity_{channel}"] = np.sqrt(variance)
        at_ceiling = saturated[index].ravel()[pixels.index] if saturated is not None else None
        table[f"saturated_fraction_{channel}"] = (
            pixels.sums(at_ceiling.astype(np.float64)) / safe_area if at_ceiling is not None else np.zeros(len(area))
        )
    return table


def measure_objects(
    labels: np.ndarray,
    planes: np.ndarray,
    channels: list[str],
    background: np.ndarray,
    pixel_size_um: float,
    cells: np.ndarray | None = None,
    texture: TextureSettings | None = None,
    saturated: np.ndarray | None = None,
) -> pd.DataFrame:
    """Measure every labelled nucleus of one frame.

    ``planes`` is (channels, y, x); ``background`` the per-channel background level that is
    subtracted from intensities. Columns: object, area_um2, perimeter_um, eccentricity,
    solidity, major_axis_um, minor_axis_um, isoperimetric_quotient (4 pi area / perimeter^2, 1 for a
    disk), centroid_x_um, centroid_y_um, touches_border, and per channel c mean_intensity_<c>
    (grey levels above background), integrated_intensity_<c> (mean above background x area in
    pixels), std_intensity_<c> (grey levels) and saturated_fraction_<c> (share of the object's
    pixels at the camera's ceiling, from ``saturated``: per-channel masks of the raw frame). Per
    channel of ``texture.channels``:
    glcm_contrast_<c>, glcm_homogeneity_<c>, glcm_correlation_<c>, glcm_asm_<c> (unitless).
    With ``cells`` (cell-body labels, same ids as the nuclei): cell_area_um2,
    cytoplasm_area_um2, cytoplasm_mean_intensity_<c> (grey levels above background) and
    nuclear_cytoplasmic_ratio_<c>; touches_border then also covers the cell body.
    """
    texture = texture or TextureSettings()
    columns = object_columns(channels, list(texture.channels), cells is not None)
    if labels.max() == 0:
        return _empty_table(columns)
    pixels = ObjectPixels.of(labels)
    area = pixels.sums()
    table = _shape_measures(labels, pixels, area, pixel_size_um)
    table.update(_intensity_measures(planes, channels, background, pixels, area, saturated))
    for channel in texture.channels:
        measures = glcm_measures(planes[channels.index(channel)], labels, pixels, texture.distance_px, texture.levels)
        for prop in GLCM_PROPERTIES:
            table[f"glcm_{prop}_{channel}"] = measures[prop]
    if cells is not None:
        table.update(
            _cytoplasm_measures(labels, cells, planes, channels, background, pixel_size_um, table, pixels.count)
        )
    frame = pd.DataFrame({c: table[c] for c in columns})
    present = area > 0
    return frame if present.all() else frame[present].reset_index(drop=True)


def _touching_border(labels: np.ndarray, count: int) -> np.ndarray:
    """Per label 1..count: whether any of its pixels lies on the image edge."""
    edge = np.concatenate([labels[0], labels[-1], labels[:, 0], labels[:, -1]])
    touches = np.zeros(count + 1, bool)
    touches[edge[edge <= count]] = True
    return touches[1:]


def _cytoplasm_measures(
    nuclei: np.ndarray,
    cells: np.ndarray,
    planes: np.ndarray,
    channels: list[str],
    background: np.ndarray,
    pixel_size_um: float,
    nucleus_table: dict,
    n: int,
) -> dict[str, np.ndarray]:
    flat = cells.ravel()
    index = np.flatnonzero(flat != 0)
    label = flat[index]
    in_cytoplasm = (nuclei.ravel()[index] == 0) & (label <= n)
    cytoplasm_index, cytoplasm_label = index[in_cytoplasm], label[in_cytoplasm]
    cell_area = np.bincount(label[label <= n], minlength=n + 1)[1 : n + 1].astype(float)
    cytoplasm_area = np.bincount(cytoplasm_label, minlength=n + 1)[1 : n + 1].astype(float)
    out = {"cell_area_um2": cell_area * pixel_size_um**2, "cytoplasm_area_um2": cytoplasm_area * pixel_size_um**2}
    out["touches_border"] = nucleus_table["touches_border"] | _touching_border(cells, n)
    for index, channel in enumerate(channels):
        value = planes[index].ravel()[cytoplasm_index].astype(np.float64)
        total = np.bincount(cytoplasm_label, value, minlength=n + 1)[1 : n + 1]
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(cytoplasm_area > 0, total / np.maximum(cytoplasm_area, 1) - background[index], np.nan)
            out[f"cytoplasm_mean_intensity_{channel}"] = mean
            out[f"nuclear_cytoplasmic_ratio_{channel}"] = np.where(
                mean > 0, nucleus_table[f"mean_intensity_{channel}"] / mean, np.nan
            )
    return out


def object_columns(channels: list[str], texture_channels: list[str], with_cells: bool) -> list[str]:
    """Column order of the per-observation table ``measure_objects`` returns."""
    columns = (
        [
            "object",
            "area_um2",
            "perimeter_um",
            "eccentricity",
            "solidity",
            "major_axis_um",
            "minor_axis_um",
            "isoperimetric_quotient",
            "centroid_x_um",
            "centroid_y_um",
            "touches_border",
            "edge_distance_um",
        ]
        + [f"{kind}_intensity_{c}" for c in channels for kind in ("mean", "integrated", "std")]
        + [f"saturated_fraction_{c}" for c in channels]
        + [f"glcm_{p}_{c}" for c in texture_channels for p in GLCM_PROPERTIES]
    )
    if with_cells:
        columns += ["cell_area_um2", "cytoplasm_area_um2"]
        columns += [
            f"{kind}_{c}" for c in channels for kind in ("cytoplasm_mean_intensity", "nuclear_cytoplasmic_ratio")
        ]
    return columns


def centroids_um(table: pd.DataFrame) -> np.ndarray:
    """(n, 2) centroid x, y (um) of a measurement table's objects (by column: a two-column
    selection would build a new table first)."""
    return np.column_stack([table["centroid_x_um"].to_numpy(float), table["centroid_y_um"].to_numpy(float)])


def neighbourhood(xy_um: np.ndarray, radius_um: float) -> tuple[np.ndarray, np.ndarray]:
    """Per object: neighbours within ``radius_um`` (itself not counted) and nearest-neighbour distance (um).

    KD-tree queries over all objects at once; NaN distance when an object is alone in the frame.
    """
    n = len(xy_um)
    if n == 0:
        return np.zeros(0, np.int64), np.zeros(0)
    tree = cKDTree(xy_um)
    counts = tree.query_ball_point(xy_um, radius_um, return_length=True).astype(np.int64) - 1
    if n == 1:
        return counts, np.array([np.nan])
    distances, _ = tree.query(xy_um, k=2)
    return counts, distances[:, 1]
