"""Binary and label morphology by shifted slices (many times faster than scipy's morphology on
large images, with the same results; tests compare them with scipy), and block reduction."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np


def dilate_cross(mask: np.ndarray) -> np.ndarray:
    """Binary dilation by the 3x3 cross (``ndimage.binary_dilation`` with its default structure),
    by shifted slices: many times faster than scipy's binary morphology on large images."""
    out = mask.copy()
    out[1:] |= mask[:-1]
    out[:-1] |= mask[1:]
    out[:, 1:] |= mask[:, :-1]
    out[:, :-1] |= mask[:, 1:]
    return out


def erode_cross(mask: np.ndarray) -> np.ndarray:
    """Binary erosion by the 3x3 cross, outside the image counting as background (as
    ``ndimage.binary_erosion`` with its defaults)."""
    out = mask.copy()
    out[1:] &= mask[:-1]
    out[:-1] &= mask[1:]
    out[:, 1:] &= mask[:, :-1]
    out[:, :-1] &= mask[:, 1:]
    out[0] = out[-1] = False
    out[:, 0] = out[:, -1] = False
    return out


def dilate_square(mask: np.ndarray) -> np.ndarray:
    """Binary dilation by the 3x3 square (``ndimage.binary_dilation`` with ``np.ones((3, 3))``): rows,
    then columns."""
    rows = mask.copy()
    rows[1:] |= mask[:-1]
    rows[:-1] |= mask[1:]
    out = rows.copy()
    out[:, 1:] |= rows[:, :-1]
    out[:, :-1] |= rows[:, 1:]
    return out


def maximum_square(image: np.ndarray, size: int) -> np.ndarray:
    """Maximum over the size x size square around each pixel (``size`` odd), as
    ``ndimage.maximum_filter(image, size=size)`` (its reflected edges add no new value to a maximum):
    rows, then columns, by shifted slices; about four times faster on a 7 x 7 window."""
    reach = size // 2
    rows = image.copy()
    for shift in range(1, reach + 1):
        np.maximum(rows[shift:], image[:-shift], out=rows[shift:])
        np.maximum(rows[:-shift], image[shift:], out=rows[:-shift])
    out = rows.copy()
    for shift in range(1, reach + 1):
        np.maximum(out[:, shift:], rows[:, :-shift], out=out[:, shift:])
        np.maximum(out[:, :-shift], rows[:, shift:], out=out[:, :-shift])
    return out


def same_as_neighbours(labels: np.ndarray) -> np.ndarray:
    """Whether each pixel's four neighbours hold its own label (outside the image counts as the same);
    ``np.where(same_as_neighbours(labels), labels, 0)`` erodes every label by the 3x3 cross at once."""
    same = np.ones(labels.shape, bool)
    same[1:] &= labels[1:] == labels[:-1]
    same[:-1] &= labels[:-1] == labels[1:]
    same[:, 1:] &= labels[:, 1:] == labels[:, :-1]
    same[:, :-1] &= labels[:, :-1] == labels[:, 1:]
    return same


def block_reduce(image: np.ndarray, size: int, reduce: Callable) -> np.ndarray:
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
