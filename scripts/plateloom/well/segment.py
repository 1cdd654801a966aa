"""Segmentation of nuclei (Gaussian smoothing, automatic threshold, seeded watershed) and a
label-free path for phase-contrast or bright-field images.

Whole-image work is a handful of vectorised filters; the costly splitting of touching nuclei
(distance transform, h-maxima, watershed) runs only on the bounding boxes of the components
whose shape says they may hold more than one nucleus.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from skimage.feature import peak_local_max
from skimage.morphology import h_maxima
from skimage.segmentation import watershed

from plateloom.well.object_pixels import stable_label_order
from plateloom.well.thresholds import BACKGROUND_STRIDE, fill_holes, object_threshold, smooth_image

# Seeds of the shape split rise this many pixels (distance transform) above the saddle to the next
# seed (the default; the edges path splits grown outlines at plateloom.well.nuclei.GROWN_SEED_DEPTH_PX).
SEED_DEPTH_PX = 1.0


# A component is sent to the splitting step when its area is this many times the frame's
# median component area, or when it fills less of its moment ellipse than this fraction
# (a convex ellipse fills about 1; two touching disks fill 0.89).
SPLIT_AREA_FACTOR = 1.5


SPLIT_ELLIPSE_FILL = 0.96


def _object_pixels(labels: np.ndarray, index: np.ndarray | None) -> tuple[np.ndarray, np.ndarray]:
    """Flat index and label of every object pixel; ``index`` (flat indices holding every object
    pixel, maybe more) spares a pass over the whole image."""
    if index is None:
        index = np.flatnonzero(labels > 0)  # on a bool image: several times faster than on int32
        return index, labels.ravel()[index]
    label = labels.ravel()[index]
    inside = label > 0
    return index[inside], label[inside]


def _bounding_boxes(index: np.ndarray, label: np.ndarray, wanted: np.ndarray, width: int) -> list[tuple[slice, slice]]:
    """Bounding boxes (as ``ndimage.find_objects``) of the ``wanted`` labels, from their pixels'
    flat indices, without a pass over the whole image."""
    is_wanted = np.zeros(int(max(label.max(initial=0), wanted.max(initial=0))) + 1, bool)
    is_wanted[wanted] = True
    chosen = is_wanted[label]
    index, label = index[chosen], label[chosen]
    order = stable_label_order(label)
    index, label = index[order], label[order]
    starts = np.flatnonzero(np.diff(label, prepend=-1))
    y, x = np.divmod(index, width)
    boxes = np.stack(
        [
            np.minimum.reduceat(y, starts),
            np.maximum.reduceat(y, starts) + 1,
            np.minimum.reduceat(x, starts),
            np.maximum.reduceat(x, starts) + 1,
        ],
        axis=1,
    )
    found = dict(zip(label[starts].tolist(), boxes.tolist()))
    return [(slice(found[w][0], found[w][1]), slice(found[w][2], found[w][3])) for w in wanted.tolist()]


def _component_shapes(index: np.ndarray, label: np.ndarray, width: int, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Area (pixels) and fill of the moment ellipse (area / (4 pi sqrt(det covariance))) of labels
    1..count, from their pixels' flat indices and labels in an image ``width`` pixels wide."""
    y, x = np.divmod(index, width)
    area = np.bincount(label, minlength=count + 1).astype(float)
    safe = np.maximum(area, 1)
    my, mx = np.bincount(label, y, count + 1) / safe, np.bincount(label, x, count + 1) / safe
    dy, dx = y - my[label], x - mx[label]
    vyy = np.bincount(label, dy * dy, count + 1) / safe + 1 / 12  # + 1/12: a pixel is a unit square
    vxx = np.bincount(label, dx * dx, count + 1) / safe + 1 / 12
    vxy = np.bincount(label, dy * dx, count + 1) / safe
    ellipse_area = 4 * np.pi * np.sqrt(np.maximum(vyy * vxx - vxy**2, 1e-12))
    return area[1:], area[1:] / ellipse_area[1:]


