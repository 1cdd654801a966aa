"""Per-well analysis: stream each site's frames, segment, measure, link into tracks."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from plateloom.errors import InputError
from plateloom.io.images import ImageIndex, SiteFrame, stream_site
from plateloom.io.planes import saturation_masks
from plateloom.settings import FromSchema
from plateloom.well.cell_bodies import grow_cell_bodies
from plateloom.well.divisions import DivisionRule, find_divisions
from plateloom.well.events import DAUGHTER_REACH_DIAMETERS, DeathRule, division_distance_um
from plateloom.well.features import centroids_um, measure_objects, neighbourhood
from plateloom.well.illumination import apply_flat_field
from plateloom.well.image_qc import background_levels, focus_score, segmentation_jumps
from plateloom.well.linking import FrameLinker, appearance_features
from plateloom.well.nuclei import segment_nuclei_on_edges
from plateloom.well.segment import segment_label_free, segment_smoothed
from plateloom.well.texture import TextureSettings
from plateloom.well.thresholds import smooth_image
from plateloom.well.track_stats import (
    fit_persistent_walk,
    mean_squared_displacement,
    reporter_dynamics,
    track_matrix,
)
from plateloom.well.tracking import close_gaps, track_features


@dataclass(frozen=True)
class WellSettings(FromSchema):
    """Everything the per-well stage needs from config (physical units)."""

    channels: tuple[str, ...]
    nuclei_channel: str
    pixel_size_um: float
    frame_interval_min: float
    smoothing_sigma_um: float
    min_nucleus_area_um2: float
    split_min_distance_um: float
    max_displacement_um: float | None  # None: estimated per site from the data
    min_track_frames: int
    max_gap_frames: int
    division_max_distance_um: float | None  # None: divisions not called
    division_min_rounding: float
    death_min_brightening: float
    death_max_area_ratio: float
    death_min_reporter_ratio: float
    death_min_edge_distance_um: float
    neighbour_radius_um: float
    threshold_method: str
    segmentation_method: str
    nucleus_diameter_um: float
    cell_body_threshold_method: str
    label_free: bool
    label_free_window_um: float
    cell_body_channel: str | None
    cell_body_smoothing_sigma_um: float
    texture_channels: tuple[str, ...] | None  # None: the nuclei channel
    texture_distance_um: float
    texture_levels: int
    reporter_channels: tuple[str, ...]
    msd_max_lag_frames: int

    @classmethod
    def from_config(cls, config: dict) -> WellSettings:
        """From the validated config (images, channels, segmentation, tracking, measurement), by name."""
        channels = tuple(c["name"] for c in config["channels"])
        roles = {c["name"]: c["role"] for c in config["channels"]}
        seg, track, images, measure = (config[k] for k in ("segmentation", "tracking", "images", "measurement"))
        texture = measure["texture_channels"]
        return cls(
            channels=channels,
            nuclei_channel=next(c for c in channels if roles[c] in ("nuclei", "label_free")),
            pixel_size_um=images["pixel_size_um"],
            frame_interval_min=images["frame_interval_min"],
            smoothing_sigma_um=seg["smoothing_sigma_um"],
            min_nucleus_area_um2=seg["min_nucleus_area_um2"],
            split_min_distance_um=seg["split_min_distance_um"],
            threshold_method=seg["threshold_method"],
            segmentation_method=seg["method"],
            nucleus_diameter_um=float(seg["nucleus_diameter_um"]),
            cell_body_threshold_method=seg["cell_body_threshold_method"],
            label_free=any(role == "label_free" for role in roles.values()),
            label_free_window_um=float(seg["label_free_window_um"]),
            cell_body_channel=next((c for c in channels if roles[c] == "cell_body"), None),
            cell_body_smoothing_sigma_um=float(seg["cell_body_smoothing_sigma_um"]),
            max_displacement_um=track["max_displacement_um"],
            min_track_frames=track["min_track_frames"],
            max_gap_frames=int(track["max_gap_frames"]),
            division_max_distance_um=division_distance_um(config),
            division_min_rounding=float(config["fate"]["min_rounding"]),
            death_min_brightening=float(config["fate"]["death_min_brightening"]),
            death_max_area_ratio=float(config["fate"]["death_max_area_ratio"]),
            death_min_reporter_ratio=float(config["fate"]["death_min_reporter_ratio"]),
            death_min_edge_distance_um=float(config["fate"]["death_min_edge_distance_um"]),
            msd_max_lag_frames=int(track["msd_max_lag_frames"]),
            neighbour_radius_um=float(measure["neighbour_radius_um"]),
            texture_channels=None if texture is None else tuple(texture),
            texture_distance_um=float(measure["texture_distance_um"]),
            texture_levels=int(measure["texture_levels"]),
            reporter_channels=tuple(c for c in channels if roles[c] == "reporter"),
        )

    @property
    def death_rule(self) -> DeathRule:
        return DeathRule(
            self.death_min_brightening,
            self.death_max_area_ratio,
            self.death_min_reporter_ratio,
            self.nuclei_channel,
            self.reporter_channels[0] if self.reporter_channels else None,
            self.death_min_edge_distance_um,
            self.division_max_distance_um or DAUGHTER_REACH_DIAMETERS * self.nucleus_diameter_um,
        )

    @property
    def measured_texture_channels(self) -> list[str]:
        return [self.nuclei_channel] if self.texture_channels is None else list(self.texture_channels)


def segment_frame(
    planes: np.ndarray, settings: WellSettings, saturated: np.ndarray | None = None
) -> tuple[np.ndarray, np.ndarray | None, float, np.ndarray]:
    """Objects of one frame: (nuclei labels, cell-body labels or None, threshold, smoothed segmented
    channel). ``saturated``: per channel, the raw pixels at the camera's ceiling (None: none)."""
    channels = list(settings.channels)
    nuclei_index = channels.index(settings.nuclei_channel)
    image = planes[nuclei_index]
    smooth = smooth_image(image, settings.smoothing_sigma_um / settings.pixel_size_um)
    if settings.label_free:
        labels, threshold = segment_label_free(
            image,
            settings.pixel_size_um,
            settings.label_free_window_um,
            settings.min_nucleus_area_um2,
            settings.split_min_distance_um,
            settings.threshold_method,
        )
    elif settings.segmentation_method == "edges":
        labels, threshold = segment_nuclei_on_edges(
            smooth,
            settings.pixel_size_um,
            settings.min_nucleus_area_um2,
            settings.split_min_distance_um,
            settings.nucleus_diameter_um,
            settings.threshold_method,
            None if saturated is None else saturated[nuclei_index],
        )
    else:
        labels, threshold = segment_smoothed(
            smooth,
            settings.pixel_size_um,
            settings.min_nucleus_area_um2,
            settings.split_min_distance_um,
            settings.threshold_method,
        )
    bodies = None
    if settings.cell_body_channel:
        bodies = grow_cell_bodies(
            labels,
            planes[channels.index(settings.cell_body_channel)],
            settings.pixel_size_um,
            settings.cell_body_smoothing_sigma_um,
            settings.cell_body_threshold_method,
        )
    return labels, bodies, threshold, smooth


