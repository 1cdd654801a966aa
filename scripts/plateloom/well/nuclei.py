"""Nuclei on real widefield images: cores, splitting, and an extent that follows each nuclear edge.

The foreground is the smoothed image above an automatic threshold (by default Otsu on log
intensity, which a few saturated cells cannot capture). Inside it, each nucleus is found from its
core: the pixels at least ``CORE_RATIO`` of the brightest value within ``CORE_WINDOW`` typical
radii. A dim nucleus touching a bright one keeps a core of its own (its pixels are compared with
its own neighbourhood, not with the bright one), chromatin spots only dent a core, and a rounded
saturated cell's glow has no core. Next to a large saturated region (known from the raw image)
a core pixel needs ``SATURATED_CORE_RATIO`` of the ceiling instead, so a neighbour does not share
the clipped cell's core. Cores that may hold two nuclei by shape are split by the
distance-transform watershed of ``plateloom.well.segment``, and cores of nuclei packed edge to
edge (joined with no waist) at the blobs of the image; the cores then grow over the
foreground by a watershed on the gradient of log intensity, so two nuclei meet at their steepest
edge. Each nucleus is then cut at half its own height over its own local background (the ring
of non-object pixels around it): the height is the median of its pixels, so neither spots nor
the blurred rim move the edge. A cut nucleus whose outline still looks like two (the waist a
merged core hides) is split by the same shape rule, the boundary redrawn along the steepest edge;
a label is always one connected region.

All of this runs on the bounding boxes of the foreground components packed side by side into one
canvas (``plateloom.well.canvas``), so every filter passes over the objects and their margins only.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from skimage.feature import peak_local_max
from skimage.measure import label as connected_regions
from skimage.segmentation import watershed

from plateloom.well.canvas import Canvas, labels_in_frame, pack_components
from plateloom.well.morphology import dilate_cross, erode_cross, maximum_square, same_as_neighbours
from plateloom.well.segment import split_touching
from plateloom.well.thresholds import (
    BACKGROUND_STRIDE,
    fill_holes,
    gaussian_reach_px,
    median_of_sorted,
    object_threshold,
    percentile_of_sorted,
    smooth_image,
)

CORE_RATIO = 0.5  # a core pixel is at least this share of the brightest value around it ...
CORE_WINDOW = 0.8  # ... within this many typical nuclear radii (square window)
CORE_SMOOTHING_PX = 1.0  # extra smoothing (Gaussian sigma, pixels) of the image the cores are found on
CORE_MIN_AREA = 0.15  # cores smaller than this share of a typical nucleus are dropped
EDGE_HEIGHT = 0.5  # the edge: half the nucleus's height over its local background
RING_PX = 3  # width of the local-background ring around each nucleus
CORE_SPLIT_AREA = 1.5  # cores this many times the median core area, or filling less of their
CORE_SPLIT_FILL = 0.96  # moment ellipse than this, go to the shape split
# After growth, a nucleus whose outline still looks like two (split_touching's rules) is split by
# shape, and the boundary between the parts redrawn along the steepest edge within this many pixels
# of the shape's cut. Measured on 320 realistic fields (5 sets of 64): average precision 0.918-0.930
# -> 0.934-0.944 (0.916 -> 0.931 on the test's 16), nuclei touching a saturated cell found 486 -> 492 of 518.
REDRAW_PX = 3
# The shape split after growth takes as seeds the distance maxima that rise this many pixels above
# the saddle to the next one (the cores' split keeps ``segment.SEED_DEPTH_PX``, 1 px): a nucleus
# squeezed against a neighbour in a cluster leaves a shallow waist. Measured on 320 realistic fields
# (5 sets of 64): average precision 0.934-0.943 -> 0.943-0.948 (0.930 -> 0.931 on the test's 16),
# nuclei touching a saturated cell found 492 -> 494 of 518. Half a pixel in the cores' split too
# gave more (0.946-0.953, 497) but lost 2 of 41 planted divisions and added a false death;
# 0.75 px there kept the divisions and gave 0.945-0.951, 494.
GROWN_SEED_DEPTH_PX = 0.5
MIN_EDGE_STEEPNESS = 0.15  # median log-intensity gradient (Sobel) along the edge facing the background:
# glow and out-of-focus haze fall off slowly (about 0.05), nuclei steeply (0.2 and more)
# A saturated cell's real peak lies above the camera's ceiling, so half its height lies above half
# the ceiling: pixels compared with a saturated region of at least SATURATED_MIN_AREA of a typical
# nucleus (a clipped cell, not a clipped chromatin spot) are core pixels only from this share of it.
# Measured on 320 realistic fields (5 sets of 64): nuclei touching a saturated cell found 0.905 ->
# 0.938, average precision up in every set (0.915-0.925 -> 0.918-0.930).
SATURATED_CORE_RATIO = 0.7
SATURATED_MIN_AREA = 0.2
# Cores of more than PACKED_CORE_AREA typical nuclear areas are nuclei packed edge to edge (a field
# over three quarters full): their cores join and the joined outline has no waist for the shape
# split, so they are split at the blobs of the image (negative Laplacian of Gaussian, sigma
# PACKED_BLOB_SIGMA typical radii). Measured on planted hexagonal fields of dome-shaped nuclei
# (radius 8-9 px) 84% and 91% full: average precision 0.20 -> 0.71 and 0.01 -> 0.46; the 320
# realistic fields (5 sets of 64) unchanged in every set.
PACKED_CORE_AREA = 4.0
PACKED_BLOB_SIGMA = 0.5
# A seed's scale-normalised response (log-intensity units): packed nuclei 0.1-0.6 at their centres,
# the dim haze of out-of-focus nuclei in the realistic fields (no nucleus to segment) 0.02 at most.
PACKED_MIN_BLOB = 0.1


def _core_window(radius_px: float) -> int:
    """Side (pixels, odd) of the square window whose brightest value a core pixel is compared with."""
    return max(3, int(round(CORE_WINDOW * radius_px)) | 1)


def _cores(canvas: Canvas, floor: float, radius_px: float, min_distance_px: int) -> np.ndarray:
    """Labelled nucleus cores of the canvas (see the module docstring)."""
    signal = smooth_image(canvas.image, CORE_SMOOTHING_PX) - np.float32(floor)
    window = _core_window(radius_px)
    ratio = signal / np.maximum(maximum_square(signal, window), 1.0)
    level = _core_levels(canvas.saturated, window, radius_px)
    cores = dilate_cross(erode_cross((ratio > level) & (canvas.own > 0)))  # binary opening
    labelled, count = ndimage.label(cores)
    index = np.flatnonzero(cores)
    core = labelled.ravel()[index]
    small = np.bincount(core, minlength=count + 1) < CORE_MIN_AREA * np.pi * radius_px**2
    dropped = small[core]
    if dropped.all():
        return np.zeros_like(labelled)
    labelled.ravel()[index[dropped]] = 0
    index = index[~dropped]
    split = split_touching(
        labelled, count, min_distance_px, index=index, area_factor=CORE_SPLIT_AREA, min_fill=CORE_SPLIT_FILL
    )
    return _split_packed(split, index, canvas, floor, radius_px, min_distance_px)


def _split_packed(
    cores: np.ndarray, index: np.ndarray, canvas: Canvas, floor: float, radius_px: float, min_distance_px: int
) -> np.ndarray:
    """Cores of more than PACKED_CORE_AREA typical nuclei (nuclei packed edge to edge, whose cores
    join and whose outline shows no waist) split at the blobs of the log image: seeds are the maxima
    of its negative Laplacian of Gaussian (sigma PACKED_BLOB_SIGMA typical radii) at least
    ``min_distance_px`` apart, flooded over the core on that response. A core holding saturated
    pixels (a rounded cell and its glow) is left whole. ``index``: flat indices of the core pixels."""
    area = np.bincount(cores.ravel()[index])
    packed = area > PACKED_CORE_AREA * np.pi * radius_px**2
    packed[0] = False
    if canvas.saturated is not None and packed.any():
        packed &= np.bincount(cores[canvas.saturated], minlength=len(area)) == 0
    if not packed.any():
        return cores
    mask = packed[cores]
    rows, cols = np.flatnonzero(mask.any(axis=1)), np.flatnonzero(mask.any(axis=0))
    box = (slice(rows[0], rows[-1] + 1), slice(cols[0], cols[-1] + 1))
    inside = np.where(mask[box], cores[box], 0)
    logs = np.log(np.maximum(canvas.image[box].astype(np.float64) - floor, 1.0))
    sigma = PACKED_BLOB_SIGMA * radius_px
    blob = -(sigma**2) * ndimage.gaussian_laplace(logs, sigma)  # scale-normalised (Lindeberg 1998)
    peaks = peak_local_max(
        np.where(inside > 0, blob, blob.min()), min_distance=min_distance_px, labels=inside, exclude_border=False
    )
    peaks = peaks[blob[tuple(peaks.T)] > PACKED_MIN_BLOB]
    several = np.bincount(inside[tuple(peaks.T)], minlength=len(area)) >= 2
    several[0] = False
    if not several.any():
        return cores
    seeds = np.zeros(inside.shape, np.int32)
    seeds[tuple(peaks.T)] = np.arange(1, len(peaks) + 1)
    flood = several[inside]
    parts = watershed(-blob, np.where(flood, seeds, 0), mask=flood)
    out = cores.copy()
    out[box][flood] = parts[flood] + len(area)  # new ids above every existing one
    return out


def _grow_cores(cores: np.ndarray, components: np.ndarray, surface: np.ndarray) -> np.ndarray:
    """Cores grown over their components by a watershed on ``surface``; a component with one core
    is that core's whole (what the watershed gives), so only components with several are flooded."""
    inside = np.flatnonzero(cores)
    core = cores.ravel()[inside]
    component_of_core = np.zeros(int(core.max()) + 1, np.int64)  # a core lies in one component
    component_of_core[core] = components.ravel()[inside]
    owner_core = np.flatnonzero(component_of_core)
    owner_component = component_of_core[owner_core]
    n_cores = np.bincount(owner_component, minlength=int(components.max()) + 1)
    only_core = np.zeros(len(n_cores), np.int32)
    single = n_cores[owner_component] == 1
    only_core[owner_component[single]] = owner_core[single]
    index = np.flatnonzero(components)  # the components' pixels: a fraction of the canvas
    component = components.ravel()[index]
    grown = np.zeros_like(cores)
    grown.ravel()[index] = only_core[component]
    flood = index[n_cores[component] >= 2]
    if len(flood):
        several = np.zeros(components.shape, bool)
        several.ravel()[flood] = True
        flooded = _watershed_in_box(surface, np.where(several, cores, 0), several)
        grown.ravel()[flood] = flooded.ravel()[flood]
    return grown


