"""Full per-well work per 1024x1024 frame with ~250 nuclei, as a ratio to a floor in the same run.

A simulated site (nuclear stain and a cytoplasm stain for cell bodies) is written as two
multi-page TIFF stacks. The floor per frame is what any analysis pays: read the nuclear plane,
Gaussian smoothing, Otsu threshold and connected-component labelling with scikit-image/scipy.
The full work is plateloom's per-site analysis (``analyse_well``): read both channels,
flat-field division, nuclear segmentation with splitting of touching nuclei, cell bodies grown
on the second channel, every per-object measure (shape, intensity in nucleus and cytoplasm,
texture, neighbours), site QC, linking and gap closing, and the track table (motility,
persistent-walk fit, reporter dynamics). The full work is timed without cell bodies (the
default configuration: a nuclear and a reporter channel) and with them. Prints a breakdown by
step and, last, the ratio of the default path to the floor (goal <= 3) and that with cell bodies.

    python benchmarks/per_frame.py [frames]
"""

from __future__ import annotations

import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import tifffile
from scipy import ndimage
from skimage.filters import threshold_otsu

from plateloom.demo.scenario import QUANTITIES, load_scenario
from plateloom.demo.simulate import simulate_site
from plateloom.io.images import index_plate_images
from plateloom.well.cell_bodies import grow_cell_bodies
from plateloom.well.features import convex_areas, perimeters
from plateloom.well.image_qc import background_levels
from plateloom.well.nuclei import segment_nuclei_on_edges
from plateloom.well.object_pixels import ObjectPixels
from plateloom.well.segment import segment_smoothed
from plateloom.well.stage import WellSettings, analyse_well, measure_frame
from plateloom.well.texture import glcm_measures
from plateloom.well.thresholds import smooth_image

ROOT = Path(__file__).resolve().parents[1]


def make_site(folder: Path, frames: int) -> WellSettings:
    scenario = load_scenario(str(ROOT / "resources/demo/scenario.yaml"), frames=frames, image_size_px=1024)
    scenario["cells_per_site"] = 250
    stack, truth = simulate_site(scenario, {q: 1.0 for q in QUANTITIES}, np.random.default_rng(2026), with_truth=True)
    # cytoplasm stain: each nucleus' region grown by 8 px, blurred, on the same background and noise
    rng = np.random.default_rng(7)
    body = np.empty_like(stack[:, 0])
    for frame in range(frames):
        distance = ndimage.distance_transform_edt(truth.labels[frame] == 0)
        cytoplasm = ndimage.gaussian_filter((distance < 8).astype(np.float32) * 500, 1.5)
        body[frame] = np.clip(150 + cytoplasm + rng.normal(0, 15, cytoplasm.shape), 0, 65535).astype(np.uint16)
    tifffile.imwrite(folder / "B02_s1_nuclear.tif", stack[:, 0], photometric="minisblack")
    tifffile.imwrite(folder / "B02_s1_body.tif", body, photometric="minisblack")
    return WellSettings.of_demo(
        channels=("nuclear", "body"),
        pixel_size_um=scenario["pixel_size_um"],
        frame_interval_min=scenario["frame_interval_min"],
        cell_body_channel="body",
        reporter_channels=("nuclear",),
    )


def floor_seconds(folder: Path, frames: int, sigma_px: float) -> float:
    start = time.perf_counter()
    with tifffile.TiffFile(folder / "B02_s1_nuclear.tif") as tif:
        for frame in range(frames):
            image = tif.pages[frame].asarray().astype(np.float32)
            smooth = ndimage.gaussian_filter(image, sigma_px)
            ndimage.label(smooth > threshold_otsu(smooth))
    return time.perf_counter() - start


def breakdown(folder: Path, settings: WellSettings) -> dict[str, float]:
    """Seconds per frame of the main steps, on the first frame (repeated 3 times, best)."""
    planes = np.stack([tifffile.imread(folder / f"B02_s1_{c}.tif", key=0) for c in settings.channels]).astype(
        np.float32
    )
    sigma = settings.smoothing_sigma_um / settings.pixel_size_um
    steps = {}

    def best(name, call):
        times = []
        for _ in range(3):
            start = time.perf_counter()
            result = call()
            times.append(time.perf_counter() - start)
        steps[name] = min(times)
        return result

    smooth = best("smoothing", lambda: smooth_image(planes[0], sigma))
    best("nuclei, half-maximum path", lambda: segment_smoothed(smooth, settings.pixel_size_um, 30.0, 7.0))
    labels, _ = best(
        "nuclei, edges path (default)",
        lambda: segment_nuclei_on_edges(smooth, settings.pixel_size_um, 30.0, 7.0, settings.nucleus_diameter_um),
    )
    bodies = best("cell bodies", lambda: grow_cell_bodies(labels, planes[1], settings.pixel_size_um, 2.0))
    best("background", lambda: background_levels(planes, bodies))
    pixels = ObjectPixels.of(labels)
    _, border = best("perimeter", lambda: perimeters(labels, pixels))
    best("convex hulls (solidity)", lambda: convex_areas(pixels, border))
    best("texture", lambda: glcm_measures(planes[0], labels, pixels, 2))
    best("all measures", lambda: measure_frame(planes, labels, bodies, settings))
    steps["objects"] = float(labels.max())
    return steps


def main() -> None:
    frames = int(sys.argv[1]) if len(sys.argv) > 1 else 6
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        settings = make_site(folder, frames)
        index = index_plate_images(str(folder), "{well}_s{site}_{channel}.tif", 96, list(settings.channels))
        floor = min(
            floor_seconds(folder, frames, settings.smoothing_sigma_um / settings.pixel_size_um) for _ in range(2)
        )
        full = {}
        for variant, variant_settings in (
            ("nuclei only", replace(settings, cell_body_channel=None)),
            ("with cell bodies", settings),
        ):
            times = []
            for _ in range(2):
                start = time.perf_counter()
                cells, tracks, _ = analyse_well(index, "B02", variant_settings)
                times.append(time.perf_counter() - start)
            full[variant] = min(times)
        steps = breakdown(folder, settings)
    print(f"frames: {frames} of 1024x1024, nuclei per frame: {len(cells) / frames:.0f}, tracks: {len(tracks)}")
    for name, seconds in steps.items():
        if name != "objects":
            print(f"  {name:42s} {1000 * seconds:8.1f} ms per frame")
    print(f"floor (read + Gaussian + Otsu + label): {1000 * floor / frames:.1f} ms per frame")
    for variant, seconds in full.items():
        print(
            f"full per-well work, {variant + ':':18s} {1000 * seconds / frames:.1f} ms per frame "
            f"= {seconds / floor:.2f} x floor"
        )
    print(
        f"full (default path, nuclei only) / floor per frame: {full['nuclei only'] / floor:.2f} (goal <= 3); "
        f"with cell bodies: {full['with cell bodies'] / floor:.2f}"
    )


if __name__ == "__main__":
    main()