def measure_frame(
    planes: np.ndarray,
    labels: np.ndarray,
    bodies: np.ndarray | None,
    settings: WellSettings,
    saturated: np.ndarray | None = None,
) -> tuple[pd.DataFrame, np.ndarray]:
    """Per-object table of one frame (``saturated``: ceiling masks of the raw planes) and the backgrounds."""
    channels = list(settings.channels)
    background = background_levels(planes, labels if bodies is None else bodies)
    distance_px = max(1, int(round(settings.texture_distance_um / settings.pixel_size_um)))
    texture = TextureSettings(tuple(settings.measured_texture_channels), distance_px, settings.texture_levels)
    table = measure_objects(labels, planes, channels, background, settings.pixel_size_um, bodies, texture, saturated)
    xy = centroids_um(table)
    table["neighbours"], table["nearest_neighbour_um"] = neighbourhood(xy, settings.neighbour_radius_um)
    return table, background


def _site_frames(frames: Iterator[SiteFrame], well: str, site: int, n_channels: int) -> Iterator[SiteFrame]:
    """The frames of a site; a file that cannot be opened at all (an empty or cut-off copy, a
    missing channel) ends the site with one flagged frame instead of stopping the job, so the bad
    site costs only itself."""
    next_frame = 0
    try:
        for item in frames:
            next_frame = item.frame + 1
            yield item
    except InputError as error:
        yield SiteFrame(next_frame, None, np.full(n_channels, np.nan), f"well {well}, site {site}: {error}")


def _no_objects(settings: WellSettings) -> pd.DataFrame:
    """An observations table with every column and no row (a site none of whose frames is usable)."""
    planes = np.zeros((len(settings.channels), 8, 8), np.float32)
    labels = np.zeros((8, 8), np.int32)
    bodies = labels if settings.cell_body_channel else None
    table, _ = measure_frame(planes, labels, bodies, settings)
    table.insert(0, "frame", np.empty(0, np.int64))
    table.insert(1, "track", np.empty(0, np.int64))
    return table


