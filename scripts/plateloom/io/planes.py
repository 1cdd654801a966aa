"""What every image reader yields and shares: the image index, one frame of a site, plane checks and TIFF opening."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
import tifffile

from plateloom.errors import InputError


@dataclass(frozen=True)
class ImageIndex:
    """The images of one plate: a table with well, site, frame (-1 for stacks), channel, path.

    ``source`` is "tiff" (files named by the template) or "zarr" (an OME-Zarr plate; path is
    '<plate.zarr>::<row>/<column>/<field>').
    """

    table: pd.DataFrame
    stacks: bool
    unmatched: tuple[str, ...]
    source: str = "tiff"


@dataclass(frozen=True)
class SiteFrame:
    """One frame of a site: planes (channels, y, x) float32 and per-channel saturated fraction,
    or ``problem`` (the message naming file and fix) when the frame cannot be used."""

    frame: int
    planes: np.ndarray | None
    saturated: np.ndarray
    problem: str = ""


def saturated_fraction(plane: np.ndarray) -> float:
    """Fraction of pixels at the largest value of an integer pixel type (NaN for float images)."""
    if not np.issubdtype(plane.dtype, np.integer):
        return float("nan")
    top = np.iinfo(plane.dtype).max
    if plane.max() < top:  # the usual case, and one cheap pass
        return 0.0
    return float(np.count_nonzero(plane == top) / plane.size)


CAMERA_CEILINGS = (255.0, 1023.0, 4095.0, 16383.0, 65535.0)  # 8-, 10-, 12-, 14- and 16-bit cameras
MIN_SATURATED_PIXELS = 3  # fewer pixels at a ceiling is chance, not saturation


def saturation_masks(planes: np.ndarray) -> np.ndarray | None:
    """Per channel, the pixels at the camera's ceiling (the plane's maximum when it is the largest
    value of an 8- to 16-bit camera and at least MIN_SATURATED_PIXELS pixels reach it); None when
    no channel is saturated. ``planes``: (channels, y, x) raw grey levels, before any correction."""
    maxima = planes.reshape(len(planes), -1).max(axis=1)
    if not np.isin(maxima, CAMERA_CEILINGS).any():
        return None
    masks = np.zeros(planes.shape, bool)
    for channel, top in enumerate(maxima):
        if top in CAMERA_CEILINGS:
            at_top = planes[channel] == top
            if np.count_nonzero(at_top) >= MIN_SATURATED_PIXELS:
                masks[channel] = at_top
    return masks if masks.any() else None


def check_plane(
    plane: np.ndarray,
    path: str,
    shape: tuple[int, ...] | None,
    pixel_type: str | None = None,
    out: np.ndarray | None = None,
) -> np.ndarray:
    """``plane`` as float32 (written into ``out`` if given), after checking that it is one 2-D plane
    of ``shape`` and ``pixel_type`` (when given) with finite numeric pixels; InputError naming
    ``path`` and the fix otherwise."""
    if plane.ndim != 2:
        raise InputError(
            path,
            f"expected one 2-D plane per page, found shape {plane.shape}.",
            "save one channel per file (and one page per frame for stacks).",
        )
    if shape is not None and plane.shape != shape:
        raise InputError(
            path,
            f"plane shape {plane.shape} differs from the expected {shape} (the plate's image size, or that of "
            "most images of this site).",
            "re-export this image at the plate's size; the other frames and sites are analysed.",
        )
    if pixel_type is not None and str(plane.dtype) != pixel_type:
        raise InputError(
            path,
            f"pixel type {plane.dtype} differs from the plate's {pixel_type}: it would be measured on another "
            "intensity scale.",
            "re-export it as the plate's other images; the rest of the plate is analysed.",
        )
    if not (np.issubdtype(plane.dtype, np.integer) or np.issubdtype(plane.dtype, np.floating)):
        raise InputError(
            path, f"pixel type {plane.dtype} is not numeric.", "save grey-level images (uint8, uint16 or float)."
        )
    is_float = np.issubdtype(plane.dtype, np.floating)
    if out is None:
        plane = plane.astype(np.float32, copy=False)
    else:
        np.copyto(out, plane, casting="unsafe")  # float64 input is rounded to float32 as astype does
        plane = out
    if is_float and not np.isfinite(plane).all():  # integer pixels are always finite
        raise InputError(
            path, "image holds NaN or infinite pixels.", "re-export the images; plateloom expects finite grey levels."
        )
    return plane


def unreadable_error(path: str, error: Exception) -> InputError:
    return InputError(
        path,
        f"cannot be read as TIFF ({type(error).__name__}: {error}).",
        "re-copy the file from the microscope; a truncated transfer is the usual cause.",
    )


def open_tiff(path: str) -> tifffile.TiffFile:
    try:
        return tifffile.TiffFile(path)
    except Exception as error:  # tifffile raises many kinds for truncated or corrupt files
        raise unreadable_error(path, error) from None


def read_page(tif: tifffile.TiffFile, path: str, page: int) -> np.ndarray:
    if page >= len(tif.pages):
        raise InputError(
            path, f"has {len(tif.pages)} pages, frame {page} is missing.", "re-export the full time series."
        )
    try:
        return tif.pages[page].asarray()
    except Exception as error:
        raise unreadable_error(path, error) from None


def page_count(path: str) -> int:
    with open_tiff(path) as tif:
        return len(tif.pages)
