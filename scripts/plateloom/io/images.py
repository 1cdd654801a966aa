"""Finding images by a filename template and streaming them frame by frame."""

from __future__ import annotations

import os
import re
from collections.abc import Iterator
from contextlib import ExitStack
from dataclasses import dataclass

import numpy as np
import pandas as pd
import tifffile

from plateloom.errors import InputError
from plateloom.setup.plate_formats import canonical_well, plate_format

FIELD_PATTERNS = {
    "well": r"(?P<well>[A-Za-z]{1,2}\d{1,2})",
    "site": r"(?P<site>\d+)",
    "frame": r"(?P<frame>\d+)",
    "channel": r"(?P<channel>[A-Za-z0-9_]+?)",
}


def template_regex(template: str) -> re.Pattern[str]:
    """Compile a filename template such as '{well}_s{site}_t{frame}_{channel}.tif' to a regex."""
    fields = re.findall(r"{(\w+)}", template)
    unknown = sorted(set(fields) - set(FIELD_PATTERNS))
    # without {channel}, each file is a multi-channel OME-TIFF stack of one site (channels named in its metadata)
    if unknown or not {"well", "site"} <= set(fields) or ("channel" not in fields and "frame" in fields):
        raise InputError(
            "config images.filename_template",
            f"template {template!r} has fields {fields}.",
            "use {well}, {site}, {channel} and optionally {frame}, each once (or {well} and {site} "
            "alone for one multi-channel OME-TIFF stack per site).",
        )
    if len(fields) != len(set(fields)):
        raise InputError(
            "config images.filename_template", f"template {template!r} repeats a field.", "use each field once."
        )
    pattern = ""
    for literal, field in re.findall(r"([^{]*)(?:{(\w+)})?", template):
        pattern += re.escape(literal)
        if field:
            pattern += FIELD_PATTERNS[field]
    return re.compile(f"^{pattern}$")


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


def index_plate_images(folder: str, template: str, wells: int, channels: list[str]) -> ImageIndex:
    """List a plate's image folder once and parse every file name with the template.

    Files whose names do not fit the template are returned in ``unmatched`` (reported, not
    silently ignored); files of channels not in config are also unmatched.
    """
    if not os.path.isdir(folder):
        raise InputError(folder, "the image folder does not exist.", "check image_folder in the screen sheet.")
    if is_zarr_plate(folder):
        return index_zarr_plate(folder, wells, channels)
    regex = template_regex(template)
    stacks = "{frame}" not in template
    if "{channel}" not in template:
        return _index_multichannel_stacks(folder, regex, wells, channels)
    fmt = plate_format(wells)
    rows, unmatched = [], []
    for name in sorted(os.listdir(folder)):
        match = regex.match(name)
        if not match or match.group("channel") not in channels:
            unmatched.append(name)
            continue
        try:
            well = canonical_well(match.group("well"), fmt)
        except ValueError:
            unmatched.append(name)
            continue
        frame = -1 if stacks else int(match.group("frame"))
        rows.append((well, int(match.group("site")), frame, match.group("channel"), os.path.join(folder, name)))
    table = pd.DataFrame(rows, columns=["well", "site", "frame", "channel", "path"])
    return ImageIndex(table, stacks, tuple(unmatched))


def channel_key(name: str) -> str:
    """A channel name from image metadata as a config channel name: lower case, [a-z0-9_] only."""
    return re.sub(r"[^a-z0-9_]", "_", name.strip().lower())


def _index_multichannel_stacks(folder: str, regex: re.Pattern[str], wells: int, channels: list[str]) -> ImageIndex:
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
        for position, channel in enumerate(channel_key(n) for n in names):
            if channel in channels:
                rows.append((well, int(match.group("site")), -1, channel, f"{path}::{position}"))
            else:
                unmatched.append(f"{name} channel {channel!r}")
    table = pd.DataFrame(rows, columns=["well", "site", "frame", "channel", "path"])
    return ImageIndex(table, True, tuple(unmatched), "ome_tiff")


