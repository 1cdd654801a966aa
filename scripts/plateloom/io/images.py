"""Finding a plate's images and streaming them frame by frame: one interface over every source
(TIFF files named by a template, multi-channel OME-TIFF stacks, OME-Zarr plates)."""

from __future__ import annotations

import os
import re
from collections import Counter
from collections.abc import Iterator
from contextlib import ExitStack

import numpy as np
import pandas as pd

from plateloom.errors import InputError
from plateloom.io.ome_tiff import (
    OmeMetadata,
    channel_key,
    image_scale,
    index_multichannel_stacks,
    read_ome_metadata,
    stream_multichannel_site,
)
from plateloom.io.ome_zarr import index_zarr_plate, is_zarr_plate, stream_zarr_site, zarr_image
from plateloom.io.planes import ImageIndex, SiteFrame, check_plane, open_tiff, page_count, read_page, saturated_fraction
from plateloom.setup.plate_formats import canonical_well, plate_format

# the interface other modules import from here
__all__ = [
    "ImageIndex",
    "OmeMetadata",
    "SiteFrame",
    "channel_key",
    "image_scale",
    "index_plate_images",
    "index_zarr_plate",
    "is_zarr_plate",
    "read_ome_metadata",
    "saturated_fraction",
    "site_frame_count",
    "site_frame_counts",
    "stream_site",
    "template_regex",
    "unmatched_note",
]


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
        return index_multichannel_stacks(folder, regex, wells, channels)
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
    _refuse_two_spellings(table)
    return ImageIndex(table, stacks, tuple(unmatched))


def _refuse_two_spellings(table: pd.DataFrame) -> None:
    """Stop when two files are the same image (A7_s1_dna.tif and A07_s1_dna.tif): one would be dropped."""
    twice = table[table.duplicated(["well", "site", "frame", "channel"], keep=False)]
    if twice.empty:
        return
    first = twice.sort_values("path").groupby(["well", "site", "frame", "channel"])["path"].apply(list).iloc[0]
    raise InputError(
        first[0],
        f"{os.path.basename(first[1])} is the same well, site, frame and channel spelt another way "
        f"({len(twice)} files in {len(twice) // 2 or 1} such pair(s) or more).",
        "keep one file per image (remove or rename the copy).",
    )


def usual_pixel_type(index: ImageIndex, at_most: int = 48) -> str | None:
    """The pixel type of most of a plate's TIFF files (first-page headers of up to ``at_most`` files
    spread over the plate); None for other sources or when none can be read."""
    if index.source != "tiff" or index.table.empty:
        return None
    files = sorted(index.table["path"].unique())
    picks = sorted(set(np.linspace(0, len(files) - 1, min(at_most, len(files))).round().astype(int).tolist()))
    found = []
    for i in picks:
        try:
            with open_tiff(files[i]) as tif:
                found.append(str(tif.pages[0].dtype))
        except (InputError, OSError, ValueError, IndexError):
            continue
    return Counter(found).most_common(1)[0][0] if found else None


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


def site_frame_counts(index: ImageIndex, well: str, site: int, channels: list[str]) -> dict[str, tuple[int, str]]:
    """Per channel: (number of frames, where they come from) of one site; an error if a channel has no image."""
    files = index.table[(index.table["well"] == well) & (index.table["site"] == site)]
    if index.source == "zarr" and len(files):
        store, image_path = files["path"].iloc[0].split("::")
        array, axes, _, _, _ = zarr_image(store, image_path)
        frames = dict(zip(axes, array.shape)).get("t", 1)
        return {c: (frames, image_path) for c in channels}
    if index.source == "ome_tiff" and len(files):
        path = files["path"].iloc[0].split("::")[0]
        with open_tiff(path) as tif:
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
            counts[channel] = (page_count(paths[0]), os.path.basename(paths[0]))
        else:
            frames = files.loc[files["channel"] == channel, "frame"]
            counts[channel] = (int(frames.max()) - int(frames.min()) + 1, f"{len(paths)} files")
    return counts


def site_frame_count(index: ImageIndex, well: str, site: int, channels: list[str]) -> int:
    """Number of frames of one site: the longest channel (frames another channel lacks are flagged)."""
    return max(n for n, _ in site_frame_counts(index, well, site, channels).values())


def stream_site(
    index: ImageIndex,
    well: str,
    site: int,
    channels: list[str],
    shape: tuple[int, ...] | None = None,
    pixel_type: str | None = None,
) -> Iterator[SiteFrame]:
    """Yield the frames of one site in order, one at a time (only one frame of every channel is in memory).

    A frame that cannot be used (its file missing from a per-frame series, a stack shorter
    than the other channels', a page of another shape or pixel type, NaN pixels, an unreadable
    page) comes with ``problem`` set and no planes, so the rest of the site is still analysed.
    A file that cannot be opened at all, or a channel without any image, stops with an error.
    Planes must have ``shape`` (the plate's image size, e.g. the flat field's); when it is not
    given, the size of most of the first pages of the site's channels. With ``pixel_type`` (the
    plate's, see ``usual_pixel_type``) a page of another type is flagged.
    """
    if index.source == "zarr":
        yield from stream_zarr_site(index, well, site, channels)
        return
    if index.source == "ome_tiff":
        yield from stream_multichannel_site(index, well, site, channels)
        return
    yield from _stream_tiff_site(index, well, site, channels, shape, pixel_type)


