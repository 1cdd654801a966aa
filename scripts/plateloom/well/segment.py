"""Segmentation: nuclei (Gaussian smoothing, automatic threshold, seeded watershed), cell bodies
grown from the nuclei on a second channel, and a label-free path for phase-contrast or
bright-field images.

Whole-image work is a handful of vectorised filters; the costly splitting of touching nuclei
(distance transform, h-maxima, watershed) runs only on the bounding boxes of the components
whose shape says they may hold more than one nucleus.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from scipy import ndimage
from skimage.feature import peak_local_max
from skimage.filters import threshold_li, threshold_otsu, threshold_triangle
from skimage.morphology import h_maxima
from skimage.segmentation import watershed

# Objects brighter than the background by fewer than this many robust noise SDs mean the field
# holds no objects (Otsu always finds a threshold, even in pure noise).
MIN_CONTRAST_NOISE_SDS = 5.0
SEED_DEPTH_PX = 1.0
# A component is sent to the splitting step when its area is this many times the frame's
# median component area, or when it fills less of its moment ellipse than this fraction
# (a convex ellipse fills about 1; two touching disks fill 0.89).
SPLIT_AREA_FACTOR = 1.5
SPLIT_ELLIPSE_FILL = 0.96
# Statistics of the background are taken on every BACKGROUND_STRIDE-th pixel in each direction:
# the same answer to a fraction of a grey level, at 1/16 of the cost.
BACKGROUND_STRIDE = 4
# Automatic thresholds are computed from at most this many pixels (a regular grid sample of larger
# images): a 256-bin histogram of a quarter of a 1024x1024 frame puts the threshold within a
# fraction of a bin of the whole frame's, at a quarter of the cost.
THRESHOLD_SAMPLE_PIXELS = 1 << 18
# The focus score's Laplacian is taken on every FOCUS_ROW_STRIDE-th row.
FOCUS_ROW_STRIDE = 4
# Cell bodies are found on the 2x2-binned body channel when its smoothing is at least this wide
# (pixels) and the image at least twice BODY_BINNING_MIN_SIDE_PX on each side.
BODY_BINNING_MIN_SIGMA_PX = 2.0
BODY_BINNING_MIN_SIDE_PX = 32

THRESHOLD_METHODS: dict[str, Callable[[np.ndarray], float]] = {
    "otsu": threshold_otsu,  # Otsu 1979, IEEE Trans. SMC 9:62
    "li": threshold_li,  # Li & Tam 1998, Pattern Recognit. Lett. 19:771
    "triangle": threshold_triangle,  # Zack, Rogers & Latt 1977, J. Histochem. Cytochem. 25:741
}


def smooth_image(image: np.ndarray, sigma_px: float) -> np.ndarray:
    """Gaussian smoothing in float32 (sigma in pixels; 0 returns a float32 copy).

    The filter of ``scipy.ndimage.gaussian_filter`` (kernel truncated at 4 sigma, edges
    reflected): along rows by scipy, along columns as a weighted sum of shifted copies of the
    rows, which reads memory in order (scipy's column pass is several times slower than its row
    pass). Equal to scipy's result within float32 rounding.
    """
    image = image.astype(np.float32, copy=False)
    if sigma_px <= 0:
        return image.copy()
    radius = int(4.0 * sigma_px + 0.5)
    offsets = np.arange(-radius, radius + 1)
    kernel = np.exp(-0.5 * offsets**2 / sigma_px**2)
    kernel /= kernel.sum()
    rows = ndimage.correlate1d(image, kernel, axis=1, mode="reflect")
    height = image.shape[0]
    padded = np.pad(rows, ((radius, radius), (0, 0)), mode="symmetric")  # numpy's "symmetric" = scipy's "reflect"
    out = padded[radius : radius + height] * np.float32(kernel[radius])
    pair = np.empty_like(out)
    for shift in range(1, radius + 1):
        np.add(
            padded[radius - shift : radius - shift + height], padded[radius + shift : radius + shift + height], out=pair
        )
        pair *= np.float32(kernel[radius + shift])
        out += pair
    return out


def object_threshold(smooth: np.ndarray, method: str = "otsu") -> float:
    """Foreground threshold of a smoothed image (grey levels), or NaN when the field holds no objects.

    A field whose pixels above the Otsu split lie (in median) within MIN_CONTRAST_NOISE_SDS robust
    noise SDs of those below it is empty: every automatic threshold finds a level even in pure noise.
    """
    if method not in THRESHOLD_METHODS:
        raise ValueError(f"unknown threshold method {method!r}; use one of {sorted(THRESHOLD_METHODS)}")
    low, high = float(smooth.min()), float(smooth.max())  # NaN anywhere makes both NaN
    if not (np.isfinite(low) and np.isfinite(high)) or high == low:
        return float("nan")
    # Whether the field holds objects is judged on the Otsu split whatever the method: contrast
    # and noise are measured on the pixels below it, so a dense field (a third or more of it
    # cells) does not inflate the noise estimate.
    stride = int(np.ceil(np.sqrt(smooth.size / THRESHOLD_SAMPLE_PIXELS)))
    threshold = float(THRESHOLD_METHODS[method](smooth[::stride, ::stride] if stride > 1 else smooth))
    sample = smooth[::BACKGROUND_STRIDE, ::BACKGROUND_STRIDE]
    if method == "otsu":
        split = threshold
    else:
        split = float(threshold_otsu(sample)) if sample.max() > sample.min() else float(sample.max())
    below, above = sample[sample <= split], sample[sample > split]
    if len(below) < 16 or len(above) == 0:
        return float("nan")
    below_median = float(np.median(below))
    noise_sd = 1.4826 * float(np.median(np.abs(below - below_median)))  # robust SD: 1.4826 x MAD
    if np.median(above) - below_median < MIN_CONTRAST_NOISE_SDS * max(noise_sd, 1e-6):
        return float("nan")
    return threshold


def fill_holes(mask: np.ndarray) -> np.ndarray:
    """Fill background regions not connected to the image border (as ``binary_fill_holes``, 4-connected)."""
    background, count = ndimage.label(~mask)
    if count == 0:
        return mask.copy()
    edge = np.unique(np.concatenate([background[0], background[-1], background[:, 0], background[:, -1]]))
    if np.count_nonzero(edge) == count:  # every background region reaches the border: no hole
        return mask.copy()
    outside = np.zeros(count + 1, bool)
    outside[edge] = True
    return mask | ~outside[background]


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
    order = np.argsort(label, kind="stable")
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


def _component_shapes(
    components: np.ndarray, count: int, index: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray]:
    """Area (pixels) and fill of the moment ellipse (area / (4 pi sqrt(det covariance))) of labels 1..count."""
    index, label = _object_pixels(components, index)
    y, x = np.divmod(index, components.shape[1])
    area = np.bincount(label, minlength=count + 1).astype(float)
    safe = np.maximum(area, 1)
    my, mx = np.bincount(label, y, count + 1) / safe, np.bincount(label, x, count + 1) / safe
    dy, dx = y - my[label], x - mx[label]
    vyy = np.bincount(label, dy * dy, count + 1) / safe + 1 / 12  # + 1/12: a pixel is a unit square
    vxx = np.bincount(label, dx * dx, count + 1) / safe + 1 / 12
    vxy = np.bincount(label, dy * dx, count + 1) / safe
    ellipse_area = 4 * np.pi * np.sqrt(np.maximum(vyy * vxx - vxy**2, 1e-12))
    return area[1:], area[1:] / ellipse_area[1:]


def _split_components(masks: list[np.ndarray], min_distance_px: int) -> list[np.ndarray]:
    """Watershed split of components on their distance transform, all in one pass.

    ``masks`` are the components' bounding-box masks; they are laid side by side, one
    background pixel apart, in one strip image, so every whole-image step runs once. Seeds are
    the distance maxima at least ``min_distance_px`` apart that rise SEED_DEPTH_PX above the
    saddle to the next one, so the long ridge of an elongated nucleus gives one seed. Returns,
    per mask, its parts numbered 1..k in raster order (all 1 when it is not split); the
    image edge counts as background for the distance transform.
    """
    height = max(m.shape[0] for m in masks) + 2
    starts = np.cumsum([1] + [m.shape[1] + 1 for m in masks])
    piece = np.zeros((height, int(starts[-1])), np.int32)
    for number, (mask, start) in enumerate(zip(masks, starts), start=1):
        piece[1 : 1 + mask.shape[0], start : start + mask.shape[1]][mask] = number
    strip = piece > 0
    distance = ndimage.distance_transform_edt(strip)
    peaks = peak_local_max(distance, min_distance=min_distance_px, labels=piece, exclude_border=False)
    regions, n_regions = ndimage.label(h_maxima(distance, SEED_DEPTH_PX))
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
    components: np.ndarray, count: int, min_distance_px: int, index: np.ndarray | None = None
) -> np.ndarray:
    """Labels after splitting the components that may hold touching nuclei; the rest are kept whole.

    ``components`` holds ids 1..count, some of which may be unused (area 0); ``index``, if
    given, holds the flat indices of every component pixel (maybe more).
    """
    area, fill = _component_shapes(components, count, index)
    present = area > 0
    if not present.any():
        return components
    candidates = (
        np.flatnonzero(present & ((area > SPLIT_AREA_FACTOR * np.median(area[present])) | (fill < SPLIT_ELLIPSE_FILL)))
        + 1
    )
    labels = components.astype(np.int32, copy=True)
    if len(candidates) == 0:
        return labels
    index, label_of_pixel = _object_pixels(components, index)
    boxes = _bounding_boxes(index, label_of_pixel, candidates, components.shape[1])
    masks = [components[box] == label for label, box in zip(candidates, boxes)]
    next_label = count + 1
    for label, box, mask, parts in zip(candidates, boxes, masks, _split_components(masks, min_distance_px)):
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


def grow_cell_bodies(
    nuclei: np.ndarray,
    body_image: np.ndarray,
    pixel_size_um: float,
    smoothing_sigma_um: float,
    threshold_method: str = "otsu",
) -> np.ndarray:
    """Cell-body labels grown from the nuclei on a cytoplasm or membrane channel.

    The body channel is smoothed and thresholded (its own foreground); a watershed on the
    inverted smoothed intensity, seeded by the nuclei and confined to that foreground plus the
    nuclei, gives each nucleus its cell (same label). Cytoplasm = cell body minus nucleus.
    Foreground not reached from any nucleus stays 0.

    When the smoothing is at least BODY_BINNING_MIN_SIGMA_PX pixels the smoothed image holds no
    detail finer than 2 pixels, so smoothing, threshold and watershed run on the 2x2-binned
    image (a quarter of the pixels) and the bodies are brought back to full resolution; every
    nucleus pixel keeps its own label.
    """
    if nuclei.max() == 0:
        return nuclei.copy()
    sigma_px = smoothing_sigma_um / pixel_size_um
    if sigma_px >= BODY_BINNING_MIN_SIGMA_PX and min(nuclei.shape) >= 2 * BODY_BINNING_MIN_SIDE_PX:
        return _grow_cell_bodies_binned(nuclei, body_image, sigma_px, threshold_method)
    return _seeded_bodies(nuclei, smooth_image(body_image, sigma_px), threshold_method)[0]


def _seeded_bodies(seeds: np.ndarray, smooth: np.ndarray, threshold_method: str) -> tuple[np.ndarray, float]:
    """Watershed of the inverted smoothed body image from the seeds, within its foreground plus the
    seeds; and the foreground threshold (NaN when the channel shows no objects)."""
    threshold = object_threshold(smooth, threshold_method)
    foreground = seeds > 0
    if not np.isnan(threshold):
        foreground |= smooth > threshold
    return watershed(-smooth, seeds, mask=foreground).astype(np.int32), threshold


def _block_reduce(image: np.ndarray, size: int, reduce: Callable) -> np.ndarray:
    """size x size blocks of an image (edges repeated to whole blocks) combined by the binary ufunc
    ``reduce`` (np.add, np.maximum, np.logical_or): one pass over strided views, no reshaped copy."""
    height, width = image.shape
    if height % size or width % size:
        image = np.pad(image, ((0, -height % size), (0, -width % size)), mode="edge")
    out = image[0::size, 0::size].copy()
    for dy in range(size):
        for dx in range(size):
            if dy or dx:
                reduce(out, image[dy::size, dx::size], out=out)
    return out


def _upsample2(image: np.ndarray) -> np.ndarray:
    """Bilinear interpolation of a 2x2-binned image onto the full pixel grid (twice its size).

    Full pixel 2i sits at binned coordinate i - 1/4 and 2i + 1 at i + 1/4 (edges repeated).
    """
    rows, cols = image.shape
    padded = np.pad(image.astype(np.float32, copy=False), 1, mode="edge")
    centre = 0.75 * padded[1:-1]
    tall = np.empty((2 * rows, cols + 2), np.float32)
    np.add(centre, 0.25 * padded[:-2], out=tall[0::2])
    np.add(centre, 0.25 * padded[2:], out=tall[1::2])
    centre = 0.75 * tall[:, 1:-1]
    out = np.empty((2 * rows, 2 * cols), np.float32)
    np.add(centre, 0.25 * tall[:, :-2], out=out[:, 0::2])
    np.add(centre, 0.25 * tall[:, 2:], out=out[:, 1::2])
    return out


def _grow_cell_bodies_binned(
    nuclei: np.ndarray, body_image: np.ndarray, sigma_px: float, threshold_method: str
) -> np.ndarray:
    height, width = nuclei.shape
    binned = _block_reduce(body_image.astype(np.float32, copy=False), 2, np.add) * np.float32(0.25)
    # a 2-pixel box already blurs by a variance of 1/3 px^2; the Gaussian adds the rest, in binned pixels
    smooth = smooth_image(binned, np.sqrt(sigma_px**2 - 1 / 3) / 2)
    bodies, threshold = _seeded_bodies(_block_reduce(nuclei, 2, np.maximum), smooth, threshold_method)
    if np.isnan(threshold):  # no foreground in the body channel: each cell is its nucleus
        return nuclei.astype(np.int32, copy=True)
    rows, cols = bodies.shape
    # the outer edge at full resolution: the interpolated smooth image against the same threshold
    foreground = _upsample2(smooth) > threshold
    # each binned body pixel covers its 2x2 block of foreground pixels (one pass, no upsampled copy)
    out = np.where(foreground.reshape(rows, 2, cols, 2), bodies[:, None, :, None], 0).reshape(2 * rows, 2 * cols)
    out = np.ascontiguousarray(out[:height, :width])
    np.copyto(out, nuclei, where=nuclei > 0)  # every nucleus pixel keeps its own label
    # foreground pixels just outside the binned bodies take the largest label among their 8 neighbours;
    # they lie in empty blocks next to a body block, so only those blocks' pixels are looked at
    inside = bodies > 0
    near = inside.copy()  # 3x3 dilation by shifted ORs, rows then columns
    near[1:] |= inside[:-1]
    near[:-1] |= inside[1:]
    widened = near.copy()
    widened[:, 1:] |= near[:, :-1]
    widened[:, :-1] |= near[:, 1:]
    edge_blocks = np.flatnonzero(widened & ~inside)
    block_y, block_x = np.divmod(edge_blocks, cols)
    y = (2 * block_y[:, None] + np.array([0, 0, 1, 1])).ravel()
    x = (2 * block_x[:, None] + np.array([0, 1, 0, 1])).ravel()
    on_image = (y < height) & (x < width)
    y, x = y[on_image], x[on_image]
    is_gap = foreground[y, x] & (out[y, x] == 0)
    y, x = y[is_gap], x[is_gap]
    if len(y):
        neighbours = [
            bodies[np.clip(y + dy, 0, height - 1) // 2, np.clip(x + dx, 0, width - 1) // 2]
            for dy in (-1, 0, 1)
            for dx in (-1, 0, 1)
            if dy or dx
        ]
        out[y, x] = np.maximum.reduce(neighbours)
    return out


def background_levels(planes: np.ndarray, labels: np.ndarray, margin_px: int = 3) -> np.ndarray:
    """Per-channel background (grey levels): median of pixels at least ``margin_px`` from any object.

    Taken on a grid of every BACKGROUND_STRIDE-th pixel: a grid pixel counts as background when
    no object pixel lies in its block or in the blocks within ``margin_px`` of it. A field
    almost full of cells falls back to the 5th percentile.
    """
    stride = BACKGROUND_STRIDE
    occupied = _block_reduce(labels > 0, stride, np.logical_or)
    reach = -(-margin_px // stride)
    near = ndimage.maximum_filter(occupied, size=2 * reach + 1) if occupied.any() else occupied
    background = ~near
    sample = planes[:, ::stride, ::stride]
    if background.sum() < 0.05 * background.size:
        return np.percentile(sample.reshape(len(planes), -1), 5, axis=1)
    return np.median(sample[:, background], axis=1)


def focus_score(smooth: np.ndarray) -> float:
    """Variance of the Laplacian (Pech-Pacheco et al. 2000) of the smoothed image over its squared mean.

    ``smooth`` is the nuclear image after the segmentation's Gaussian smoothing. Unitless;
    sharp fields score high, defocused ones low. Dividing by the squared mean makes the score
    independent of exposure. The 5-point Laplacian is taken on every FOCUS_ROW_STRIDE-th interior
    row (a quarter of a million pixels of a 1024x1024 frame): the variance is the same to about
    a percent at a tenth of the cost of filtering the whole frame.
    """
    mean = float(smooth.mean())
    if not mean > 0 or min(smooth.shape) < 3:
        return float("nan")
    rows = np.arange(1, smooth.shape[0] - 1, FOCUS_ROW_STRIDE)
    centre = smooth[rows]
    laplacian = smooth[rows - 1, 1:-1] + smooth[rows + 1, 1:-1] + centre[:, :-2] + centre[:, 2:] - 4 * centre[:, 1:-1]
    return float(laplacian.var(dtype=np.float64) / mean**2)