def _stream_multichannel_site(index: ImageIndex, well: str, site: int, channels: list[str]) -> Iterator[SiteFrame]:
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
    with _open_tiff(path) as tif:
        series = tif.series[0]
        axes = series.axes.upper()
        sizes = {a: n for a, n in zip(axes, series.shape) if a not in "YX"}
        if sizes.get("Z", 1) > 1:
            raise InputError(path, f"has {sizes['Z']} z planes.", "project the z stack before analysis.")
        order = [a for a in axes if a not in "YX"]
        pages = series.pages
        for frame in range(sizes.get("T", 1)):
            planes, saturated, problem = [], [], ""
            for channel in channels:
                coordinate = {"T": frame, "C": positions[channel]}
                page = (
                    int(np.ravel_multi_index([coordinate.get(a, 0) for a in order], [sizes[a] for a in order]))
                    if order
                    else 0
                )
                try:
                    plane = pages[page].asarray()
                    saturated.append(saturated_fraction(plane))
                    planes.append(_check_plane(plane, path, planes[0].shape if planes else None))
                except InputError as error:
                    problem = f"well {well}, site {site}, frame {frame}: {error}"
                    break
                except Exception as error:  # tifffile raises many kinds for a corrupt page
                    problem = f"well {well}, site {site}, frame {frame}: {_unreadable(path, error)}"
                    break
            if problem:
                yield SiteFrame(frame, None, np.full(len(channels), np.nan), problem)
            else:
                yield SiteFrame(frame, np.stack(planes), np.array(saturated))


def unmatched_note(folder: str, template: str, wells: int, channels: list[str], shown: int = 5) -> str | None:
    """A plate-report warning listing files of the image folder that were not analysed, or None."""
    index = index_plate_images(folder, template, wells, channels)
    files = [name for name in index.unmatched if not name.startswith(".")]
    if not files:
        return None
    listed = ", ".join(repr(name) for name in files[:shown]) + (
        f" and {len(files) - shown} more" if len(files) > shown else ""
    )
    return (
        f"{len(files)} file(s) in {folder} match neither images.filename_template {template!r} nor a configured "
        f"channel and were not analysed: {listed}. Fix: rename them, or adjust the template or channels."
    )


# the micro sign (U+00B5) and the Greek mu (U+03BC) both occur in OME metadata
LENGTH_TO_UM = {"\u00b5m": 1.0, "\u03bcm": 1.0, "um": 1.0, "nm": 1e-3, "mm": 1e3, "m": 1e6}
TIME_TO_MIN = {"s": 1 / 60, "ms": 1 / 60000, "min": 1.0, "h": 60.0}


@dataclass(frozen=True)
class OmeMetadata:
    """What an OME-TIFF says about its pixels: pixel size (um), frame interval (min), channel names."""

    pixel_size_um: float | None
    frame_interval_min: float | None
    channel_names: tuple[str, ...]


ZARR_UNITS_TO_UM = {"micrometer": 1.0, "nanometer": 1e-3, "millimeter": 1e3, "meter": 1e6}
ZARR_UNITS_TO_MIN = {"second": 1 / 60, "millisecond": 1 / 60000, "minute": 1.0, "hour": 60.0}


def is_zarr_plate(folder: str) -> bool:
    """An OME-Zarr (NGFF) store: a folder named *.zarr."""
    return os.path.normpath(folder).endswith(".zarr") and os.path.isdir(folder)


def _open_zarr(path: str):
    try:
        import zarr
    except ImportError:
        raise InputError(
            path, "is an OME-Zarr plate, but the zarr package is not installed.", 'pip install -e ".[zarr]"'
        ) from None
    try:
        return zarr.open_group(path, mode="r")
    except Exception as error:  # zarr raises several kinds for a store it cannot read
        raise InputError(
            path,
            f"cannot be opened as a Zarr store ({type(error).__name__}: {error}).",
            "check that the folder is a complete OME-Zarr plate.",
        ) from None


def _ome(group) -> dict:
    attributes = dict(group.attrs)
    return attributes.get("ome", attributes)  # OME-Zarr 0.5 nests under "ome"; 0.4 does not


