"""Cell bodies grown from the nuclei by a seeded watershed on a cytoplasm or membrane channel."""

from __future__ import annotations

import numpy as np
from skimage.segmentation import watershed

from plateloom.well.morphology import block_reduce, dilate_square
from plateloom.well.thresholds import object_threshold, smooth_image

# Cell bodies are found on the 2x2-binned body channel when its smoothing is at least this wide
# (pixels) and the image at least twice BODY_BINNING_MIN_SIDE_PX on each side.
BODY_BINNING_MIN_SIGMA_PX = 2.0


BODY_BINNING_MIN_SIDE_PX = 32


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
    binned = block_reduce(body_image.astype(np.float32, copy=False), 2, np.add) * np.float32(0.25)
    # a 2-pixel box already blurs by a variance of 1/3 px^2; the Gaussian adds the rest, in binned pixels
    smooth = smooth_image(binned, np.sqrt(sigma_px**2 - 1 / 3) / 2)
    bodies, threshold = _seeded_bodies(block_reduce(nuclei, 2, np.maximum), smooth, threshold_method)
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
    edge_blocks = np.flatnonzero(dilate_square(inside) & ~inside)
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
