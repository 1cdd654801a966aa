"""Reader of multi-channel OME-TIFF stacks (one file per site), and the OME metadata of any image
(pixel size, frame interval, channel names)."""

from __future__ import annotations

import math
import os
import re
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.errors import InputError
from plateloom.io.ome_zarr import ZARR_UNITS_TO_MIN, ZARR_UNITS_TO_UM, zarr_image
from plateloom.io.planes import ImageIndex, SiteFrame, check_plane, open_tiff, saturated_fraction, unreadable_error
from plateloom.setup.plate_formats import canonical_well, plate_format

# the micro sign (U+00B5) and the Greek mu (U+03BC) both occur in OME metadata
LENGTH_TO_UM = {"\u00b5m": 1.0, "\u03bcm": 1.0, "um": 1.0, "nm": 1e-3, "mm": 1e3, "m": 1e6}


TIME_TO_MIN = {"s": 1 / 60, "ms": 1 / 60000, "min": 1.0, "h": 60.0}


@dataclass(frozen=True)
class OmeMetadata:
    """What an OME-TIFF says about its pixels: pixel size (um), frame interval (min), channel names."""

    pixel_size_um: float | None
    frame_interval_min: float | None
    channel_names: tuple[str, ...]


def channel_key(name: str) -> str:
    """A channel name from image metadata as a config channel name: lower case, [a-z0-9_] only."""
    return re.sub(r"[^a-z0-9_]", "_", name.strip().lower())


def _zarr_metadata(path: str) -> OmeMetadata:
    store, image_path = path.split("::")
    _, _, labels, scale, units = zarr_image(store, image_path)
    pixel = scale.get("x") * ZARR_UNITS_TO_UM[units["x"]] if units.get("x") in ZARR_UNITS_TO_UM else None
    interval = scale.get("t") * ZARR_UNITS_TO_MIN[units["t"]] if units.get("t") in ZARR_UNITS_TO_MIN else None
    return OmeMetadata(pixel, interval, tuple(labels))


def _ome_pixels(path: str):
    """The Pixels element of an OME-TIFF's OME-XML, or None when the file has no OME metadata."""
    import xml.etree.ElementTree as ElementTree

    with open_tiff(path) as tif:
        xml = tif.ome_metadata
    if not xml:
        return None
    try:
        root = ElementTree.fromstring(xml)
    except ElementTree.ParseError as error:
        raise InputError(
            path,
            f"its OME-XML cannot be parsed ({error}).",
            "re-export the file, or set images.pixel_size_um and images.frame_interval_min in config.",
        ) from None
    return next((e for e in root.iter() if e.tag.endswith("}Pixels") or e.tag == "Pixels"), None)


def _in_unit(value: str | None, unit: str, factors: dict[str, float]) -> float | None:
    return float(value) * factors[unit] if value and unit in factors else None


def read_ome_metadata(path: str) -> OmeMetadata | None:
    """Pixel size, time increment and channel names from an OME-TIFF's OME-XML (None if it has none).

    Units follow the OME schema's defaults when not given: micrometres for sizes, seconds for
    the time increment.
    """
    if "::" in path:  # an image of an OME-Zarr plate
        return _zarr_metadata(path)
    pixels = _ome_pixels(path)
    if pixels is None:
        return None
    return OmeMetadata(
        _in_unit(pixels.get("PhysicalSizeX"), pixels.get("PhysicalSizeXUnit", "\u00b5m"), LENGTH_TO_UM),
        _in_unit(pixels.get("TimeIncrement"), pixels.get("TimeIncrementUnit", "s"), TIME_TO_MIN),
        tuple(c.get("Name", "") for c in pixels if c.tag.endswith("Channel")),
    )


def image_scale(config_images: dict, first_image: str | None) -> tuple[float, float, str]:
    """(pixel size um, frame interval min, where they came from): config values win, else the OME metadata.

    A value that neither config nor the first image's metadata gives stops with a message.
    """
    pixel, interval = config_images.get("pixel_size_um"), config_images.get("frame_interval_min")
    if pixel is not None and interval is not None:
        return float(pixel), float(interval), "config"
    metadata = read_ome_metadata(first_image) if first_image else None
    if pixel is None:
        pixel = metadata.pixel_size_um if metadata else None
    if interval is None:
        interval = metadata.frame_interval_min if metadata else None
    missing = [name for name, value in (("pixel_size_um", pixel), ("frame_interval_min", interval)) if value is None]
    if missing:
        raise InputError(
            f"config images ({first_image or 'no image found'})",
            f"{' and '.join(missing)} not set and not in the image's OME metadata.",
            f"set images.{' and images.'.join(missing)} in config/config.yaml.",
        )
    for name, value in (("pixel_size_um", pixel), ("frame_interval_min", interval)):
        if not (math.isfinite(float(value)) and float(value) > 0):
            raise InputError(
                f"config images ({first_image})",
                f"the image's OME metadata gives {name} = {value:g}, not a positive number.",
                f"set images.{name} in the config.",
            )
    return float(pixel), float(interval), f"OME metadata of {first_image}"