def _zarr_image(store: str, image_path: str):
    """(array of the full-resolution level, axis names, channel labels, scale per axis, unit per axis)."""
    group = _open_zarr(store)[image_path]
    multiscale = _ome(group)["multiscales"][0]
    axes = [a["name"] if isinstance(a, dict) else a for a in multiscale.get("axes", ["t", "c", "z", "y", "x"])]
    units = {a["name"]: a.get("unit") for a in multiscale.get("axes", []) if isinstance(a, dict)}
    dataset = multiscale["datasets"][0]
    scale = next(
        (t["scale"] for t in dataset.get("coordinateTransformations", []) if t.get("type") == "scale"),
        [1.0] * len(axes),
    )
    labels = [c.get("label", f"c{i}") for i, c in enumerate(_ome(group).get("omero", {}).get("channels", []))]
    return group[dataset["path"]], axes, labels, dict(zip(axes, scale)), units


def index_zarr_plate(folder: str, wells: int, channels: list[str]) -> ImageIndex:
    """Index an OME-Zarr high-content plate (plate / well / field hierarchy) like a folder of stacks.

    Wells come from the plate metadata (row and column names), sites are the fields in order
    (1, 2, ...), channels are matched to config by the omero channel labels. Channels of the
    store that config does not list are reported in ``unmatched``.
    """
    root = _open_zarr(folder)
    plate = _ome(root).get("plate")
    if not plate:
        raise InputError(folder, "has no OME-Zarr plate metadata.", "give the plate's top-level .zarr folder.")
    fmt = plate_format(wells)
    rows, unmatched = [], set()
    for entry in plate["wells"]:
        row_name, column_name = entry["path"].split("/")
        try:
            well = canonical_well(f"{row_name}{int(column_name):02d}", fmt)
        except ValueError:
            unmatched.add(f"{entry['path']} (not a well of a {wells}-well plate)")
            continue
        images = _ome(root[entry["path"]])["well"]["images"]
        for site, image in enumerate(images, start=1):
            image_path = f"{entry['path']}/{image['path']}"
            _, _, labels, _, _ = _zarr_image(folder, image_path)
            for label in labels:
                if label in channels:
                    rows.append((well, site, -1, label, f"{folder}::{image_path}"))
                else:
                    unmatched.add(f"channel {label!r}")
    table = pd.DataFrame(rows, columns=["well", "site", "frame", "channel", "path"])
    return ImageIndex(table, True, tuple(sorted(unmatched)), "zarr")


def _stream_zarr_site(index: ImageIndex, well: str, site: int, channels: list[str]) -> Iterator[SiteFrame]:
    files = index.table[(index.table["well"] == well) & (index.table["site"] == site)]
    found = set(files["channel"])
    for channel in channels:
        if channel not in found:
            raise InputError(
                f"well {well}, site {site}",
                f"no image for channel {channel!r} in the OME-Zarr plate.",
                "check the channel names in config against the store's omero channel labels.",
            )
    store, image_path = files["path"].iloc[0].split("::")
    array, axes, labels, _, _ = _zarr_image(store, image_path)
    shape = dict(zip(axes, array.shape))
    if shape.get("z", 1) > 1:
        raise InputError(
            f"{store}::{image_path}",
            f"has {shape['z']} z planes.",
            "project the z stack (e.g. maximum projection) before analysis.",
        )
    for frame in range(shape.get("t", 1)):
        planes, saturated = [], []
        for channel in channels:
            position = {"t": frame, "c": labels.index(channel), "z": 0}
            plane = np.asarray(array[tuple(position.get(a, slice(None)) for a in axes)])
            saturated.append(saturated_fraction(plane))
            try:
                planes.append(_check_plane(plane, f"{store}::{image_path}", None))
            except InputError as error:
                yield SiteFrame(
                    frame, None, np.full(len(channels), np.nan), f"well {well}, site {site}, frame {frame}: {error}"
                )
                break
        else:
            yield SiteFrame(frame, np.stack(planes), np.array(saturated))