def _unusable_frame_qc(site: int, frame: int, problem: str, channels: list[str]) -> dict:
    """The QC row of a frame that could not be used: no measures, the problem named."""
    qc = {"site": site, "frame": frame, "n_objects": 0, "foreground_fraction": np.nan, "threshold": np.nan}
    qc.update({"focus_score": np.nan, "empty_field": False, "frame_problem": problem})
    qc.update({f"background_{c}": np.nan for c in channels})
    qc.update({f"saturated_fraction_{c}": np.nan for c in channels})
    qc.update({"links": 0, "links_near_cutoff": 0, "links_cut_off": 0, "linking_distance_um": np.nan})
    return qc


def _frame_qc(
    site: int,
    item: SiteFrame,
    table: pd.DataFrame,
    labels: np.ndarray,
    threshold: float,
    smooth: np.ndarray,
    background: np.ndarray,
    channels: list[str],
) -> dict:
    """The QC row of an analysed frame: objects, foreground, threshold, focus, background, saturation."""
    qc = {"site": site, "frame": item.frame, "n_objects": len(table)}
    qc.update({"foreground_fraction": np.count_nonzero(labels) / labels.size, "threshold": threshold})
    qc.update({"focus_score": focus_score(smooth), "empty_field": len(table) == 0, "frame_problem": ""})
    qc.update({f"background_{c}": float(b) for c, b in zip(channels, background)})
    qc.update({f"saturated_fraction_{c}": float(f) for c, f in zip(channels, item.saturated)})
    return qc


def _close_gaps_and_divisions(cells: pd.DataFrame, settings: WellSettings) -> pd.DataFrame:
    """Join track segments across missed frames and, if switched on, record divisions (parent_track;
    the mother rounds up before, both daughters are seen for 2 frames or more)."""
    cells["parent_track"] = -1
    if not len(cells):
        return cells
    frame, x, y = cells["frame"].to_numpy(), cells["centroid_x_um"].to_numpy(), cells["centroid_y_um"].to_numpy()
    track = close_gaps(frame, cells["track"].to_numpy(), x, y, settings.max_gap_frames, settings.max_displacement_um)
    if settings.division_max_distance_um:
        rule = DivisionRule(
            settings.division_max_distance_um,
            cells[f"mean_intensity_{settings.nuclei_channel}"].to_numpy(float),
            settings.division_min_rounding,
            min_daughter_frames=2,
        )
        track, parents = find_divisions(frame, track, x, y, settings.division_max_distance_um, rule)
        parent = pd.Series(parents.set_index("track")["parent_track"]).reindex(track).fillna(-1)
        cells["parent_track"] = parent.to_numpy(np.int64)
    cells["track"] = track
    return cells


