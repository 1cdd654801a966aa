"""The screen plan, known at parse time: plates, layouts, chunks of wells, demo plates, features."""

from __future__ import annotations

import os
from dataclasses import dataclass, field

import pandas as pd

from plateloom.assets import demo_scenario
from plateloom.demo.scenario import demo_plates, load_scenario
from plateloom.errors import InputError
from plateloom.io.images import (
    image_scale,
    index_zarr_plate,
    is_zarr_plate,
    template_regex,
)
from plateloom.setup.screen_sheet import (
    PlateEntry,
    analysed_wells,
    chunk_wells,
    load_layout,
    load_screen_sheet,
    mixed_dose_units,
    treatment_times,
)
from plateloom.setup.sizing import ImagingSize, JobSize, analyse_wells_size, screen_size

DEMO_IMAGE_ROOT = "demo_images"


@dataclass
class ScreenPlan:
    """What the workflow will do; built once from config, screen sheet and layouts."""

    plates: dict[str, PlateEntry]
    layouts: dict[str, pd.DataFrame]
    chunks: dict[str, list[list[str]]]
    demo_plates: set[str] = field(default_factory=set)
    features: list[str] = field(default_factory=list)
    log_features: list[str] = field(default_factory=list)
    imaging: dict[str, ImagingSize] = field(default_factory=dict)
    kinetic_features: list[str] | None = None  # None: the screen features measured per cell and frame
    sizing: dict = field(default_factory=dict)

    def chunk_ids(self, plate: str) -> list[str]:
        """Zero-padded chunk ids of one plate ('000', '001', ...)."""
        return [f"{i:03d}" for i in range(len(self.chunks[plate]))]

    def well_job_size(self, plate: str, chunk: str) -> JobSize:
        """mem_mb and runtime of the per-well job of one chunk, from the expected image sizes."""
        return analyse_wells_size(
            self.imaging[plate],
            len(self.chunks[plate][int(chunk)]),
            float(self.sizing["seconds_per_megapixel_frame"]),
            float(self.sizing["safety_factor"]),
        )

    def illumination_job_size(self, plate: str, n_planes: int) -> JobSize:
        """mem_mb of the flat-field job: the sampled planes of one channel held at once (float32)."""
        size = self.imaging[plate]
        planes_mb = n_planes * size.side_px**2 * 4 * 3 / 1e6  # planes, their scaled copy, the median's work
        return JobSize(int(-(-(float(self.sizing["safety_factor"]) * (700 + planes_mb)) // 100) * 100), 30)

    def screen_job_size(self) -> JobSize:
        """mem_mb and runtime of a screen-level job, from the number of wells and features."""
        n_wells = sum(len(wells) for chunks in self.chunks.values() for wells in chunks)
        return screen_size(n_wells, len(self.features), float(self.sizing["safety_factor"]))


def channel_names(config: dict) -> dict[str, str]:
    """Role -> channel name; "nuclei" is the channel objects are segmented on (role nuclei, or
    label_free for phase-contrast or bright-field images); reporter falls back to it."""
    roles = {}
    for channel in config["channels"]:
        roles.setdefault(channel["role"], channel["name"])
    segmented = [c["name"] for c in config["channels"] if c["role"] in ("nuclei", "label_free")]
    if not segmented:
        raise InputError(
            "config channels",
            "no channel has role nuclei (or label_free).",
            "give the nuclear stain role: nuclei (or an unlabelled phase-contrast channel role: label_free).",
        )
    if len(segmented) > 1:
        raise InputError(
            "config channels",
            f"more than one channel has role nuclei or label_free: {segmented}.",
            "keep one channel to segment.",
        )
    if sum(c["role"] == "cell_body" for c in config["channels"]) > 1:
        raise InputError("config channels", "more than one channel has role cell_body.", "keep one cell_body channel.")
    names = [c["name"] for c in config["channels"]]
    if len(set(names)) != len(names):
        raise InputError("config channels", f"channel names repeat: {names}.", "give every channel its own name.")
    roles["nuclei"] = segmented[0]
    roles.setdefault("reporter", roles["nuclei"])
    return roles


def resolve_features(names: list[str], config: dict) -> list[str]:
    """Replace {nuclei} and {reporter} in feature names by the channel names, each feature once
    (without a reporter channel {reporter} falls back to the nuclear channel, and a feature named
    both ways must not be modelled, and counted in the FDR family, twice)."""
    roles = channel_names(config)
    return list(dict.fromkeys(name.format(nuclei=roles["nuclei"], reporter=roles["reporter"]) for name in names))


def plan_screen(config: dict) -> ScreenPlan:
    """Read and check the screen sheet and every layout; decide the chunks of wells.

    Raises InputError naming file, row and column for every problem found.
    """
    channel_names(config)
    entries = load_screen_sheet(config["screen_sheet"])
    demo = config["demo"]
    scenario_path = demo.get("scenario") or str(demo_scenario())
    scenario = (
        load_scenario(scenario_path, demo.get("frames"), demo.get("image_size_px"), demo.get("size", "quick"))
        if scenario_path and os.path.isfile(scenario_path)
        else None
    )
    scenario_plates = demo_plates(scenario) if scenario else {}
    plan = ScreenPlan({}, {}, {})
    plan.sizing = dict(config["job_sizing"])
    expected = ImagingSize(
        int(plan.sizing["image_side_px"]),
        int(plan.sizing["frames_per_site"]),
        int(plan.sizing["sites_per_well"]),
        len(config["channels"]),
    )
    layouts_by_path: dict[tuple[str, int], pd.DataFrame] = {}
    for entry in entries:
        key = (entry.layout, entry.plate_format)
        if key not in layouts_by_path:
            layouts_by_path[key] = load_layout(entry.layout, entry.plate_format)
        layout = layouts_by_path[key]
        is_demo = entry.plate in scenario_plates and os.path.normpath(entry.image_folder) == os.path.join(
            DEMO_IMAGE_ROOT, entry.plate
        )
        if not is_demo and not os.path.isdir(entry.image_folder):
            raise InputError(
                f"{config['screen_sheet']}, plate {entry.plate}, column image_folder",
                f"image folder {entry.image_folder!r} does not exist.",
                "check the path (relative to the folder you run snakemake from).",
            )
        wells = analysed_wells(layout)
        if not wells:
            raise InputError(entry.layout, "no well to analyse (all empty).", "give wells a role other than empty.")
        plan.plates[entry.plate] = entry
        plan.layouts[entry.plate] = layout
        plan.chunks[entry.plate] = chunk_wells(wells, int(config["chunk_wells"]))
        plan.imaging[entry.plate] = expected
        if is_demo:
            plan.demo_plates.add(entry.plate)
            plan.imaging[entry.plate] = ImagingSize(
                int(scenario["image_size_px"]),
                int(scenario["frames"]),
                int(scenario["sites_per_well"]),
                len(config["channels"]),
            )
    across = mixed_dose_units(pd.concat(layouts_by_path.values()), "the layouts of the screen sheet")
    if across:
        raise across[0]
    _plan_features(plan, config)
    treatment_times(entries, config["screen_sheet"])  # every plate or none (each entry holds its own)
    return plan


def _plan_features(plan: ScreenPlan, config: dict) -> None:
    """The screen's features, those on the log scale and those modelled over time (names resolved)."""
    plan.features = resolve_features(config["screen"]["features"], config)
    plan.log_features = resolve_features(config["screen"]["log_scale_features"], config)
    kinetic = config.get("kinetics", {}).get("features")
    plan.kinetic_features = resolve_features(kinetic, config) if kinetic is not None else None


def resolve_image_scale(config: dict, plan: ScreenPlan) -> dict[str, float]:
    """images.pixel_size_um and frame_interval_min: from config, or else from the OME metadata of the
    first image of the first plate whose folder exists (one TIFF header read at start-up)."""
    images = config["images"]
    first = None
    if images.get("pixel_size_um") is None or images.get("frame_interval_min") is None:
        regex = template_regex(images["filename_template"])
        for plate in sorted(plan.plates):
            folder = plan.plates[plate].image_folder
            if is_zarr_plate(folder):
                index = index_zarr_plate(
                    folder, plan.plates[plate].plate_format, [c["name"] for c in config["channels"]]
                )
                if len(index.table):
                    first = index.table["path"].iloc[0]
                    break
            elif os.path.isdir(folder):
                names = sorted(n for n in os.listdir(folder) if regex.match(n))
                if names:
                    first = os.path.join(folder, names[0])
                    break
    pixel, interval, _ = image_scale(images, first)
    return {"pixel_size_um": pixel, "frame_interval_min": interval}
