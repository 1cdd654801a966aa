"""Reader of OME-Zarr (NGFF) high-content plates: plate / well / field hierarchy, one array per field."""

from __future__ import annotations

import os
from collections.abc import Iterator

import numpy as np
import pandas as pd

from plateloom.errors import InputError
from plateloom.io.planes import ImageIndex, SiteFrame, check_plane, saturated_fraction
from plateloom.setup.plate_formats import canonical_well, plate_format

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


def zarr_image(store: str, image_path: str):
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
            _, _, labels, _, _ = zarr_image(folder, image_path)
            for label in labels:
                if label in channels:
                    rows.append((well, site, -1, label, f"{folder}::{image_path}"))
                else:
                    unmatched.add(f"channel {label!r}")
    table = pd.DataFrame(rows, columns=["well", "site", "frame", "channel", "path"])
    return ImageIndex(table, True, tuple(sorted(unmatched)), "zarr")


def stream_zarr_site(index: ImageIndex, well: str, site: int, channels: list[str]) -> Iterator[SiteFrame]:
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
    array, axes, labels, _, _ = zarr_image(store, image_path)
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
                planes.append(check_plane(plane, f"{store}::{image_path}", None))
            except InputError as error:
                yield SiteFrame(
                    frame, None, np.full(len(channels), np.nan), f"well {well}, site {site}, frame {frame}: {error}"
                )
                break
        else:
            yield SiteFrame(frame, np.stack(planes), np.array(saturated))