def _strip(masks: list[np.ndarray], gap: int) -> tuple[np.ndarray, np.ndarray]:
    """The masks laid side by side, ``gap`` background pixels apart (and around), as one image of
    mask numbers 1..n; and the first column of each."""
    height = max(m.shape[0] for m in masks) + 2 * gap
    starts = np.cumsum([gap] + [m.shape[1] + gap for m in masks])
    piece = np.zeros((height, int(starts[-1])), np.int32)
    for number, (mask, start) in enumerate(zip(masks, starts), start=1):
        piece[gap : gap + mask.shape[0], start : start + mask.shape[1]][mask] = number
    return piece, starts


def _split_components(masks: list[np.ndarray], min_distance_px: int, seed_depth_px: float) -> list[np.ndarray]:
    """Watershed split of components on their distance transform, all in one pass.

    ``masks`` are the components' bounding-box masks; they are laid side by side in one strip
    image, ``min_distance_px`` + 1 pixels apart so that maxima of neighbouring masks never suppress
    each other, and every whole-image step runs once. Seeds are the distance maxima at least
    ``min_distance_px`` apart that rise ``seed_depth_px`` above the saddle to the next one, so the
    long ridge of an elongated nucleus gives one seed; only the masks with two or more distance
    maxima (most have one) go on to that depth test. Returns, per mask, its parts numbered 1..k
    in raster order (all 1 when it is not split); the image edge counts as background.
    """
    gap = min_distance_px + 1
    piece, starts = _strip(masks, gap)
    # one search over the strip (skimage's per-label search, ``labels=``, loops over the labels)
    distance = ndimage.distance_transform_edt(piece > 0)
    peaks = peak_local_max(distance, min_distance=min_distance_px, exclude_border=False)
    owner = piece[tuple(peaks.T)]
    several = np.flatnonzero(np.bincount(owner, minlength=len(masks) + 1)[1:] >= 2)
    out = [mask.astype(np.int32) for mask in masks]
    if len(several) == 0:
        return out
    # the peaks of those masks: which of them (0..) and where in its own mask
    chosen = np.isin(owner, several + 1)
    which = np.searchsorted(several, owner[chosen] - 1)
    local = peaks[chosen] - np.stack([np.full(len(which), gap), starts[several[which]]], axis=1)
    for number, parts in zip(several, _split_by_depth([masks[i] for i in several], which, local, seed_depth_px)):
        out[number] = parts
    return out


def _split_by_depth(
    masks: list[np.ndarray], which: np.ndarray, local: np.ndarray, seed_depth_px: float
) -> list[np.ndarray]:
    """The split of masks that have several distance maxima (``which`` mask, 0.., and ``local``
    position in it of each maximum): seeds as in ``_split_components``."""
    piece, starts = _strip(masks, 1)
    peaks = local + np.stack([np.ones(len(which), np.int64), starts[which]], axis=1)
    strip = piece > 0
    distance = ndimage.distance_transform_edt(strip)
    regions, n_regions = ndimage.label(h_maxima(distance, seed_depth_px))
    region_piece = np.zeros(n_regions + 1, np.int64)
    region_piece[regions[strip]] = piece[strip]
    seeded = np.zeros(n_regions + 1, bool)
    seeded[regions[tuple(peaks.T)]] = True
    seeded[0] = False
    split = np.bincount(region_piece[seeded], minlength=len(masks) + 1) >= 2
    split[0] = False
    parts = np.zeros_like(piece)
    if split.any():
        markers = np.where((seeded & split[region_piece])[regions], regions, 0).astype(np.int32)
        parts = watershed(-distance, markers, mask=split[piece])
    out = []
    for number, (mask, start) in enumerate(zip(masks, starts), start=1):
        if not split[number]:
            out.append(mask.astype(np.int32))
            continue
        local = parts[1 : 1 + mask.shape[0], start : start + mask.shape[1]]
        ids, renumbered = np.unique(local, return_inverse=True)  # 0 first, then the seeds in raster order
        out.append(
            renumbered.reshape(local.shape).astype(np.int32)
            if ids[0] == 0
            else renumbered.reshape(local.shape).astype(np.int32) + 1
        )
    return out


