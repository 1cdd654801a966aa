"""Nuclear segmentation: Gaussian smoothing, Otsu threshold (Otsu 1979), seeded watershed."""

from __future__ import annotations

import numpy as np
from scipy import ndimage
from skimage.feature import peak_local_max
from skimage.filters import threshold_otsu
from skimage.morphology import h_maxima
from skimage.segmentation import relabel_sequential, watershed

# A threshold closer to the background than this many robust noise SDs means the field holds
# no objects (Otsu always finds a threshold, even in pure noise).
MIN_CONTRAST_NOISE_SDS = 5.0
SEED_DEPTH_PX = 1.0


def robust_sd(values: np.ndarray) -> float:
    """1.4826 x median absolute deviation: the SD of a normal sample, robust to outliers."""
    median = np.median(values)
    return float(1.4826 * np.median(np.abs(values - median)))


def segment_nuclei(image: np.ndarray, pixel_size_um: float, smoothing_sigma_um: float,
                   min_area_um2: float, split_min_distance_um: float) -> tuple[np.ndarray, float]:
    """Label the nuclei of one 2-D image.

    Returns (labels, threshold): labels is int32 with 0 as background and 1..n the nuclei;
    threshold is the Otsu threshold on the smoothed image (grey levels; NaN when the field
    holds no objects). Touching nuclei are split by a watershed on the distance transform
    seeded at its maxima at least ``split_min_distance_um`` apart.
    """
    sigma_px = smoothing_sigma_um / pixel_size_um
    smooth = ndimage.gaussian_filter(image.astype(np.float32), sigma_px) if sigma_px > 0 else image.astype(np.float32)
    empty = np.zeros(image.shape, np.int32)
    if not np.isfinite(smooth).all() or smooth.max() == smooth.min():
        return empty, float("nan")
    threshold = float(threshold_otsu(smooth))
    if threshold - np.median(smooth) < MIN_CONTRAST_NOISE_SDS * max(robust_sd(smooth), 1e-6):
        return empty, float("nan")
    min_area_px = max(1, int(round(min_area_um2 / pixel_size_um**2)))
    mask = ndimage.binary_fill_holes(smooth > threshold)
    components, _ = ndimage.label(mask)
    mask &= np.bincount(components.ravel())[components] >= min_area_px
    if not mask.any():
        return empty, threshold
    components[~mask] = 0
    distance = ndimage.distance_transform_edt(mask)
    min_distance_px = max(1, int(round(split_min_distance_um / pixel_size_um)))
    peaks = peak_local_max(distance, min_distance=min_distance_px, labels=components, exclude_border=False)
    # A seed must rise at least SEED_DEPTH_PX above the saddle to the next one, so the long
    # ridge of an elongated nucleus does not give it several seeds.
    regions, _ = ndimage.label(h_maxima(distance, SEED_DEPTH_PX))
    seeded = np.unique(regions[tuple(peaks.T)])
    markers = np.where(np.isin(regions, seeded[seeded > 0]), regions, 0).astype(np.int32)
    labels = watershed(-distance, markers, mask=mask)
    labels = half_maximum_masks(labels, smooth, float(np.median(smooth[~mask])) if (~mask).any() else 0.0)
    sizes = np.bincount(labels.ravel())
    labels[sizes[labels] < min_area_px] = 0
    return relabel_sequential(labels)[0].astype(np.int32), threshold


def half_maximum_masks(labels: np.ndarray, smooth: np.ndarray, background: float) -> np.ndarray:
    """Trim each object to the pixels above half its own peak height over background.

    The global threshold places dim and bright nuclei's edges at different depths of their
    blurred profiles; the half-maximum contour (as in a full width at half maximum) measures
    every object's size the same way, whatever its brightness or the local illumination.
    """
    count = int(labels.max())
    if count == 0:
        return labels
    peak = np.asarray(ndimage.maximum(smooth, labels, np.arange(1, count + 1)))
    cut = np.concatenate([[np.inf], background + 0.5 * (peak - background)])
    return np.where(smooth > cut[labels], labels, 0).astype(labels.dtype)


def background_levels(planes: np.ndarray, labels: np.ndarray, margin_px: int = 3) -> np.ndarray:
    """Per-channel background (grey levels): median of pixels at least ``margin_px`` from any nucleus."""
    foreground = ndimage.binary_dilation(labels > 0, iterations=margin_px) if labels.any() else labels > 0
    background = ~foreground
    if background.sum() < 0.05 * background.size:  # field full of cells: fall back to a low percentile
        return np.percentile(planes.reshape(len(planes), -1), 5, axis=1)
    return np.median(planes[:, background], axis=1)


def focus_score(image: np.ndarray) -> float:
    """Variance of the Laplacian (Pech-Pacheco et al. 2000) of the lightly smoothed image over its squared mean.

    Unitless; sharp fields score high, defocused ones low. Dividing by the squared mean makes
    the score independent of exposure.
    """
    smooth = ndimage.gaussian_filter(image.astype(np.float32), 1.0)
    mean = float(smooth.mean())
    return float(ndimage.laplace(smooth).var() / mean**2) if mean > 0 else float("nan")
