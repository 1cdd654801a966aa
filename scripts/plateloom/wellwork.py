"""Per-well analysis: stream each site's frames, segment, measure, link into tracks."""

from __future__ import annotations

import os
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .errors import InputError
from .features import measure_objects, neighbourhood
from .illumination import apply_flat_field
from .images import ImageIndex, stream_site
from .segment import background_levels, focus_score, segment_nuclei
from .tables import well_part_path, write_parquet
from .track import close_gaps, find_divisions, link_frames, track_features


@dataclass(frozen=True)
class WellSettings:
    """Everything the per-well stage needs from config (physical units)."""

    channels: tuple[str, ...]
    nuclei_channel: str
    pixel_size_um: float
    frame_interval_min: float
    smoothing_sigma_um: float
    min_nucleus_area_um2: float
    split_min_distance_um: float
    max_displacement_um: float
    min_track_frames: int
    max_gap_frames: int = 0
    division_max_distance_um: float | None = None
    neighbour_radius_um: float = 25.0

    @classmethod
    def from_config(cls, config: dict) -> "WellSettings":
        channels = tuple(c["name"] for c in config["channels"])
        nuclei = [c["name"] for c in config["channels"] if c["role"] == "nuclei"]
        seg, trk, img = config["segmentation"], config["tracking"], config["images"]
        return cls(channels, nuclei[0], img["pixel_size_um"], img["frame_interval_min"], seg["smoothing_sigma_um"],
                   seg["min_nucleus_area_um2"], seg["split_min_distance_um"], trk["max_displacement_um"],
                   trk["min_track_frames"], int(trk.get("max_gap_frames", 2)), trk.get("division_max_distance_um"),
                   float(config.get("measurement", {}).get("neighbour_radius_um", 25.0)))