def split_touching(
    components: np.ndarray,
    count: int,
    min_distance_px: int,
    index: np.ndarray | None = None,
    area_factor: float = SPLIT_AREA_FACTOR,
    min_fill: float = SPLIT_ELLIPSE_FILL,
    seed_depth_px: float = SEED_DEPTH_PX,
) -> np.ndarray:
    """Labels after splitting the components that may hold touching nuclei; the rest are kept whole.

    ``components`` holds ids 1..count, some of which may be unused (area 0); ``index``, if
    given, holds the flat indices of every component pixel (maybe more). A component is a
    candidate when its area is above ``area_factor`` x the median or it fills less than
    ``min_fill`` of its moment ellipse; its seeds are distance maxima rising ``seed_depth_px``
    (pixels) above the saddle to the next one.
    """
    index, label_of_pixel = _object_pixels(components, index)
    area, fill = _component_shapes(index, label_of_pixel, components.shape[1], count)
    present = area > 0
    if not present.any():
        return components
    candidates = np.flatnonzero(present & ((area > area_factor * np.median(area[present])) | (fill < min_fill))) + 1
    labels = components.astype(np.int32, copy=True)
    if len(candidates) == 0:
        return labels
    boxes = _bounding_boxes(index, label_of_pixel, candidates, components.shape[1])
    masks = [components[box] == label for label, box in zip(candidates, boxes)]
    next_label = count + 1
    split = _split_components(masks, min_distance_px, seed_depth_px)
    for label, box, mask, parts in zip(candidates, boxes, masks, split):
        n_parts = int(parts.max())
        if n_parts < 2:
            continue
        new_ids = np.concatenate([[0, label], next_label + np.arange(n_parts - 1)])
        view = labels[box]
        view[mask] = new_ids[parts[mask]]
        next_label += n_parts - 1
    return labels


def half_maximum_masks(
    labels: np.ndarray, smooth: np.ndarray, background: float, index: np.ndarray | None = None
) -> np.ndarray:
    """Trim each object to the pixels above half its own peak height over background.

    The global threshold places dim and bright nuclei's edges at different depths of their
    blurred profiles; the half-maximum contour (as in a full width at half maximum) measures
    every object's size the same way, whatever its brightness or the local illumination.
    """
    index, label = _object_pixels(labels, index)
    if len(index) == 0:
        return labels
    count = int(label.max())
    value = smooth.ravel()[index]
    order = np.argsort(label, kind="stable")  # per-object maxima by one sort (faster than maximum.at)
    sorted_label = label[order]
    starts = np.flatnonzero(np.diff(sorted_label, prepend=-1))
    peak = np.full(count + 1, -np.inf, dtype=np.float64)
    peak[sorted_label[starts]] = np.maximum.reduceat(value[order], starts)
    cut = background + 0.5 * (peak - background)
    cut[0] = np.inf
    out = labels.copy()
    out.ravel()[index[value <= cut[label]]] = 0
    return out


def _drop_small(labels: np.ndarray, min_area_px: int, index: np.ndarray | None = None) -> np.ndarray:
    """Objects of fewer than ``min_area_px`` pixels removed, the rest numbered 1..n in label order."""
    index, label = _object_pixels(labels, index)
    sizes = np.bincount(label, minlength=int(label.max(initial=0)) + 1)
    keep = sizes >= min_area_px
    keep[0] = False
    new_ids = np.where(keep, np.cumsum(keep), 0).astype(np.int32)
    out = np.zeros(labels.shape, np.int32)
    out.ravel()[index] = new_ids[label]
    return out


