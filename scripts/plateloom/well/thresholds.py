"""Smoothing and automatic thresholds (a registry of methods), shared by every segmentation path."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
from scipy import ndimage
from skimage.filters import threshold_li, threshold_otsu, threshold_triangle

from plateloom.stats import MAD_TO_SD

# Objects brighter than the background by fewer than this many robust noise SDs mean the field
# holds no objects (Otsu always finds a threshold, even in pure noise).
MIN_CONTRAST_NOISE_SDS = 5.0
# The log-intensity threshold is never below the background median plus this many robust noise
# SDs: in a sparse field (a few percent of pixels in nuclei) Otsu's split on log intensity can
# fall inside a background made bimodal by uneven illumination.
LOG_THRESHOLD_FLOOR_SDS = 3.0
# With log_otsu, a field whose pixels below the linear Otsu split spread this many times more than
# those below the log split is dense (half or more of it nuclei): the linear split runs through the
# nuclei there, so contrast and noise are taken on the log split.
DENSE_NOISE_RATIO = 2.0


# Automatic thresholds are computed from at most this many pixels (a regular grid sample of larger
# images): for a 1024x1024 frame the grid of every 4th pixel (as the background statistics), whose
# log_otsu threshold lay within half a histogram bin (0.7%) of the whole frame's on the benchmark site.
THRESHOLD_SAMPLE_PIXELS = 1 << 16
# Statistics of the background are taken on every BACKGROUND_STRIDE-th pixel in each direction:
# the same answer to a fraction of a grey level, at 1/16 of the cost.
BACKGROUND_STRIDE = 4


def threshold_log_otsu(image: np.ndarray) -> float:
    """Otsu's threshold on log intensity above the image's 0.5th percentile, in grey levels.

    Nuclear brightness spans a decade or more, so on the linear scale a few saturated or very
    bright cells pull Otsu's split above most nuclei; on the log scale each decade weighs the same.
    """
    return _log_otsu_of_sorted(np.sort(image, axis=None))


def _log_otsu_of_sorted(ordered: np.ndarray) -> float:
    """``threshold_log_otsu`` of the values ``ordered`` (1-D, ascending)."""
    floor = percentile_of_sorted(ordered, 0.5)
    logs = np.log1p(np.maximum(ordered.astype(np.float64) - floor, 0.0))  # still ascending
    if logs[-1] <= logs[0]:
        return float(ordered[-1])
    return float(np.expm1(otsu_of_sorted(logs)) + floor)


def otsu_of_sorted(ordered: np.ndarray, bins: int = 256) -> float:
    """``skimage.filters.threshold_otsu`` of the values ``ordered`` (1-D, ascending): the same
    histogram (``np.histogram``'s edges; a value on an edge counts in the bin above it, the
    maximum in the last bin), counted by binary search instead of a pass over the values."""
    if ordered[0] == ordered[-1]:
        return float(ordered[0])
    edges = np.histogram_bin_edges(ordered[[0, -1]].astype(ordered.dtype), bins)
    starts = np.searchsorted(ordered, edges[:-1], side="left")
    counts = np.diff(np.append(starts, len(ordered)))
    return float(threshold_otsu(hist=(counts, (edges[:-1] + edges[1:]) / 2.0)))


def percentile_of_sorted(ordered: np.ndarray, q: float) -> float:
    """``np.percentile(values, q)`` (its default linear interpolation, the same arithmetic) of the
    values ``ordered`` (1-D, ascending)."""
    virtual = (len(ordered) - 1) * (q / 100.0)
    below = int(np.floor(virtual))
    above = min(below + 1, len(ordered) - 1)
    fraction = virtual - below
    low, high = ordered[below], ordered[above]
    step = high - low
    return float(high - step * (1.0 - fraction) if fraction >= 0.5 else low + step * fraction)


THRESHOLD_METHODS: dict[str, Callable[[np.ndarray], float]] = {
    "log_otsu": threshold_log_otsu,  # Otsu 1979 on log intensity
    "otsu": threshold_otsu,  # Otsu 1979, IEEE Trans. SMC 9:62
    "li": threshold_li,  # Li & Tam 1998, Pattern Recognit. Lett. 19:771
    "triangle": threshold_triangle,  # Zack, Rogers & Latt 1977, J. Histochem. Cytochem. 25:741
}


# Rows of the column pass done at a time: 64 rows of a 1024-pixel-wide frame and their shifted
# copies fit in a processor's cache (2.3 ms less a 1024 x 1024 frame than whole-frame passes).
COLUMN_PASS_ROWS = 64


def gaussian_reach_px(sigma_px: float) -> int:
    """How far (pixels) ``smooth_image`` reads around a pixel: the kernel truncated at 4 sigma, as
    ``scipy.ndimage.gaussian_filter``."""
    return int(4.0 * sigma_px + 0.5)


def smooth_image(image: np.ndarray, sigma_px: float) -> np.ndarray:
    """Gaussian smoothing in float32 (sigma in pixels; 0 returns a float32 copy).

    The filter of ``scipy.ndimage.gaussian_filter`` (kernel truncated at 4 sigma, edges
    reflected): along rows by scipy, along columns as a weighted sum of shifted copies of the
    rows, COLUMN_PASS_ROWS rows at a time so the copies stay in the processor's cache (scipy's
    column pass is several times slower than its row pass). Equal to scipy's result within
    float32 rounding.
    """
    image = image.astype(np.float32, copy=False)
    if sigma_px <= 0:
        return image.copy()
    radius = gaussian_reach_px(sigma_px)
    offsets = np.arange(-radius, radius + 1)
    kernel = np.exp(-0.5 * offsets**2 / sigma_px**2)
    kernel /= kernel.sum()
    rows = ndimage.correlate1d(image, kernel, axis=1, mode="reflect")
    weights = kernel.astype(np.float32)
    height = image.shape[0]
    padded = np.pad(rows, ((radius, radius), (0, 0)), mode="symmetric")  # numpy's "symmetric" = scipy's "reflect"
    out = np.empty_like(rows)
    pair = np.empty((min(COLUMN_PASS_ROWS, height),) + rows.shape[1:], np.float32)
    for start in range(0, height, COLUMN_PASS_ROWS):
        stop = min(height, start + COLUMN_PASS_ROWS)
        block, pair_block = out[start:stop], pair[: stop - start]
        np.multiply(padded[radius + start : radius + stop], weights[radius], out=block)
        for shift in range(1, radius + 1):
            above, below = padded[radius + start - shift :], padded[radius + start + shift :]
            np.add(above[: stop - start], below[: stop - start], out=pair_block)
            pair_block *= weights[radius + shift]
            block += pair_block
    return out


def object_threshold(smooth: np.ndarray, method: str = "otsu") -> float:
    """Foreground threshold of a smoothed image (grey levels), or NaN when the field holds no objects.

    A field whose pixels above the Otsu split lie (in median) within MIN_CONTRAST_NOISE_SDS robust
    noise SDs of those below it is empty: every automatic threshold finds a level even in pure noise.
    With ``log_otsu``, contrast and noise are taken on the log split instead when the objects stand
    out on it and either not on the linear split or the pixels below the log split spread
    DENSE_NOISE_RATIO times less: in a dense field the linear split runs through the nuclei, and the
    dim ones below it inflate the noise estimate.
    """
    if method not in THRESHOLD_METHODS:
        raise ValueError(f"unknown threshold method {method!r}; use one of {sorted(THRESHOLD_METHODS)}")
    low, high = float(smooth.min()), float(smooth.max())  # NaN anywhere makes both NaN
    if not (np.isfinite(low) and np.isfinite(high)) or high == low:
        return float("nan")
    # Whether the field holds objects is judged on the Otsu split whatever the method (contrast and
    # noise measured on the pixels below it, so a field a third full of cells does not inflate the
    # noise estimate); log_otsu may move to its own split (see above).
    stride = int(np.ceil(np.sqrt(smooth.size / THRESHOLD_SAMPLE_PIXELS)))
    ordered = np.sort(smooth[::BACKGROUND_STRIDE, ::BACKGROUND_STRIDE], axis=None)  # medians by index
    threshold = _sample_threshold(smooth[::stride, ::stride], method, ordered if stride == BACKGROUND_STRIDE else None)
    split = threshold if method == "otsu" else otsu_of_sorted(ordered)
    contrast, below_median, noise_sd = _split_contrast(ordered, split)
    if method == "log_otsu":
        # in a dense field (half or more of it nuclei) the linear split runs through the nuclei and
        # the dim ones below it inflate the noise; the log split lies between background and nuclei
        # (in a sparse field the log split may lie inside the background: it is used only when the
        # objects stand out on it)
        on_log = _split_contrast(ordered, threshold)
        linear_fails = not contrast >= MIN_CONTRAST_NOISE_SDS * noise_sd
        prefer_log = linear_fails or on_log[2] * DENSE_NOISE_RATIO < noise_sd
        if prefer_log and on_log[0] >= MIN_CONTRAST_NOISE_SDS * on_log[2]:
            contrast, below_median, noise_sd = on_log
    if not contrast >= MIN_CONTRAST_NOISE_SDS * noise_sd:
        return float("nan")
    if method == "log_otsu":
        return max(threshold, below_median + LOG_THRESHOLD_FLOOR_SDS * noise_sd)
    return threshold


def _sample_threshold(sample: np.ndarray, method: str, ordered: np.ndarray | None) -> float:
    """The ``method``'s threshold of ``sample`` (``ordered``: its values sorted, if at hand); Otsu's
    and its log form from the sorted values, the others from ``sample`` as it is."""
    if method not in ("log_otsu", "otsu"):
        return float(THRESHOLD_METHODS[method](sample))
    ordered = np.sort(sample, axis=None) if ordered is None else ordered
    return _log_otsu_of_sorted(ordered) if method == "log_otsu" else otsu_of_sorted(ordered)


def _split_contrast(ordered: np.ndarray, split: float) -> tuple[float, float, float]:
    """Median of the values ``ordered`` (1-D, ascending) above ``split`` minus that of those below
    it, the median below, and the robust SD (MAD_TO_SD x MAD, at least 1e-6) below it; NaNs when
    either side is (nearly) empty. Medians as ``np.median`` (the mean of the two middle values)."""
    count_below = int(np.searchsorted(ordered, split, side="right"))
    below, above = ordered[:count_below], ordered[count_below:]
    if len(below) < 16 or len(above) == 0:
        return float("nan"), float("nan"), float("nan")
    below_median = median_of_sorted(below)
    deviations = np.abs(below - below_median)
    middle = (len(deviations) - 1) // 2, len(deviations) // 2
    noise_sd = max(MAD_TO_SD * median_of_sorted(np.partition(deviations, middle)), 1e-6)
    return median_of_sorted(above) - below_median, below_median, noise_sd


def median_of_sorted(values: np.ndarray) -> float:
    """``np.median`` of ``values`` whose two middle positions hold their middle values (sorted, or
    partitioned at them)."""
    return float(np.mean(values[[(len(values) - 1) // 2, len(values) // 2]]))


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