def _watershed_in_box(surface: np.ndarray, markers: np.ndarray, mask: np.ndarray) -> np.ndarray:
    """``skimage.segmentation.watershed(surface, markers, mask=mask)`` run on the bounding box of
    ``mask`` only (the same labels: the flooding never leaves the mask, and cropping keeps the
    pixels' raster order, which breaks ties); zero outside the box."""
    rows, cols = np.flatnonzero(mask.any(axis=1)), np.flatnonzero(mask.any(axis=0))
    out = np.zeros(markers.shape, np.int32)
    if len(rows):
        box = (slice(rows[0], rows[-1] + 1), slice(cols[0], cols[-1] + 1))
        out[box] = watershed(surface[box], markers[box], mask=mask[box])
    return out


def gradient_magnitude(image: np.ndarray) -> np.ndarray:
    """Sobel gradient magnitude, scaled as ``skimage.filters.sobel`` (sqrt of the mean of the two
    squared derivatives, each kernel normalised to unit weight; edges reflected), by shifted slices
    in float32: equal to skimage's within float32 rounding, at about a third of the time of
    scipy's separable filters."""
    padded = np.pad(image.astype(np.float32, copy=False), 1, mode="symmetric")  # numpy's "symmetric" = "reflect"
    along_y = padded[2:] - padded[:-2]
    smooth_y = along_y[:, :-2] + along_y[:, 2:]
    smooth_y += 2 * along_y[:, 1:-1]
    along_x = padded[:, 2:] - padded[:, :-2]
    smooth_x = along_x[:-2] + along_x[2:]
    smooth_x += 2 * along_x[1:-1]
    return np.sqrt((smooth_y * smooth_y + smooth_x * smooth_x) * np.float32(1 / 32))


