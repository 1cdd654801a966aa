"""The per-well job: analyse a chunk of wells of one plate and write one file per well and table."""

from __future__ import annotations

import logging
import os
import time
from dataclasses import dataclass

import numpy as np
import pandas as pd

from plateloom.columns import OBJECT_IDS_AND_POSITIONS
from plateloom.io.images import ImageIndex, read_site_frame, usual_pixel_type
from plateloom.io.ome_tiff import write_label_stack
from plateloom.io.planes import saturation_masks
from plateloom.io.tables import well_part_path, write_bytes, write_parquet
from plateloom.well.collective import CollectiveSettings, well_collective_readouts
from plateloom.well.events import end_events, fate_events
from plateloom.well.illumination import apply_flat_field
from plateloom.well.snapshot import cell_crops, crops_bytes, overlay_rgb, png_bytes, snapshot_frame, track_tails
from plateloom.well.stage import WellSettings, analyse_well, segment_frame, with_keys


def collective_table(
    cells: pd.DataFrame, settings: WellSettings, collective: CollectiveSettings, well: str
) -> pd.DataFrame:
    """One row of collective readouts of a well (see plateloom.well.collective); no columns when switched off
    or when no channel has the role reporter."""
    if not collective.enabled or not settings.reporter_channels:
        return pd.DataFrame(index=[0])
    row = well_collective_readouts(
        cells, list(settings.reporter_channels), collective, settings.frame_interval_min, well
    )
    return pd.DataFrame([row])


@dataclass(frozen=True)
class ChunkOutputs:
    """The Hive folders a chunk job writes one Parquet file per well into (collective: optional)."""

    cells: str
    tracks: str
    site_qc: str
    collective: str | None = None
    thumbnails: str | None = None  # per well <well>.png and <well>.npz (crops) (plateloom.well.snapshot)
    labels: str | None = None  # with segmentation.export_labels: <well>_s<site>.ome.tif per site
    events: str | None = None  # divisions and deaths (plateloom.well.events)


def well_snapshot(
    index: ImageIndex,
    well: str,
    settings: WellSettings,
    flat_field: np.ndarray | None,
    cells: pd.DataFrame,
    site_qc: pd.DataFrame,
) -> tuple[bytes, bytes] | None:
    """The well's first site on its first flagged (else last usable) frame: a PNG with nuclear
    outlines and track tails, and an .npz of a few nuclei's crops (``cell_crops``, for the
    montages); None when no frame of that site can be read."""
    site = int(site_qc["site"].min())
    frame = snapshot_frame(site_qc, site)
    planes = None if frame is None else read_site_frame(index, well, site, list(settings.channels), frame)
    if planes is None:
        return None
    saturated = saturation_masks(planes)  # before the flat field moves the ceiling, as the analysis
    planes = apply_flat_field(planes, flat_field)
    labels = segment_frame(planes, settings, saturated)[0]
    nuclear = planes[list(settings.channels).index(settings.nuclei_channel)]
    png = png_bytes(overlay_rgb(nuclear, labels, track_tails(cells, site, frame, settings.pixel_size_um)))
    crops, areas, objects = cell_crops(planes, labels, settings.pixel_size_um)
    features = crop_features(cells, site, frame, objects)
    return png, crops_bytes(crops, areas, settings.pixel_size_um, list(settings.channels), features)


NOT_CROP_FEATURES = ("site", "frame", "time_min", *OBJECT_IDS_AND_POSITIONS)


def crop_features(cells: pd.DataFrame, site: int, frame: int, objects: np.ndarray) -> pd.DataFrame:
    """The cells table's numeric per-cell features of the cropped nuclei (the frame's labels are its
    ``object`` numbers), one row per crop in ``objects`` order; NaN where a nucleus has no row."""
    here = cells[(cells["site"] == site) & (cells["frame"] == frame)].drop_duplicates("object").set_index("object")
    numeric = [c for c in here.columns if c not in NOT_CROP_FEATURES and pd.api.types.is_numeric_dtype(here[c])]
    return here.reindex(np.asarray(objects, np.int64))[numeric].astype(float).reset_index(drop=True)


def _well_tables(
    cells: pd.DataFrame,
    tracks: pd.DataFrame,
    site_qc: pd.DataFrame,
    settings: WellSettings,
    outputs: ChunkOutputs,
    collective: CollectiveSettings | None,
    well: str,
) -> list[pd.DataFrame]:
    """The tables one well writes, in the order of ``analyse_chunk``'s folders (the tracks gain
    ``end_event``)."""
    events = fate_events(cells, settings.death_rule, settings.frame_interval_min)
    tracks["end_event"] = end_events(tracks, events)
    tables = [cells, tracks, site_qc]
    if outputs.collective:
        tables.append(collective_table(cells, settings, collective or CollectiveSettings.defaults(), well))
    if outputs.events:
        tables.append(events)
    return tables


def analyse_chunk(
    index: ImageIndex,
    plate: str,
    wells: list[str],
    settings: WellSettings,
    outputs: ChunkOutputs,
    config_for_provenance: object,
    flat_field: np.ndarray | None = None,
    collective: CollectiveSettings | None = None,
) -> None:
    """Analyse the wells of one chunk; one Parquet file per well in each folder of ``outputs``
    (cells, tracks, site QC and, with their folders, the well's collective readouts and fate events) and,
    with a thumbnails folder, one PNG per well."""
    optional = [f for f in (outputs.collective, outputs.events) if f]
    folders = [outputs.cells, outputs.tracks, outputs.site_qc] + optional
    for folder in folders + [f for f in (outputs.thumbnails, outputs.labels) if f]:
        os.makedirs(folder, exist_ok=True)
    pixel_type = usual_pixel_type(index)  # a site exported at another bit depth is flagged, not measured
    log = logging.getLogger("plateloom")
    for number, well in enumerate(wells, start=1):
        started = time.perf_counter()
        label_frames: dict | None = {} if outputs.labels else None
        cells, tracks, site_qc = analyse_well(index, well, settings, flat_field, pixel_type, label_frames)
        for site, frames in (label_frames or {}).items():
            if frames:
                n_frames = int(site_qc.loc[site_qc["site"] == site, "frame"].max()) + 1
                path = os.path.join(outputs.labels, f"{well}_s{site}.ome.tif")
                write_label_stack(path, frames, n_frames, settings.pixel_size_um, settings.frame_interval_min)
        tables = _well_tables(cells, tracks, site_qc, settings, outputs, collective, well)
        for table, folder in zip(tables, folders):
            write_parquet(with_keys(table, plate, well), well_part_path(folder, well), config_for_provenance)
        snapshot = well_snapshot(index, well, settings, flat_field, cells, site_qc) if outputs.thumbnails else None
        if snapshot is not None:
            write_bytes(snapshot[0], os.path.join(outputs.thumbnails, f"{well}.png"))
            write_bytes(snapshot[1], os.path.join(outputs.thumbnails, f"{well}.npz"))
        seconds = time.perf_counter() - started
        log.info(
            "plate %s well %s done (%d of %d): %d nuclei in %d site-frames, %d tracks, %.1f s (%.1f site-frames/s)",
            plate, well, number, len(wells), len(cells), len(site_qc), len(tracks), seconds,
            len(site_qc) / max(seconds, 1e-9),
        )  # fmt: skip
