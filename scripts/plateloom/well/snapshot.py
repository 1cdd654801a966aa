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


CROPS_PER_WELL = 6
CROP_HALF_UM = 12.0  # a crop is 24 um a side: a nucleus with a margin of its surroundings


def cell_crops(planes: np.ndarray, labels: np.ndarray, pixel_size_um: float, count: int = CROPS_PER_WELL):
    """Crops of up to ``count`` nuclei of one frame, for montages: (crops (n, channels, side, side)
    in the image's grey levels, their nuclei's areas in um2, their labels). The nuclei are those whose crop lies
    inside the image, taken at evenly spaced ranks of area (smallest to largest), so a well's crops
    show its spread of sizes; the same frame always gives the same crops."""
    half = max(4, int(round(CROP_HALF_UM / pixel_size_um)))
    n_labels = int(labels.max())
    empty = np.zeros((0, planes.shape[0], 2 * half, 2 * half), np.float32), np.zeros(0), np.zeros(0, np.int64)
    if n_labels == 0:
        return empty
    index = np.flatnonzero(labels)
    owner = labels.ravel()[index]
    y, x = np.divmod(index, labels.shape[1])
    area = np.bincount(owner, minlength=n_labels + 1).astype(float)
    with np.errstate(invalid="ignore"):
        cy = np.rint(np.bincount(owner, y, n_labels + 1) / area)
        cx = np.rint(np.bincount(owner, x, n_labels + 1) / area)
    inside = (cy >= half) & (cx >= half) & (cy + half <= labels.shape[0]) & (cx + half <= labels.shape[1])
    candidates = np.flatnonzero(inside & (area > 0))
    if len(candidates) == 0:
        return empty
    by_area = candidates[np.argsort(area[candidates], kind="stable")]
    chosen = by_area[np.unique(np.round(np.linspace(0, len(by_area) - 1, min(count, len(by_area)))).astype(int))]
    crops = np.stack(
        [planes[:, int(cy[i]) - half : int(cy[i]) + half, int(cx[i]) - half : int(cx[i]) + half] for i in chosen]
    )
    return crops.astype(np.float32), area[chosen] * pixel_size_um**2, chosen.astype(np.int64)


def crops_bytes(
    crops: np.ndarray,
    areas_um2: np.ndarray,
    pixel_size_um: float,
    channels: list[str],
    features: pd.DataFrame | None = None,
) -> bytes:
    """The crops as a compressed NumPy archive (.npz: crops, area_um2, pixel_size_um, channels and,
    given ``features`` (one row per crop), feature_names and feature_values (n, features) in the
    cells table's units, so that a montage can be ordered by any per-cell feature)."""
    features = pd.DataFrame(index=range(len(crops))) if features is None else features
    buffer = io.BytesIO()
    np.savez_compressed(
        buffer,
        crops=crops.astype(np.float32),
        area_um2=np.asarray(areas_um2, float),
        pixel_size_um=np.float64(pixel_size_um),
        channels=np.array(channels),
        feature_names=np.array(list(features.columns), dtype=str),
        feature_values=features.to_numpy(float).reshape(len(crops), len(features.columns)),
    )
    return buffer.getvalue()