def _core_levels(saturated: np.ndarray | None, window: int, radius_px: float) -> float | np.ndarray:
    """The share of the brightest value around a pixel it needs to be a core pixel: CORE_RATIO,
    or SATURATED_CORE_RATIO where that brightest value may be a large saturated region's."""
    if saturated is None or not saturated.any():
        return CORE_RATIO
    regions, count = ndimage.label(saturated)
    large = np.bincount(regions.ravel(), minlength=count + 1) >= SATURATED_MIN_AREA * np.pi * radius_px**2
    large[0] = False
    if not large.any():
        return CORE_RATIO
    near = maximum_square(large[regions], window)
    return np.where(near, np.float32(SATURATED_CORE_RATIO), np.float32(CORE_RATIO))


def _ring_background(canvas: Canvas, labels: np.ndarray, fallback: float) -> np.ndarray:
    """Mean smoothed value of the non-foreground pixels within RING_PX of each label (``fallback``
    for a label with no such pixel); indexed by label."""
    grown = maximum_square(labels, 2 * RING_PX + 1)
    ring = (grown > 0) & ~canvas.foreground & canvas.valid
    owner, values = grown[ring], canvas.image[ring]
    count = np.bincount(owner, minlength=labels.max() + 1)
    total = np.bincount(owner, values, minlength=labels.max() + 1)
    return np.where(count > 0, total / np.maximum(count, 1), fallback)


