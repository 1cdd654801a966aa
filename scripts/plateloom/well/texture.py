"""Grey-level co-occurrence texture (Haralick et al. 1973) of every object of a frame at once:
contrast, homogeneity, correlation and angular second moment, averaged over four angles
(scikit-image's graycomatrix/graycoprops are the reference a test compares with)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from plateloom.well.object_pixels import ObjectPixels, neighbour_values

GLCM_ANGLES = (0.0, np.pi / 4, np.pi / 2, 3 * np.pi / 4)


GLCM_PROPERTIES = ("contrast", "homogeneity", "correlation", "asm")


@dataclass(frozen=True)
class TextureSettings:
    """Which channels get grey-level co-occurrence texture, at what pixel distance and grey levels."""

    channels: tuple[str, ...] = ()
    distance_px: int = 2
    levels: int = 8


def glcm_measures(
    image: np.ndarray, labels: np.ndarray, pixels: ObjectPixels, distance_px: int, levels: int = 8
) -> dict[str, np.ndarray]:
    """Grey-level co-occurrence texture (Haralick, Shanmugam & Dinstein 1973) of every object.

    Each object's grey levels are rescaled to ``levels`` levels between its own minimum and
    maximum; the symmetric, normalised co-occurrence matrix at ``distance_px`` is taken for
    the angles 0, 45, 90 and 135 degrees (offsets as in ``skimage.feature.graycomatrix``), only
    over pixel pairs inside the same object; contrast, homogeneity, correlation and angular
    second moment are averaged over the four angles (as ``graycoprops`` of each, then mean).
    """
    n = pixels.count
    value = image.ravel()[pixels.index].astype(np.float64)
    low = np.minimum.reduceat(value, pixels.starts) if n else np.zeros(0)
    high = np.maximum.reduceat(value, pixels.starts) if n else np.zeros(0)
    span = np.concatenate([[1.0], np.where(high > low, high - low, 1.0)])
    low = np.concatenate([[0.0], low])
    level = np.clip(((value - low[pixels.label]) / span[pixels.label] * levels).astype(np.int64), 0, levels - 1)
    # levels <= 64 (config schema); only pixels of the same object are read back, so no fill is needed
    quantised = np.empty(np.add(labels.shape, 2 * distance_px), np.int16)
    at = pixels.in_padded(distance_px)
    quantised.ravel()[at] = level
    padded_labels = pixels.padded_labels(distance_px)
    keys = []
    for angle_index, angle in enumerate(GLCM_ANGLES):
        dy, dx = int(np.round(np.sin(angle) * distance_px)), int(np.round(np.cos(angle) * distance_px))
        same = neighbour_values(padded_labels, at, dy, dx) == pixels.label
        j = neighbour_values(quantised, at[same], dy, dx)
        keys.append(((angle_index * (n + 1) + pixels.label[same]) * levels + level[same]) * levels + j)
    # the co-occurrence matrices of every angle and object at once: (angles, objects, levels, levels)
    counts = np.bincount(np.concatenate(keys), minlength=len(GLCM_ANGLES) * (n + 1) * levels * levels)
    counts = counts.reshape(len(GLCM_ANGLES), n + 1, levels, levels)[:, 1:].astype(np.float64)
    counts += counts.transpose(0, 1, 3, 2)
    total = counts.sum(axis=(2, 3))
    p = counts / np.where(total > 0, total, 1.0)[..., None, None]
    i_index, j_index = np.meshgrid(np.arange(levels), np.arange(levels), indexing="ij")
    mean_i, mean_j = (p * i_index).sum(axis=(2, 3)), (p * j_index).sum(axis=(2, 3))
    di, dj = i_index - mean_i[..., None, None], j_index - mean_j[..., None, None]
    sd_i, sd_j = np.sqrt((p * di**2).sum(axis=(2, 3))), np.sqrt((p * dj**2).sum(axis=(2, 3)))
    covariance = (p * di * dj).sum(axis=(2, 3))
    flat = (sd_i < 1e-15) | (sd_j < 1e-15)
    per_angle = {
        "contrast": (p * (i_index - j_index) ** 2).sum(axis=(2, 3)),
        "homogeneity": (p / (1.0 + (i_index - j_index) ** 2)).sum(axis=(2, 3)),
        "asm": (p**2).sum(axis=(2, 3)),
        "correlation": np.where(flat, 1.0, covariance / np.where(flat, 1.0, sd_i * sd_j)),
    }
    results = {prop: np.where(total == 0, np.nan, per_angle[prop]).sum(axis=0) for prop in GLCM_PROPERTIES}
    return {p: v / len(GLCM_ANGLES) for p, v in results.items()}
