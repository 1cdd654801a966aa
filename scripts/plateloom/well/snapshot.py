"""A look at the segmentation: one site of a well as a small PNG with nuclear outlines and track tails.

The frame shown is the first frame of the well's first site that site QC flagged (a threshold or
count jump), else its last usable frame, so a thumbnail shows what went wrong when something
did. The nuclear channel is drawn on a log scale between its 1st and 99.9th percentiles (nuclei
over a 10x brightness range stay visible), outlines in cyan, and each track present on that
frame as a yellow line through its last TAIL_FRAMES positions.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
from matplotlib import image as mpl_image
from skimage.draw import line
from skimage.segmentation import find_boundaries

from plateloom.well.image_qc import jumped_frames

THUMBNAIL_PX = 256  # longest side of a thumbnail
TAIL_FRAMES = 6
OUTLINE_RGB = np.array([0, 230, 255], np.uint8)
TAIL_RGB = np.array([255, 210, 0], np.uint8)


def snapshot_frame(site_qc: pd.DataFrame, site: int) -> int | None:
    """The frame to show of ``site``: its first flagged frame, else its last usable one (None: none)."""
    rows = site_qc[site_qc["site"] == site]
    if "frame_problem" in rows.columns:
        rows = rows[rows["frame_problem"].fillna("") == ""]
    if rows.empty:
        return None
    flagged = jumped_frames(rows)
    return int(flagged["frame"].min() if len(flagged) else rows["frame"].max())


def _log_grey(image: np.ndarray) -> np.ndarray:
    """0..1 display scale: log of the image between its 1st and 99.9th percentiles."""
    low, high = np.percentile(image, [1, 99.9])
    scaled = np.log1p(np.clip(image - low, 0, None)) / np.log1p(max(high - low, 1e-6))
    return np.clip(scaled, 0, 1)


def _shrink(values: np.ndarray, factor: int, how: str) -> np.ndarray:
    """Block mean or max over factor x factor blocks (the image cropped to a multiple of factor)."""
    height, width = (values.shape[0] // factor) * factor, (values.shape[1] // factor) * factor
    blocks = values[:height, :width].reshape(height // factor, factor, width // factor, factor)
    return blocks.mean(axis=(1, 3)) if how == "mean" else blocks.max(axis=(1, 3))


def overlay_rgb(image: np.ndarray, labels: np.ndarray, tails_px: list[np.ndarray]) -> np.ndarray:
    """An RGB uint8 thumbnail (longest side about THUMBNAIL_PX) of ``image`` with the outlines of
    ``labels`` and the track tails (each an (n, 2) array of (y, x) in image pixels)."""
    factor = max(1, int(np.ceil(max(image.shape) / THUMBNAIL_PX)))
    grey = (255 * _shrink(_log_grey(image.astype(np.float64)), factor, "mean")).astype(np.uint8)
    rgb = np.repeat(grey[:, :, None], 3, axis=2)
    outlines = _shrink(find_boundaries(labels, mode="inner").astype(np.uint8), factor, "max") > 0
    rgb[outlines] = OUTLINE_RGB
    for tail in tails_px:
        points = np.clip(np.round(tail / factor).astype(int), 0, np.array(rgb.shape[:2]) - 1)
        for (y0, x0), (y1, x1) in zip(points[:-1], points[1:]):
            rows, cols = line(y0, x0, y1, x1)
            rgb[rows, cols] = TAIL_RGB
    return rgb


def track_tails(cells: pd.DataFrame, site: int, frame: int, pixel_size_um: float) -> list[np.ndarray]:
    """(y, x) pixel positions over the last TAIL_FRAMES frames of every track seen on ``frame``."""
    on_site = cells[(cells["site"] == site) & cells["frame"].between(frame - TAIL_FRAMES, frame)]
    present = on_site.loc[on_site["frame"] == frame, "track"].unique()
    recent = on_site[on_site["track"].isin(present)].sort_values(["track", "frame"])
    positions = recent[["centroid_y_um", "centroid_x_um"]].to_numpy() / pixel_size_um
    _, starts = np.unique(recent["track"].to_numpy(), return_index=True)
    return [tail for tail in np.split(positions, starts[1:]) if len(tail) > 1]


def png_bytes(rgb: np.ndarray) -> bytes:
    """PNG encoding of an RGB uint8 image (no time stamp: the same image gives the same bytes)."""
    buffer = io.BytesIO()
    mpl_image.imsave(buffer, rgb, format="png", metadata={"Software": None})
    return buffer.getvalue()