def index_multichannel_stacks(folder: str, regex: re.Pattern[str], wells: int, channels: list[str]) -> ImageIndex:
    """One OME-TIFF per site holding every channel and frame: channels matched to config by the
    channel names of its OME metadata; path is '<file>::<channel position in the file>'."""
    fmt = plate_format(wells)
    rows, unmatched = [], []
    for name in sorted(os.listdir(folder)):
        match = regex.match(name)
        try:
            well = canonical_well(match.group("well"), fmt) if match else None
        except ValueError:
            well = None
        if well is None:
            unmatched.append(name)
            continue
        path = os.path.join(folder, name)
        metadata = read_ome_metadata(path)
        names = metadata.channel_names if metadata else ()
        if not names:
            raise InputError(
                path,
                "names no channels in OME metadata, and the template has no {channel} field.",
                "add {channel} to images.filename_template, or export OME-TIFF with channel names.",
            )
        wanted = {channel_key(c): c for c in channels}  # OME names match config names in any case
        for position, channel in enumerate(channel_key(n) for n in names):
            if channel in wanted:
                rows.append((well, int(match.group("site")), -1, wanted[channel], f"{path}::{position}"))
            else:
                unmatched.append(f"{name} channel {channel!r}")
    table = pd.DataFrame(rows, columns=["well", "site", "frame", "channel", "path"])
    return ImageIndex(table, True, tuple(unmatched), "ome_tiff")


def _frame_pages(series, positions: dict[str, int], channels: list[str], path: str) -> tuple[int, list[list[int]]]:
    """(frames, page number of every channel per frame) of a multi-channel series without z planes."""
    axes = series.axes.upper()
    sizes = {a: n for a, n in zip(axes, series.shape) if a not in "YX"}
    if sizes.get("Z", 1) > 1:
        raise InputError(path, f"has {sizes['Z']} z planes.", "project the z stack before analysis.")
    order = [a for a in axes if a not in "YX"]
    frames = sizes.get("T", 1)
    if not order:
        return frames, [[0] * len(channels) for _ in range(frames)]
    pages = []
    for frame in range(frames):
        at = [{"T": frame, "C": positions[c]} for c in channels]
        pages.append([int(np.ravel_multi_index([a.get(x, 0) for x in order], [sizes[x] for x in order])) for a in at])
    return frames, pages


def stream_multichannel_site(index: ImageIndex, well: str, site: int, channels: list[str]) -> Iterator[SiteFrame]:
    files = index.table[(index.table["well"] == well) & (index.table["site"] == site)]
    positions = dict(zip(files["channel"], (int(p.split("::")[1]) for p in files["path"])))
    missing = [c for c in channels if c not in positions]
    if missing:
        raise InputError(
            f"well {well}, site {site}",
            f"no image for channel(s) {missing} in the OME-TIFF.",
            "check the channel names in config against the file's OME channel names.",
        )
    path = files["path"].iloc[0].split("::")[0]
    with open_tiff(path) as tif:
        series = tif.series[0]
        _, pages_of_frames = _frame_pages(series, positions, channels, path)
        for frame, pages in enumerate(pages_of_frames):
            planes, saturated, problem = [], [], ""
            for page in pages:
                try:
                    plane = series.pages[page].asarray()
                    saturated.append(saturated_fraction(plane))
                    planes.append(check_plane(plane, path, planes[0].shape if planes else None))
                except InputError as error:
                    problem = f"well {well}, site {site}, frame {frame}: {error}"
                    break
                except Exception as error:  # tifffile raises many kinds for a corrupt page
                    problem = f"well {well}, site {site}, frame {frame}: {unreadable_error(path, error)}"
                    break
            if problem:
                yield SiteFrame(frame, None, np.full(len(channels), np.nan), problem)
            else:
                yield SiteFrame(frame, np.stack(planes), np.array(saturated))


def write_label_stack(
    path: str, frames: dict[int, np.ndarray], n_frames: int, pixel_size_um: float, frame_interval_min: float
) -> None:
    """Write one site's nucleus labels as an OME-TIFF time series (axes TYX, one page per frame,
    physical pixel size and frame interval in the OME metadata), atomically. ``frames`` maps frame
    number -> label image (the value of a nucleus is its ``object`` in the cells table of that
    frame); a frame without labels (unusable) is written as zeros, so page t is frame t."""
    import tifffile

    from plateloom.io.tables import atomic_path

    shape = next(iter(frames.values())).shape
    largest = max(int(labels.max(initial=0)) for labels in frames.values())
    dtype = np.uint16 if largest < 2**16 else np.uint32
    stack = np.zeros((n_frames, *shape), dtype)
    for frame, labels in frames.items():
        stack[frame] = labels
    metadata = {
        "axes": "TYX",
        "PhysicalSizeX": pixel_size_um,
        "PhysicalSizeY": pixel_size_um,
        "PhysicalSizeXUnit": "µm",
        "PhysicalSizeYUnit": "µm",
        "TimeIncrement": frame_interval_min,
        "TimeIncrementUnit": "min",
    }
    with atomic_path(path) as tmp:
        tifffile.imwrite(tmp, stack, ome=True, metadata=metadata, compression="zlib")
