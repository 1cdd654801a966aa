"""Component boxes packed side by side into one image (a canvas), and labels found on it put back
in the frame.

Nuclei fill a few percent of a frame; the per-pixel filters of nuclear segmentation need only
the components and a margin of what they read around each. Packing the components' boxes (with
their margins, mirrored where they run off the frame) into one canvas by shelf packing lets every
filter pass over those pixels only, and once for all of them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from plateloom.well.segment import _bounding_boxes


@dataclass(frozen=True)
class Canvas:
    """Component boxes (with margins) packed into one image: the smoothed values, the component
    each pixel belongs to (0 elsewhere), whether a pixel is any foreground, which canvas pixels
    hold image data, and which are saturated (None: not known); ``shift`` (by component id: rows,
    columns) takes a component's canvas pixels back to the frame."""

    image: np.ndarray
    own: np.ndarray
    foreground: np.ndarray
    valid: np.ndarray
    saturated: np.ndarray | None
    shift: np.ndarray


def shelves(sizes: list[tuple[int, int]], width: int) -> tuple[list[tuple[int, int]], int, int]:
    """Top-left corners of boxes of ``sizes`` (height, width) packed in shelves of at most
    ``width`` columns, tallest first; and the canvas height and width."""
    order = sorted(range(len(sizes)), key=lambda i: -sizes[i][0])
    corners: list[tuple[int, int]] = [(0, 0)] * len(sizes)
    y = x = shelf_height = 0
    canvas_width = 0
    for i in order:
        height, box_width = sizes[i]
        if x and x + box_width > width:
            y, x, shelf_height = y + shelf_height, 0, 0
        corners[i] = (y, x)
        shelf_height = max(shelf_height, height)
        x += box_width
        canvas_width = max(canvas_width, x)
    return corners, y + shelf_height, canvas_width


def pack_components(
    smooth: np.ndarray,
    components: np.ndarray,
    foreground: np.ndarray,
    index: np.ndarray,
    ids: np.ndarray,
    margin: int,
    saturated: np.ndarray | None = None,
) -> Canvas:
    """The canvas of the components ``ids`` with ``margin`` pixels of image around each
    (``index``: flat indices of the foreground pixels; ``saturated``: the frame's saturated
    pixels, packed alongside). Boxes touch: every filter reads at most a margin's width around a
    component. Where a margin runs off the frame it holds the frame mirrored at its edge (as the
    filters' "reflect" mode) and is not valid image data."""
    boxes = _bounding_boxes(index, components.ravel()[index], ids, components.shape[1])
    height, width = components.shape
    sizes = [(b[0].stop - b[0].start + 2 * margin, b[1].stop - b[1].start + 2 * margin) for b in boxes]
    corners, canvas_height, canvas_width = shelves(sizes, max(width, max(s[1] for s in sizes)))
    image = np.zeros((canvas_height, canvas_width), np.float32)
    own = np.zeros((canvas_height, canvas_width), np.int32)
    fore = np.zeros((canvas_height, canvas_width), bool)
    valid = np.zeros((canvas_height, canvas_width), bool)
    sat = np.zeros((canvas_height, canvas_width), bool) if saturated is not None else None
    shift = np.zeros((int(ids.max(initial=0)) + 1, 2), np.int64)
    for component, box, (y, x), (h, w) in zip(ids.tolist(), boxes, corners, sizes):
        top, left = box[0].start - margin, box[1].start - margin
        frame = (slice(max(0, top), min(height, top + h)), slice(max(0, left), min(width, left + w)))
        pad = (
            (frame[0].start - top, top + h - frame[0].stop),
            (frame[1].start - left, left + w - frame[1].stop),
        )
        place = (slice(y, y + h), slice(x, x + w))
        inner = (slice(y + pad[0][0], y + h - pad[0][1]), slice(x + pad[1][0], x + w - pad[1][1]))
        image[place] = _mirrored(smooth[frame], pad)
        own[inner] = np.where(components[frame] == component, component, 0)
        fore[place] = _mirrored(foreground[frame], pad)
        valid[inner] = True
        if sat is not None:
            sat[place] = _mirrored(saturated[frame], pad)
        shift[component] = frame[0].start - inner[0].start, frame[1].start - inner[1].start
    return Canvas(image, own, fore, valid, sat, shift)


def _mirrored(window: np.ndarray, pad: tuple[tuple[int, int], tuple[int, int]]) -> np.ndarray:
    """``window`` extended by ``pad`` pixels mirrored at its edges (itself when nothing is to add)."""
    return np.pad(window, pad, mode="symmetric") if any(pad[0]) or any(pad[1]) else window


def labels_in_frame(found: np.ndarray, canvas: Canvas, min_area_px: int, shape: tuple[int, int]) -> np.ndarray:
    """The canvas's labels put back in the frame, those under ``min_area_px`` pixels dropped and the
    rest numbered 1..n in the order of their canvas ids."""
    index = np.flatnonzero(found)
    label = found.ravel()[index]
    keep = np.bincount(label, minlength=1) >= min_area_px
    keep[0] = False
    new_ids = np.where(keep, np.cumsum(keep), 0).astype(np.int32)
    y, x = np.divmod(index, found.shape[1])
    shift = canvas.shift[canvas.own.ravel()[index]]  # every label pixel lies in its own component
    labels = np.zeros(shape, np.int32)
    labels.ravel()[(y + shift[:, 0]) * shape[1] + x + shift[:, 1]] = new_ids[label]
    return labels