def _medians_by_owner(owner: np.ndarray, value: np.ndarray, n_labels: int) -> np.ndarray:
    """Median (the lower middle value) of ``value`` per ``owner`` 1..n_labels (0 for none); indexed by owner."""
    if len(value) == 0:
        return np.zeros(n_labels + 1)
    value = value.astype(np.float64)
    # one sort on owner x span + value orders by owner, then value (lexsort is about 10x slower)
    low = value.min()
    span = value.max() - low + 1.0
    order = np.argsort(owner * span + (value - low))
    owner, value = owner[order], value[order]
    starts = np.searchsorted(owner, np.arange(n_labels + 1))
    ends = np.searchsorted(owner, np.arange(n_labels + 1), side="right")
    middle = np.clip((starts + ends - 1) // 2, 0, len(value) - 1)
    return np.where(ends > starts, value[middle], 0.0)


def _edge_levels(background: np.ndarray, level: np.ndarray) -> np.ndarray:
    """Per label, the value at or below which its pixels are cut: background + EDGE_HEIGHT x
    (level - background)."""
    return background + EDGE_HEIGHT * (level - background)


def _cut_at_edges(grown: np.ndarray, image: np.ndarray, background: np.ndarray) -> np.ndarray:
    """Each label cut at half its height over its local ``background``: first with its mean as the
    height, then with the median of what that first cut keeps (spots and rim move neither)."""
    n_labels = int(grown.max())
    index = np.flatnonzero(grown)
    owner, value = grown.ravel()[index], image.ravel()[index]
    count = np.bincount(owner, minlength=n_labels + 1)
    means = np.bincount(owner, value, minlength=n_labels + 1) / np.maximum(count, 1)
    kept = value > _edge_levels(background, means)[owner]  # a first edge, from the mean ...
    medians = _medians_by_owner(owner[kept], value[kept], n_labels)  # ... then the median inside it
    kept = value > _edge_levels(background, np.where(medians > 0, medians, means))[owner]
    out = np.zeros_like(grown)
    out.ravel()[index[kept]] = owner[kept]
    return out


def _largest_pieces(labels: np.ndarray) -> np.ndarray:
    """Every label reduced to its largest 4-connected piece."""
    pieces = connected_regions(labels, background=0, connectivity=1)
    count = int(pieces.max())
    if count == 0:
        return labels
    index = np.flatnonzero(pieces)
    piece = pieces.ravel()[index]
    area = np.bincount(piece, minlength=count + 1)
    owner = np.zeros(count + 1, np.int64)
    owner[piece] = labels.ravel()[index]
    order = np.lexsort((-area[1:], owner[1:])) + 1
    first = np.ones(count, bool)
    first[1:] = owner[order][1:] != owner[order][:-1]
    keep = np.zeros(count + 1, bool)
    keep[order[first]] = True
    out = labels.copy()
    out.ravel()[index[~keep[piece]]] = 0
    return out


def _nuclei_on_canvas(canvas: Canvas, floor: float, background: float, radius_px: float, min_distance_px: int):
    """Nucleus labels on the canvas: cores, growth on the log-intensity gradient, edge cut."""
    cores = _cores(canvas, floor, radius_px, min_distance_px)
    if not cores.any():
        return cores
    surface = gradient_magnitude(np.log(np.maximum(canvas.image - np.float32(floor), 1.0)))
    grown = _grow_cores(cores, canvas.own, surface)
    nuclei = _largest_pieces(_cut_at_edges(grown, canvas.image, _ring_background(canvas, grown, background)))
    nuclei = _split_grown(nuclei, surface, min_distance_px)  # its redrawn parts may come in pieces
    return _drop_shallow_edges(nuclei, surface, canvas.valid)


def _split_grown(labels: np.ndarray, surface: np.ndarray, min_distance_px: int) -> np.ndarray:
    """Nuclei that still look like two by shape split (``split_touching``'s rules, on the grown and
    cut outlines, which show the waist that a merged core hides), their new boundary redrawn along
    the steepest edge: the parts, eroded by REDRAW_PX, flood the pair again on ``surface``."""
    count = int(labels.max())
    split = split_touching(labels, count, min_distance_px, seed_depth_px=GROWN_SEED_DEPTH_PX)
    if split.max() <= count:
        return split
    changed = np.isin(labels, np.unique(labels[split > count]))
    inner = split
    for _ in range(REDRAW_PX):
        inner = np.where(same_as_neighbours(inner), inner, 0)
    redrawn = _watershed_in_box(surface, np.where(changed, inner, 0), changed)
    return _largest_pieces(np.where(changed, redrawn, split))


def _drop_shallow_edges(labels: np.ndarray, steepness: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Labels whose edge towards the background rises less steeply than MIN_EDGE_STEEPNESS (median
    over the edge pixels) removed: glow and haze, not nuclei."""
    edge = np.flatnonzero((labels > 0) & dilate_cross((labels == 0) & valid))
    if not len(edge):
        return labels
    n_labels = int(labels.max())
    owner = labels.ravel()[edge]
    has_edge = np.bincount(owner, minlength=n_labels + 1) > 0
    shallow = has_edge & (_medians_by_owner(owner, steepness.ravel()[edge], n_labels) < MIN_EDGE_STEEPNESS)
    shallow[0] = False
    if not shallow.any():
        return labels
    out = labels.copy()
    out[shallow[labels]] = 0
    return out


def segment_nuclei_on_edges(
    smooth: np.ndarray,
    pixel_size_um: float,
    min_area_um2: float,
    split_min_distance_um: float,
    nucleus_diameter_um: float,
    threshold_method: str = "log_otsu",
    saturated: np.ndarray | None = None,
) -> tuple[np.ndarray, float]:
    """Nucleus labels (int32, 0 background) of a smoothed image and its foreground threshold
    (grey levels; NaN when the field holds no objects). Sizes in micrometres; ``saturated``: the
    pixels at the camera's ceiling in the raw image (``plateloom.io.planes.saturation_masks``),
    if any."""
    empty = np.zeros(smooth.shape, np.int32)
    threshold = object_threshold(smooth, threshold_method)
    if np.isnan(threshold):
        return empty, threshold
    min_area_px = max(1, int(round(min_area_um2 / pixel_size_um**2)))
    foreground = fill_holes(smooth > threshold)
    components, count = ndimage.label(foreground)
    index = np.flatnonzero(foreground)
    sizes = np.bincount(components.ravel()[index], minlength=count + 1)
    keep = sizes >= min_area_px
    keep[0] = False
    if not keep.any():
        return empty, threshold
    sample = smooth[::BACKGROUND_STRIDE, ::BACKGROUND_STRIDE]
    floor = percentile_of_sorted(np.sort(sample, axis=None), 0.5)
    outside = ~foreground[::BACKGROUND_STRIDE, ::BACKGROUND_STRIDE]
    background = median_of_sorted(np.sort(sample[outside])) if outside.any() else floor
    radius_px = 0.5 * nucleus_diameter_um / pixel_size_um
    margin = max(RING_PX, _core_window(radius_px) // 2 + gaussian_reach_px(CORE_SMOOTHING_PX))  # what the filters read
    canvas = pack_components(smooth, components, foreground, index, np.flatnonzero(keep), margin, saturated)
    min_distance_px = max(1, int(round(split_min_distance_um / pixel_size_um)))
    found = _nuclei_on_canvas(canvas, floor, background, radius_px, min_distance_px)
    return labels_in_frame(found, canvas, min_area_px, smooth.shape), threshold