class _TiffSite:
    """The TIFF files of one site: per channel either one stack (pages are frames, opened once
    per site) or one file per frame; ``raw_plane`` reads one channel of one frame."""

    def __init__(self, index: ImageIndex, well: str, site: int, channels: list[str], stack: ExitStack):
        files = index.table[(index.table["well"] == well) & (index.table["site"] == site)]
        self.where = f"well {well}, site {site}"
        self.stacks = index.stacks
        self.counts = site_frame_counts(index, well, site, channels)
        self.n_frames = max(n for n, _ in self.counts.values())
        by_channel = {c: files[files["channel"] == c].sort_values("frame") for c in channels}
        self.start = 0 if index.stacks else min(int(t["frame"].min()) for t in by_channel.values())
        self.stack_paths = {c: t["path"].iloc[0] for c, t in by_channel.items()} if index.stacks else {}
        self.opened = {c: stack.enter_context(open_tiff(p)) for c, p in self.stack_paths.items()}
        self.paths = {c: dict(zip(t["frame"], t["path"])) for c, t in by_channel.items()}

    def usual_shape(self, channels: list[str], frames: int = 3) -> tuple[int, ...] | None:
        """The most common page shape among the first ``frames`` frames of every channel (read
        from the page headers; None if none can be read)."""
        shapes = []
        for channel in channels:
            for frame in range(min(frames, self.counts[channel][0])):
                try:
                    shapes.append(self._page_shape(channel, frame))
                except (InputError, OSError, ValueError, IndexError):
                    continue
        return Counter(shapes).most_common(1)[0][0] if shapes else None

    def _page_shape(self, channel: str, frame: int) -> tuple[int, ...]:
        if self.stacks:
            return tuple(self.opened[channel].pages[frame].shape)
        path = self.paths[channel].get(self.start + frame)
        if path is None:
            raise InputError(path, "missing", "")
        with open_tiff(path) as tif:
            return tuple(tif.pages[0].shape)

    def raw_plane(self, channel: str, frame: int) -> tuple[np.ndarray, str]:
        """(plane as stored, its file) of frame number ``frame`` counted from the site's first frame."""
        if self.stacks:
            path = self.stack_paths[channel]
            if frame >= self.counts[channel][0]:
                raise InputError(
                    path,
                    f"has {self.counts[channel][0]} pages while another channel has {self.n_frames}; "
                    f"frame {frame} is missing.",
                    "re-copy or re-export the file; a truncated copy is the usual cause.",
                )
            return read_page(self.opened[channel], path, frame), path
        path = self.paths[channel].get(self.start + frame)
        if path is None:
            raise InputError(
                f"{self.where}, channel {channel}",
                f"frame {self.start + frame} is missing from the series.",
                "re-export the missing frame; the other frames are analysed.",
            )
        with open_tiff(path) as tif:
            return read_page(tif, path, 0), path


def read_site_frame(index: ImageIndex, well: str, site: int, channels: list[str], frame: int) -> np.ndarray | None:
    """The planes (channels, y, x; float32) of one frame of a site, reading only that frame's pages
    where the source allows it; None if the frame cannot be read."""
    if index.source != "tiff":
        for item in stream_site(index, well, site, channels):
            if item.frame == frame:
                return None if item.problem else item.planes
        return None
    with ExitStack() as stack:
        files = _TiffSite(index, well, site, channels, stack)
        try:
            planes = [check_plane(files.raw_plane(c, frame - files.start)[0], "", None) for c in channels]
            return np.stack(planes).astype(np.float32)
        except (InputError, ValueError):
            return None


def _stream_tiff_site(
    index: ImageIndex,
    well: str,
    site: int,
    channels: list[str],
    shape: tuple[int, ...] | None,
    pixel_type: str | None,
) -> Iterator[SiteFrame]:
    with ExitStack() as stack:
        files = _TiffSite(index, well, site, channels, stack)
        shape = shape or files.usual_shape(channels)
        for frame in range(files.n_frames):
            planes, saturated, problem = None, [], ""
            for number, channel in enumerate(channels):
                try:
                    plane, path = files.raw_plane(channel, frame)
                    saturated.append(saturated_fraction(plane))
                    if planes is None:  # converted straight into the frame's array: one copy, not two
                        planes = np.empty((len(channels),) + (shape or plane.shape), np.float32)
                    check_plane(plane, path, planes.shape[1:], pixel_type, out=planes[number])
                except InputError as error:
                    problem = f"{files.where}, frame {files.start + frame}: {error}"
                    break
            if problem:
                yield SiteFrame(files.start + frame, None, np.full(len(channels), np.nan), problem)
            else:
                yield SiteFrame(files.start + frame, planes, np.array(saturated))