def read_ome_metadata(path: str) -> OmeMetadata | None:
    """Pixel size, time increment and channel names from an OME-TIFF's OME-XML (None if it has none).

    Units follow the OME schema's defaults when not given: micrometres for sizes, seconds for
    the time increment.
    """
    import xml.etree.ElementTree as ElementTree

    if "::" in path:  # an image of an OME-Zarr plate
        store, image_path = path.split("::")
        _, axes, labels, scale, units = _zarr_image(store, image_path)
        pixel = scale.get("x") * ZARR_UNITS_TO_UM[units["x"]] if units.get("x") in ZARR_UNITS_TO_UM else None
        interval = scale.get("t") * ZARR_UNITS_TO_MIN[units["t"]] if units.get("t") in ZARR_UNITS_TO_MIN else None
        return OmeMetadata(pixel, interval, tuple(labels))
    with _open_tiff(path) as tif:
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
    pixels = next((e for e in root.iter() if e.tag.endswith("}Pixels") or e.tag == "Pixels"), None)
    if pixels is None:
        return None
    size = pixels.get("PhysicalSizeX")
    size_unit = pixels.get("PhysicalSizeXUnit", "µm")
    interval = pixels.get("TimeIncrement")
    interval_unit = pixels.get("TimeIncrementUnit", "s")
    names = tuple(c.get("Name", "") for c in pixels if c.tag.endswith("Channel"))
    return OmeMetadata(
        float(size) * LENGTH_TO_UM[size_unit] if size and size_unit in LENGTH_TO_UM else None,
        float(interval) * TIME_TO_MIN[interval_unit] if interval and interval_unit in TIME_TO_MIN else None,
        names,
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
    return float(pixel), float(interval), f"OME metadata of {first_image}"


def saturated_fraction(plane: np.ndarray) -> float:
    """Fraction of pixels at the largest value of an integer pixel type (NaN for float images)."""
    if not np.issubdtype(plane.dtype, np.integer):
        return float("nan")
    top = np.iinfo(plane.dtype).max
    if plane.max() < top:  # the usual case, and one cheap pass
        return 0.0
    return float(np.count_nonzero(plane == top) / plane.size)


def _check_plane(plane: np.ndarray, path: str, shape: tuple[int, ...] | None) -> np.ndarray:
    if plane.ndim != 2:
        raise InputError(
            path,
            f"expected one 2-D plane per page, found shape {plane.shape}.",
            "save one channel per file (and one page per frame for stacks).",
        )
    if shape is not None and plane.shape != shape:
        raise InputError(
            path,
            f"plane shape {plane.shape} differs from the other channels/frames {shape}.",
            "all images of a site must have the same size.",
        )
    if not (np.issubdtype(plane.dtype, np.integer) or np.issubdtype(plane.dtype, np.floating)):
        raise InputError(
            path, f"pixel type {plane.dtype} is not numeric.", "save grey-level images (uint8, uint16 or float)."
        )
    is_float = np.issubdtype(plane.dtype, np.floating)
    plane = plane.astype(np.float32, copy=False)
    if is_float and not np.isfinite(plane).all():  # integer pixels are always finite
        raise InputError(
            path, "image holds NaN or infinite pixels.", "re-export the images; plateloom expects finite grey levels."
        )
    return plane


def _unreadable(path: str, error: Exception) -> InputError:
    return InputError(
        path,
        f"cannot be read as TIFF ({type(error).__name__}: {error}).",
        "re-copy the file from the microscope; a truncated transfer is the usual cause.",
    )


def _open_tiff(path: str) -> tifffile.TiffFile:
    try:
        return tifffile.TiffFile(path)
    except Exception as error:  # tifffile raises many kinds for truncated or corrupt files
        raise _unreadable(path, error) from None


def _page(tif: tifffile.TiffFile, path: str, page: int) -> np.ndarray:
    if page >= len(tif.pages):
        raise InputError(
            path, f"has {len(tif.pages)} pages, frame {page} is missing.", "re-export the full time series."
        )
    try:
        return tif.pages[page].asarray()
    except Exception as error:
        raise _unreadable(path, error) from None


def _page_count(path: str) -> int:
    with _open_tiff(path) as tif:
        return len(tif.pages)


def site_frame_counts(index: ImageIndex, well: str, site: int, channels: list[str]) -> dict[str, tuple[int, str]]:
    """Per channel: (number of frames, where they come from) of one site; an error if a channel has no image."""
    files = index.table[(index.table["well"] == well) & (index.table["site"] == site)]
    if index.source == "zarr" and len(files):
        store, image_path = files["path"].iloc[0].split("::")
        array, axes, _, _, _ = _zarr_image(store, image_path)
        frames = dict(zip(axes, array.shape)).get("t", 1)
        return {c: (frames, image_path) for c in channels}
    if index.source == "ome_tiff" and len(files):
        path = files["path"].iloc[0].split("::")[0]
        with _open_tiff(path) as tif:
            series = tif.series[0]
            frames = dict(zip(series.axes.upper(), series.shape)).get("T", 1)
        return {c: (frames, os.path.basename(path)) for c in channels}
    counts = {}
    for channel in channels:
        paths = files.loc[files["channel"] == channel, "path"].tolist()
        if not paths:
            raise InputError(
                f"well {well}, site {site}",
                f"no image for channel {channel!r}.",
                "check the file names against images.filename_template.",
            )
        if index.stacks:
            counts[channel] = (_page_count(paths[0]), os.path.basename(paths[0]))
        else:
            frames = files.loc[files["channel"] == channel, "frame"]
            counts[channel] = (int(frames.max()) - int(frames.min()) + 1, f"{len(paths)} files")
    return counts


def site_frame_count(index: ImageIndex, well: str, site: int, channels: list[str]) -> int:
    """Number of frames of one site: the longest channel (frames another channel lacks are flagged)."""
    return max(n for n, _ in site_frame_counts(index, well, site, channels).values())


@dataclass(frozen=True)
class SiteFrame:
    """One frame of a site: planes (channels, y, x) float32 and per-channel saturated fraction,
    or ``problem`` (the message naming file and fix) when the frame cannot be used."""

    frame: int
    planes: np.ndarray | None
    saturated: np.ndarray
    problem: str = ""


def stream_site(index: ImageIndex, well: str, site: int, channels: list[str]) -> Iterator[SiteFrame]:
    """Yield the frames of one site in order, one at a time (only one frame of every channel is in memory).

    A frame that cannot be used (its file missing from a per-frame series, a stack shorter
    than the other channels', a page of another shape or pixel type, NaN pixels, an unreadable
    page) comes with ``problem`` set and no planes, so the rest of the site is still analysed.
    A file that cannot be opened at all, or a channel without any image, stops with an error.
    """
    if index.source == "zarr":
        yield from _stream_zarr_site(index, well, site, channels)
        return
    if index.source == "ome_tiff":
        yield from _stream_multichannel_site(index, well, site, channels)
        return
    files = index.table[(index.table["well"] == well) & (index.table["site"] == site)]
    counts = site_frame_counts(index, well, site, channels)
    n_frames = max(n for n, _ in counts.values())
    by_channel = {c: files[files["channel"] == c].sort_values("frame") for c in channels}
    first_frame = {c: int(t["frame"].min()) for c, t in by_channel.items()}
    start = min(first_frame.values()) if not index.stacks else 0
    shape: tuple[int, ...] | None = None
    with ExitStack() as stack:
        # a stack file is opened once per site, not once per frame
        opened = (
            {c: stack.enter_context(_open_tiff(by_channel[c]["path"].iloc[0])) for c in channels}
            if index.stacks
            else {}
        )
        paths = {c: dict(zip(t["frame"], t["path"])) for c, t in by_channel.items()}
        for frame in range(n_frames):
            planes, saturated, problem = [], [], ""
            for channel in channels:
                try:
                    if index.stacks:
                        path = by_channel[channel]["path"].iloc[0]
                        if frame >= counts[channel][0]:
                            raise InputError(
                                path,
                                f"has {counts[channel][0]} pages while another channel has {n_frames}; "
                                f"frame {frame} is missing.",
                                "re-copy or re-export the file; a truncated copy is the usual cause.",
                            )
                        plane = _page(opened[channel], path, frame)
                    else:
                        path = paths[channel].get(start + frame)
                        if path is None:
                            raise InputError(
                                f"well {well}, site {site}, channel {channel}",
                                f"frame {start + frame} is missing from the series.",
                                "re-export the missing frame; the other frames are analysed.",
                            )
                        with _open_tiff(path) as tif:
                            plane = _page(tif, path, 0)
                    saturated.append(saturated_fraction(plane))
                    plane = _check_plane(plane, path, shape)
                except InputError as error:
                    problem = f"well {well}, site {site}, frame {start + frame}: {error}"
                    break
                shape = plane.shape
                planes.append(plane)
            if problem:
                yield SiteFrame(start + frame, None, np.full(len(channels), np.nan), problem)
            else:
                yield SiteFrame(start + frame, np.stack(planes), np.array(saturated))