def analyse_site(index: ImageIndex, well: str, site: int, settings: WellSettings,
                 flat_field: np.ndarray | None = None) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Observations (with track ids local to the site) and per-frame QC of one site.

    ``flat_field`` (channels, y, x), if given, divides every frame before segmentation and measurement.
    """
    channels = list(settings.channels)
    nuclei_index = channels.index(settings.nuclei_channel)
    observations, qc_rows = [], []
    previous_xy = np.empty((0, 2))
    previous_tracks = np.empty(0, dtype=np.int64)
    next_track = 0
    for frame, planes, saturated in stream_site(index, well, site, channels):
        if not np.isfinite(planes).all():
            raise InputError(f"well {well}, site {site}, frame {frame}", "image holds NaN or infinite pixels.",
                             "re-export the images; plateloom expects finite grey levels.")
        planes = apply_flat_field(planes, flat_field)
        labels, threshold = segment_nuclei(planes[nuclei_index], settings.pixel_size_um, settings.smoothing_sigma_um,
                                           settings.min_nucleus_area_um2, settings.split_min_distance_um)
        background = background_levels(planes, labels)
        table = measure_objects(labels, planes, channels, background, settings.pixel_size_um)
        xy = table[["centroid_x_um", "centroid_y_um"]].to_numpy()
        table["neighbours"], table["nearest_neighbour_um"] = neighbourhood(xy, settings.neighbour_radius_um)
        links = link_frames(previous_xy, xy, settings.max_displacement_um)
        tracks = np.where(links >= 0, previous_tracks[np.clip(links, 0, None)] if len(previous_tracks) else -1, -1)
        new = tracks < 0
        tracks[new] = next_track + np.arange(new.sum())
        next_track += int(new.sum())
        table.insert(0, "frame", frame)
        table.insert(1, "track", tracks.astype(np.int64))
        observations.append(table)
        qc = {"site": site, "frame": frame, "n_objects": len(table), "foreground_fraction": float((labels > 0).mean()),
              "threshold": threshold, "focus_score": focus_score(planes[nuclei_index])}
        qc.update({f"background_{c}": float(b) for c, b in zip(channels, background)})
        qc.update({f"saturated_fraction_{c}": float(f) for c, f in zip(channels, saturated)})
        qc_rows.append(qc)
        previous_xy, previous_tracks = xy, tracks.astype(np.int64)
    cells = pd.concat(observations, ignore_index=True)
    cells.insert(0, "site", site)
    cells["parent_track"] = -1
    if len(cells):
        frame, x, y = cells["frame"].to_numpy(), cells["centroid_x_um"].to_numpy(), cells["centroid_y_um"].to_numpy()
        track = close_gaps(frame, cells["track"].to_numpy(), x, y, settings.max_gap_frames, settings.max_displacement_um)
        if settings.division_max_distance_um:
            track, parents = find_divisions(frame, track, x, y, settings.division_max_distance_um)
            cells["parent_track"] = pd.Series(parents.set_index("track")["parent_track"]).reindex(track).fillna(-1).to_numpy(np.int64)
        cells["track"] = track
    return cells, pd.DataFrame(qc_rows)


def analyse_well(index: ImageIndex, well: str, settings: WellSettings,
                 flat_field: np.ndarray | None = None) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Cells, tracks and site QC of one well over all its sites.

    Track ids are unique within the well (site-local ids are offset site by site).
    """
    sites = sorted(index.table.loc[index.table["well"] == well, "site"].unique())
    if not sites:
        raise InputError(f"well {well}", "the layout lists this well but no image of it was found.",
                         "check images.filename_template and the plate's image_folder, or mark the well empty.")
    cell_parts, qc_parts, offset = [], [], 0
    for site in sites:
        cells, qc = analyse_site(index, well, int(site), settings, flat_field)
        cells["track"] += offset
        cells.loc[cells["parent_track"] >= 0, "parent_track"] += offset
        offset = int(cells["track"].max()) + 1 if len(cells) else offset
        cell_parts.append(cells)
        qc_parts.append(qc)
    cells = pd.concat(cell_parts, ignore_index=True)
    cells.insert(2, "time_min", cells["frame"] * settings.frame_interval_min)
    motion = track_features(cells["frame"].to_numpy(), cells["track"].to_numpy(), cells["centroid_x_um"].to_numpy(),
                            cells["centroid_y_um"].to_numpy(), settings.frame_interval_min, settings.min_track_frames)
    tracks = pd.DataFrame(motion)
    first = cells.sort_values(["track", "frame"]).drop_duplicates("track").set_index("track")
    tracks.insert(0, "site", first.loc[tracks["track"], "site"].to_numpy())
    border = cells.groupby("track")["touches_border"].any()
    tracks["touches_border"] = border.loc[tracks["track"]].to_numpy()
    tracks["parent_track"] = cells.groupby("track")["parent_track"].first().loc[tracks["track"]].to_numpy()
    return cells, tracks, pd.concat(qc_parts, ignore_index=True)


def _with_keys(frame: pd.DataFrame, plate: str, well: str) -> pd.DataFrame:
    frame = frame.copy()
    frame.insert(0, "plate", plate)
    frame.insert(1, "well", well)
    return frame


def analyse_chunk(index: ImageIndex, plate: str, wells: list[str], settings: WellSettings,
                  out_cells: str, out_tracks: str, out_site_qc: str, config_for_provenance: object,
                  flat_field: np.ndarray | None = None) -> None:
    """Analyse the wells of one chunk; one Parquet file per well in each of three Hive folders."""
    for folder in (out_cells, out_tracks, out_site_qc):
        os.makedirs(folder, exist_ok=True)
    for well in wells:
        cells, tracks, site_qc = analyse_well(index, well, settings, flat_field)
        write_parquet(_with_keys(cells, plate, well), well_part_path(out_cells, well), config_for_provenance)
        write_parquet(_with_keys(tracks, plate, well), well_part_path(out_tracks, well), config_for_provenance)
        write_parquet(_with_keys(site_qc, plate, well), well_part_path(out_site_qc, well), config_for_provenance)
