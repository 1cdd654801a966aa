"""Nuclear segmentation on realistic widefield fields (plateloom.demo.realistic, planted truth).

Average precision at IoU 0.5 as defined by Caicedo et al. 2019 (Nat. Methods 16:1247; see
tests/segmentation_accuracy.py). The fields have nuclear brightness over more than a 10x range,
chromatin spots, saturated rounded cells with glow, dim out-of-focus nuclei, touching unequal
pairs and a dense cluster, an uneven background and Poisson-Gaussian noise.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from conftest import nuclear_only_settings
from scipy import ndimage
from segmentation_accuracy import iou_matrix, pooled_average_precision
from skimage.measure import label as connected_regions

from plateloom.demo.realistic import simulate_field
from plateloom.io.planes import saturation_masks
from plateloom.well.nuclei import segment_nuclei_on_edges
from plateloom.well.segment import segment_smoothed
from plateloom.well.thresholds import smooth_image

PIXEL_UM = 0.65
SEEDS = range(200, 216)  # not the seeds the method was tuned on


@pytest.fixture(scope="module")
def fields():
    found = []
    for seed in SEEDS:
        image, truth, nuclei = simulate_field(seed)
        smooth = smooth_image(image, 1.0 / PIXEL_UM)
        saturated = saturation_masks(image[None])  # as the per-well analysis reads the camera's ceiling
        labels, _ = segment_nuclei_on_edges(
            smooth, PIXEL_UM, 20.0, 5.0, 12.0, saturated=None if saturated is None else saturated[0]
        )
        found.append((image, truth, nuclei, labels))
    return found


def test_average_precision_at_iou_05_is_at_least_092(fields):
    # measured 0.931 here and 0.943-0.948 on five sets of 64 other fields (0.930 and 0.934-0.943
    # with a 1 px seed depth in the split after growth; 0.916 and 0.918-0.930 before grown nuclei
    # were split by shape); most remaining errors are the middle nucleus of a dense cluster merged
    # into a neighbour
    ap = pooled_average_precision([(truth, labels) for _, truth, _, labels in fields])
    assert ap[0.5] >= 0.92, ap[0.5]  # the goal is 0.90; 0.92 keeps what the shape split after growth gained


def test_the_earlier_default_fails_these_fields():
    # Otsu's threshold with half-maximum trimming, the earlier default, on the same kind of field:
    # the saturated cells capture the threshold (the failure these fields were built to show).
    pairs = []
    for seed in SEEDS[:4]:
        image, truth, _ = simulate_field(seed)
        labels, _ = segment_smoothed(smooth_image(image, 1.0 / PIXEL_UM), PIXEL_UM, 20.0, 5.0, "otsu")
        pairs.append((truth, labels))
    assert pooled_average_precision(pairs)[0.5] < 0.5


def test_matched_nuclei_keep_their_area(fields):
    ratios = []
    for _, truth, _, labels in fields:
        true_index, found_index = np.nonzero(iou_matrix(truth, labels) > 0.5)
        true_area = np.bincount(truth.ravel())[1:]
        found_area = np.bincount(labels.ravel(), minlength=labels.max() + 1)[1:]
        ratios.extend(found_area[found_index] / true_area[true_index])
    assert abs(np.median(ratios) - 1.0) <= 0.05, np.median(ratios)


def test_every_label_is_one_connected_region(fields):
    for _, _, _, labels in fields:
        pieces = connected_regions(labels, background=0, connectivity=1)
        assert pieces.max() == len(np.unique(labels)) - 1


def test_nuclei_touching_a_saturated_cell_are_found(fields):
    touching = found = 0
    for _, truth, nuclei, labels in fields:
        iou = iou_matrix(truth, labels)
        saturated = np.flatnonzero(nuclei.kind == 1) + 1
        near = ndimage.binary_dilation(np.isin(truth, saturated), iterations=2)
        neighbours = np.setdiff1d(np.unique(truth[near]), np.concatenate([[0], saturated]))
        touching += len(neighbours)
        found += int((iou[neighbours - 1] > 0.5).any(axis=1).sum())
    assert touching >= 10, touching  # the fields do hold such neighbours
    # measured: 19 of 21 here; pooled over 320 other fields (5 sets of 64) 494 of 518 = 0.954 (492
    # with a 1 px seed depth in the split after growth, 486 before grown nuclei were split, 0.905
    # before cores near large saturated regions needed 0.7 of the ceiling); the goal is 0.95, which
    # these 21 cannot resolve (one miss is 0.952), so the pooled figure is the measurement
    assert found / touching >= 0.9, (found, touching)


def _disks(size: int, disks: list[tuple[int, int, float, float]]) -> tuple[np.ndarray, np.ndarray]:
    """Planted truth: a label image of ``disks`` (centre y, x, radius px, brightness) and the
    blurred image of them (PSF sigma 1.2 px) on a background of 200."""
    yy, xx = np.mgrid[:size, :size]
    truth = np.zeros((size, size), np.int32)
    brightness = np.zeros((size, size))
    for number, (y, x, radius, level) in enumerate(disks, start=1):
        inside = ((yy - y) ** 2 + (xx - x) ** 2 <= radius**2) & (truth == 0)
        truth[inside], brightness[inside] = number, level
    return truth, ndimage.gaussian_filter(brightness, 1.2) + 200.0


def _best_iou(truth: np.ndarray, labels: np.ndarray, number: int) -> float:
    inside = truth == number
    overlap = np.bincount(labels[inside], minlength=labels.max() + 1)
    overlap[0] = 0
    best = labels == overlap.argmax()
    return float((best & inside).sum() / (best | inside).sum())


def test_a_nucleus_cut_by_the_frame_edge_keeps_its_extent():
    # planted truth: disks centred on the left and top edges and on the bottom row, others inside
    centres = [(100, 0), (0, 100), (199, 150), (40, 40), (60, 150), (150, 60), (120, 120), (160, 170), (90, 60)]
    truth, image = _disks(200, [(y, x, 9.0, 800.0) for y, x in centres])
    rng = np.random.default_rng(4)
    noisy = (rng.poisson(image) + rng.normal(0, 6, image.shape)).astype(np.float32)
    labels, _ = segment_nuclei_on_edges(smooth_image(noisy, 1.0 / PIXEL_UM), PIXEL_UM, 20.0, 5.0, 12.0)
    for number in (1, 2, 3):  # measured IoU 0.986, 0.971, 0.971
        assert _best_iou(truth, labels, number) >= 0.9


def test_a_grown_nucleus_shaped_like_two_is_split_along_the_edge():
    from plateloom.well.nuclei import _split_grown, gradient_magnitude

    # planted truth: a bright and a dim disk overlapping (one label, as a merged core grows), and a
    # lone disk; the pair must come apart into two connected labels close to the disks
    truth, image = _disks(120, [(40, 40, 10.0, 2000.0), (40, 57, 8.0, 600.0), (90, 90, 9.0, 1000.0)])
    merged = np.where(truth == 3, 2, np.minimum(truth, 1)).astype(np.int32)
    split = _split_grown(merged, gradient_magnitude(np.log(image)), 8)
    assert len(np.unique(split)) - 1 == 3
    assert connected_regions(split, background=0, connectivity=1).max() == 3
    for number in (1, 2, 3):  # measured IoU 0.994, 0.990, 1.0
        assert _best_iou(truth, split, number) >= 0.9


@pytest.mark.parametrize("spacing_px", [19, 21])
def test_a_dense_field_is_not_taken_for_an_empty_one(spacing_px):
    # planted truth: disks of radius 8-9 px and brightness 600-1500 packed hexagonally, covering
    # 69% (spacing 19) and 58% (21) of the field; the linear Otsu split runs through the nuclei there,
    # and the field used to be declared empty (no nuclei at all). Measured AP 1.0 at both.
    rng = np.random.default_rng(5)
    disks = [
        (y, x, 8.5 + rng.uniform(-0.5, 0.5), rng.uniform(600, 1500))
        for row, y in enumerate(np.arange(9, 200, spacing_px * 0.88))
        for x in np.arange(9 + (row % 2) * spacing_px / 2, 200, spacing_px)
    ]
    truth, image = _disks(200, disks)
    noisy = (rng.poisson(image) + rng.normal(0, 6, image.shape)).astype(np.float32)
    labels, threshold = segment_nuclei_on_edges(smooth_image(noisy, 1.0 / PIXEL_UM), PIXEL_UM, 20.0, 5.0, 12.0)
    assert np.isfinite(threshold)
    assert pooled_average_precision([(truth, labels)])[0.5] >= 0.9


def test_nuclei_packed_edge_to_edge_are_split_at_their_blobs():
    # planted truth: dome-shaped nuclei (brightness falling to 40% at the rim, as a sphere's
    # projected thickness over a dim rim), radius 8-9 px, brightness 600-1500, packed hexagonally
    # 17 px apart: 84% of the field, neighbours touching, their cores joined into sheets with no
    # waist. Measured AP 0.714 (0.20 before the blob split), 126 of 150 nuclei found.
    rng = np.random.default_rng(5)
    yy, xx = np.mgrid[:200, :200]
    truth, brightness = np.zeros((200, 200), np.int32), np.zeros((200, 200))
    centres = [
        (y, x) for row, y in enumerate(np.arange(9, 200, 17 * 0.88)) for x in np.arange(9 + (row % 2) * 8.5, 200, 17)
    ]
    for number, (y, x) in enumerate(centres, start=1):
        radius, level = 8.5 + rng.uniform(-0.5, 0.5), rng.uniform(600, 1500)
        squared = ((yy - y) ** 2 + (xx - x) ** 2) / radius**2
        inside = (squared <= 1) & (truth == 0)
        truth[inside], brightness[inside] = number, level * (0.4 + 0.6 * np.sqrt(1 - squared[inside]))
    image = ndimage.gaussian_filter(brightness, 1.2) + 200.0
    noisy = (rng.poisson(image) + rng.normal(0, 6, image.shape)).astype(np.float32)
    labels, _ = segment_nuclei_on_edges(smooth_image(noisy, 1.0 / PIXEL_UM), PIXEL_UM, 20.0, 5.0, 12.0)
    assert (truth > 0).mean() > 0.8
    assert pooled_average_precision([(truth, labels)])[0.5] >= 0.65
    assert connected_regions(labels, background=0, connectivity=1).max() == labels.max()


@pytest.mark.parametrize("shape", ["ramp", "vignette"])
def test_an_empty_unevenly_lit_field_gives_no_nuclei(shape):
    # planted truth: no nuclei, a background rising by 3000 grey levels across the field (or towards
    # its centre), Poisson-Gaussian noise
    rng = np.random.default_rng(6)
    yy, xx = np.mgrid[:256, :256] / 256
    light = xx if shape == "ramp" else np.exp(-((yy - 0.5) ** 2 + (xx - 0.5) ** 2) / 0.08)
    image = (rng.poisson(200 + 3000 * light) + rng.normal(0, 6, light.shape)).astype(np.float32)
    labels, _ = segment_nuclei_on_edges(smooth_image(image, 1.5), PIXEL_UM, 20.0, 5.0, 12.0)
    assert labels.max() == 0


def test_an_empty_field_gives_no_nuclei():
    rng = np.random.default_rng(3)
    noise = rng.poisson(300, (256, 256)).astype(np.float32)
    labels, threshold = segment_nuclei_on_edges(smooth_image(noise, 1.5), PIXEL_UM, 20.0, 5.0, 12.0)
    assert labels.max() == 0 and np.isnan(threshold)


def _site_with_flashes(folder, frames: int = 6):
    """Planted truth: one field imaged ``frames`` times; every other frame also holds a large
    saturated blob (a flash, or a bright rounded cell drifting in and out of view)."""
    import tifffile

    image, _, _ = simulate_field(11)
    stack = np.repeat(image[None], frames, axis=0)
    stack[1::2, 10:60, 10:60] = 4095
    tifffile.imwrite(folder / "B02_s1_nuclear.tif", stack, photometric="minisblack")


@pytest.mark.parametrize("method, threshold, flagged", [("half_maximum", "otsu", True), ("edges", "log_otsu", False)])
def test_a_threshold_that_flips_between_frames_is_flagged_in_site_qc(tmp_path, method, threshold, flagged):
    from plateloom.io.images import index_plate_images
    from plateloom.plate.stage import segmentation_jump_notes
    from plateloom.well.stage import analyse_well

    _site_with_flashes(tmp_path)
    index = index_plate_images(str(tmp_path), "{well}_s{site}_{channel}.tif", 96, ["nuclear"])
    settings = nuclear_only_settings(PIXEL_UM, segmentation_method=method, threshold_method=threshold)
    _, _, qc = analyse_well(index, "B02", settings)
    jumps = qc[qc["threshold_jump"] | qc["count_jump"]]
    if flagged:
        # Otsu's split moves to the blob: the threshold jumps and most nuclei vanish on those frames
        assert sorted(jumps["frame"]) == [1, 2, 3, 4, 5]  # every frame jumps from the one before
        notes = segmentation_jump_notes(qc.assign(well="B02"))
        assert len(notes) == 1 and "well B02 site 1: frames 1, 2, 3, 4, 5" in notes[0]
    else:
        assert jumps.empty  # the log-intensity threshold holds, and so does the count


def test_saturated_nuclei_are_kept_and_flagged(fields):
    from plateloom.io.planes import saturation_masks
    from plateloom.well.features import measure_objects

    kept = flagged = 0
    for image, truth, nuclei, labels in fields:
        raw = image[None].astype(np.float32)
        table = measure_objects(labels, raw, ["nuclear"], np.array([300.0]), PIXEL_UM, saturated=saturation_masks(raw))
        iou = iou_matrix(truth, labels)
        for true_label in np.flatnonzero(nuclei.kind == 1) + 1:
            match = np.flatnonzero(iou[true_label - 1] > 0.5)
            kept += len(match) == 1
            flagged += len(match) == 1 and table.loc[match[0], "saturated_fraction_nuclear"] > 0.1
    assert kept >= 10 and flagged == kept  # every saturated cell found is found whole and flagged


def test_saturation_is_read_from_the_raw_ceiling():
    from plateloom.io.planes import saturation_masks

    plane = np.full((1, 32, 32), 500.0, np.float32)
    assert saturation_masks(plane) is None
    plane[0, :2, :3] = 4095.0  # a 12-bit camera's ceiling in a 16-bit file
    masks = saturation_masks(plane)
    assert masks is not None and masks.sum() == 6
    plane[0, :2, :3] = 3000.0  # bright, but not at any ceiling
    assert saturation_masks(plane) is None


def test_a_steady_fall_in_count_is_biology_and_a_dip_is_not():
    from plateloom.well.image_qc import segmentation_jumps

    # planted counts: a wave of deaths (28 falling to 0) and, on another site, one frame that loses
    # most nuclei and recovers; the threshold holds on both
    falling = [28, 28, 27, 25, 22, 16, 10, 6, 3, 2, 0, 0]
    dipping = [30, 31, 30, 12, 31, 32, 31, 30, 31, 30, 31, 30]
    qc = pd.DataFrame(
        {
            "site": [1] * 12 + [2] * 12,
            "frame": list(range(12)) * 2,
            "n_objects": falling + dipping,
            "threshold": 200.0,
        }
    )
    flagged = segmentation_jumps(qc)
    assert not flagged.loc[flagged["site"] == 1, "count_jump"].any()
    assert flagged.loc[flagged["count_jump"], "frame"].tolist() == [3]
    assert not flagged["threshold_jump"].any()