def segment_nuclei(
    image: np.ndarray,
    pixel_size_um: float,
    smoothing_sigma_um: float,
    min_area_um2: float,
    split_min_distance_um: float,
    threshold_method: str = "otsu",
) -> tuple[np.ndarray, float]:
    """Label the nuclei of one 2-D image.

    Returns (labels, threshold): labels is int32 with 0 as background and 1..n the nuclei;
    threshold is the automatic threshold of the smoothed image (grey levels; NaN when the
    field holds no objects). Touching nuclei are split by a watershed on the distance
    transform seeded at its maxima at least ``split_min_distance_um`` apart; each nucleus is
    then trimmed to its half-maximum contour.
    """
    smooth = smooth_image(image, smoothing_sigma_um / pixel_size_um)
    return segment_smoothed(smooth, pixel_size_um, min_area_um2, split_min_distance_um, threshold_method)


def segment_smoothed(
    smooth: np.ndarray,
    pixel_size_um: float,
    min_area_um2: float,
    split_min_distance_um: float,
    threshold_method: str = "otsu",
) -> tuple[np.ndarray, float]:
    """``segment_nuclei`` on an image already smoothed (float32)."""
    empty = np.zeros(smooth.shape, np.int32)
    threshold = object_threshold(smooth, threshold_method)
    if np.isnan(threshold):
        return empty, threshold
    min_area_px = max(1, int(round(min_area_um2 / pixel_size_um**2)))
    mask = fill_holes(smooth > threshold)
    components, count = ndimage.label(mask)
    index = np.flatnonzero(mask)
    sizes = np.bincount(components.ravel()[index], minlength=count + 1)
    small = sizes < min_area_px
    small[0] = False
    if small.all() or count == 0:
        return empty, threshold
    if small.any():  # debris removed; the other components keep their ids
        debris = small[components.ravel()[index]]
        components.ravel()[index[debris]] = 0
        mask.ravel()[index[debris]] = False
        index = index[~debris]
    min_distance_px = max(1, int(round(split_min_distance_um / pixel_size_um)))
    # every later label image lies within ``index``: no further pass over the whole frame
    labels = split_touching(components, count, min_distance_px, index)
    outside = ~mask[::BACKGROUND_STRIDE, ::BACKGROUND_STRIDE]
    background = float(np.median(smooth[::BACKGROUND_STRIDE, ::BACKGROUND_STRIDE][outside])) if outside.any() else 0.0
    labels = half_maximum_masks(labels, smooth, background, index)
    return _drop_small(labels, min_area_px, index), threshold


def local_standard_deviation(image: np.ndarray, window_px: int) -> np.ndarray:
    """Standard deviation of grey levels in a square window around every pixel (float32)."""
    image = image.astype(np.float32, copy=False)
    mean = ndimage.uniform_filter(image, window_px)
    mean_square = ndimage.uniform_filter(image * image, window_px)
    return np.sqrt(np.maximum(mean_square - mean * mean, 0.0))


def segment_label_free(
    image: np.ndarray,
    pixel_size_um: float,
    window_um: float,
    min_area_um2: float,
    split_min_distance_um: float,
    threshold_method: str = "otsu",
) -> tuple[np.ndarray, float]:
    """Label cells in a phase-contrast or bright-field image (no fluorescent label).

    Cells are textured and the empty dish is smooth, so the foreground is where the local
    standard deviation (square window of ``window_um``) exceeds an automatic threshold; holes
    are filled and touching cells split as for nuclei (distance-transform watershed). Returns
    (labels, threshold) with the threshold in grey levels of local SD.
    """
    window_px = max(3, int(round(window_um / pixel_size_um)) | 1)
    texture = local_standard_deviation(image, window_px)
    threshold = object_threshold(texture, threshold_method)
    empty = np.zeros(image.shape, np.int32)
    if np.isnan(threshold):
        return empty, threshold
    min_area_px = max(1, int(round(min_area_um2 / pixel_size_um**2)))
    # the window widens the foreground by half its width: erode it back
    mask = ndimage.binary_erosion(fill_holes(texture > threshold), iterations=window_px // 2)
    components, count = ndimage.label(mask)
    if count == 0:
        return empty, threshold
    labels = split_touching(components, count, max(1, int(round(split_min_distance_um / pixel_size_um))))
    return _drop_small(labels, min_area_px), threshold