def analyse_site(
    index: ImageIndex,
    well: str,
    site: int,
    settings: WellSettings,
    flat_field: np.ndarray | None = None,
    pixel_type: str | None = None,
    label_frames: dict[int, np.ndarray] | None = None,
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Observations (with track ids local to the site) and per-frame QC of one site.

    ``flat_field`` (channels, y, x), if given, divides every frame before segmentation and
    measurement. A frame that cannot be used gets a QC row with ``frame_problem`` (the
    message) and no observations; tracks bridge it by gap closing. ``label_frames``, if given,
    receives each usable frame's nucleus labels (frame -> labels; for the optional label export).
    """
    channels = list(settings.channels)
    observations, qc_rows = [], []
    linker = FrameLinker(settings.max_displacement_um)
    shape = flat_field.shape[1:] if flat_field is not None else None
    for item in _site_frames(stream_site(index, well, site, channels, shape, pixel_type), well, site, len(channels)):
        if item.problem:
            qc_rows.append(_unusable_frame_qc(site, item.frame, item.problem, channels))
            linker.break_links()
            continue
        saturated = saturation_masks(item.planes)  # before the flat field moves the ceiling
        planes = apply_flat_field(item.planes, flat_field)
        labels, bodies, threshold, smooth = segment_frame(planes, settings, saturated)
        if label_frames is not None:
            label_frames[item.frame] = labels
        table, background = measure_frame(planes, labels, bodies, settings, saturated)
        xy = centroids_um(table)
        tracks = linker.tracks_of(xy, appearance_features(table, settings.nuclei_channel))
        table.insert(0, "frame", item.frame)
        table.insert(1, "track", tracks)
        observations.append(table)
        qc_rows.append(_frame_qc(site, item, table, labels, threshold, smooth, background, channels) | linker.last)
    if not observations:  # no usable frame: an empty site, every frame flagged in site QC (and the ledger)
        observations.append(_no_objects(settings))
    cells = pd.concat(observations, ignore_index=True)
    cells.insert(0, "site", site)
    linked = replace(settings, max_displacement_um=linker.max_displacement_um or 0.0)
    return _close_gaps_and_divisions(cells, linked), segmentation_jumps(pd.DataFrame(qc_rows))


def track_table(cells: pd.DataFrame, settings: WellSettings) -> pd.DataFrame:
    """One row per track: motility, persistent-random-walk fit and reporter dynamics (see README outputs)."""
    frame, track = cells["frame"].to_numpy(), cells["track"].to_numpy()
    x, y = cells["centroid_x_um"].to_numpy(), cells["centroid_y_um"].to_numpy()
    motion = track_features(frame, track, x, y, settings.frame_interval_min, settings.min_track_frames)
    tracks = pd.DataFrame(motion)
    if tracks.empty:
        extra = ["walk_speed_um_per_min", "persistence_time_min"] + [
            f"{column}_{c}"
            for c in settings.reporter_channels
            for column in ("track_mean", "track_cv", "period_min", "peaks_per_h", "max_rate_per_min")
        ]
        return tracks.assign(**{column: pd.Series(dtype=float) for column in extra})
    ids = tracks["track"].to_numpy()
    long_enough = tracks["n_frames"].to_numpy() >= settings.min_track_frames
    _, x_matrix = track_matrix(frame, track, x, ids)
    _, y_matrix = track_matrix(frame, track, y, ids)
    max_lag = max(1, min(settings.msd_max_lag_frames, x_matrix.shape[1] // 2))
    msd, pairs = mean_squared_displacement(x_matrix, y_matrix, max_lag)
    observed = np.isfinite(x_matrix)
    span = x_matrix.shape[1] - observed[:, ::-1].argmax(axis=1) - observed.argmax(axis=1)
    pairs[np.arange(1, max_lag + 1)[None, :] > (span // 2)[:, None]] = 0  # a track uses lags up to half its span
    walk_speed, persistence = fit_persistent_walk(msd, pairs, settings.frame_interval_min)
    tracks["walk_speed_um_per_min"] = np.where(long_enough, walk_speed, np.nan)
    tracks["persistence_time_min"] = np.where(long_enough, persistence, np.nan)
    for channel in settings.reporter_channels:
        _, values = track_matrix(frame, track, cells[f"mean_intensity_{channel}"].to_numpy(), ids)
        dynamics = reporter_dynamics(values, settings.frame_interval_min, settings.min_track_frames)
        for name, column in (
            ("mean", "track_mean"),
            ("cv", "track_cv"),
            ("period_min", "period_min"),
            ("peaks_per_h", "peaks_per_h"),
            ("max_rate_per_min", "max_rate_per_min"),
        ):
            tracks[f"{column}_{channel}"] = np.where(long_enough, dynamics[name], np.nan)
    return tracks


def analyse_well(
    index: ImageIndex,
    well: str,
    settings: WellSettings,
    flat_field: np.ndarray | None = None,
    pixel_type: str | None = None,
    label_frames: dict[int, dict[int, np.ndarray]] | None = None,
) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """Cells, tracks and site QC of one well over all its sites.

    Track ids are unique within the well (site-local ids are offset site by site). ``label_frames``,
    if given, receives site -> frame -> nucleus labels (``analyse_site``).
    """
    sites = sorted(index.table.loc[index.table["well"] == well, "site"].unique())
    if not sites:
        raise InputError(
            f"well {well}",
            "the layout lists this well but no image of it was found.",
            "check images.filename_template and the plate's image_folder, or mark the well empty.",
        )
    cell_parts, qc_parts, offset = [], [], 0
    for site in sites:
        frames = label_frames.setdefault(int(site), {}) if label_frames is not None else None
        cells, qc = analyse_site(index, well, int(site), settings, flat_field, pixel_type, frames)
        cells["track"] += offset
        cells.loc[cells["parent_track"] >= 0, "parent_track"] += offset
        offset = int(cells["track"].max()) + 1 if len(cells) else offset
        cell_parts.append(cells)
        qc_parts.append(qc)
    cells = pd.concat(cell_parts, ignore_index=True)
    cells.insert(2, "time_min", cells["frame"] * settings.frame_interval_min)
    tracks = track_table(cells, settings)
    first = cells.sort_values(["track", "frame"]).drop_duplicates("track").set_index("track")
    tracks.insert(0, "site", first.loc[tracks["track"], "site"].to_numpy())
    tracks["start_min"] = first.loc[tracks["track"], "time_min"].to_numpy(float)
    tracks["end_min"] = tracks["start_min"] + tracks["duration_min"]
    border = cells.groupby("track")["touches_border"].any()
    tracks["touches_border"] = border.loc[tracks["track"]].to_numpy()
    tracks["parent_track"] = cells.groupby("track")["parent_track"].first().loc[tracks["track"]].to_numpy()
    return cells, tracks, pd.concat(qc_parts, ignore_index=True)


def with_keys(frame: pd.DataFrame, plate: str, well: str) -> pd.DataFrame:
    frame = frame.copy()
    frame.insert(0, "plate", plate)
    frame.insert(1, "well", well)
    return frame
