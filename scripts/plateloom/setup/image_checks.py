"""What ``plateloom check`` reads from the image headers of one plate: unreadable files, image
sizes and pixel types other than the plate's usual ones, channels of different frame counts, and
stacks that may be z-stacks saved as pages."""

from __future__ import annotations

import os
from collections import Counter

import tifffile

from plateloom.errors import InputError
from plateloom.io.images import ImageIndex


def header_problems(index: ImageIndex, wells: list[str]) -> tuple[list[InputError], int]:
    """Unreadable files, image sizes that differ, stacks of different page counts; and the site-frames of stacks."""
    table = index.table[index.table["well"].isin(wells)]
    problems: list[InputError] = []
    shapes: dict[str, tuple[int, ...]] = {}
    pages: dict[tuple[str, int], dict[str, int]] = {}
    dtypes: dict[str, str] = {}
    for row in table.itertuples():
        try:
            with tifffile.TiffFile(row.path) as tif:
                shape = tuple(tif.pages[0].shape)
                dtypes[row.path] = str(tif.pages[0].dtype)
                if index.stacks:
                    pages.setdefault((row.well, row.site), {})[row.channel] = len(tif.pages)
        except Exception as error:  # tifffile raises many kinds for corrupt files
            problems.append(
                InputError(
                    row.path,
                    f"cannot be read as TIFF ({type(error).__name__}).",
                    "re-copy the file from the microscope.",
                )
            )
            continue
        shapes[row.path] = shape
    for (well, site), counts in pages.items():
        if len(set(counts.values())) > 1:
            detail = ", ".join(f"{c}: {n}" for c, n in counts.items())
            problems.append(
                InputError(
                    f"well {well}, site {site}",
                    f"channels have different frame counts ({detail}).",
                    "re-copy the shorter stack (a run would flag the missing frames).",
                )
            )
    problems += _size_problems(shapes) + _pixel_type_problems(dtypes) + _z_stack_problems(pages)
    return problems, sum(max(c.values()) for c in pages.values())


def _size_problems(shapes: dict[str, tuple[int, ...]]) -> list[InputError]:
    """Files whose image size is not the usual one (that of most files): one problem per file."""
    if not shapes:
        return []
    usual, _ = Counter(shapes.values()).most_common(1)[0]
    example = next(path for path, shape in shapes.items() if shape == usual)
    return [
        InputError(
            path,
            f"image size {shape} differs from {usual} (the size of most images, e.g. {os.path.basename(example)}).",
            "re-export it at that size; a run flags its frames and analyses the rest.",
        )
        for path, shape in shapes.items()
        if shape != usual
    ]


def _pixel_type_problems(dtypes: dict[str, str]) -> list[InputError]:
    """Files whose pixel type is not the plate's (that of most of its files): an 8-bit export in a
    16-bit plate would be analysed at another intensity scale."""
    if not dtypes:
        return []
    usual, _ = Counter(dtypes.values()).most_common(1)[0]
    return [
        InputError(path, f"pixel type {dtype} differs from the plate's {usual}.", "re-export it as the other images.")
        for path, dtype in dtypes.items()
        if dtype != usual
    ]


def _z_stack_problems(pages: dict[tuple[str, int], dict[str, int]]) -> list[InputError]:
    """Sites whose stacks hold a whole multiple (2x or more) of the plate's usual page count: z planes
    saved as pages would be read as time frames."""
    counts = [n for by_channel in pages.values() for n in by_channel.values()]
    if not counts:
        return []
    usual, _ = Counter(counts).most_common(1)[0]
    return [
        InputError(
            f"well {well}, site {site}, channel {channel}",
            f"has {n} pages, {n // usual} times the plate's usual {usual}: possibly a z-stack saved as pages, which "
            "would be read as time frames.",
            "save a maximum projection (or one plane) per frame.",
        )
        for (well, site), by_channel in pages.items()
        for channel, n in by_channel.items()
        if usual > 0 and n > usual and n % usual == 0
    ]
