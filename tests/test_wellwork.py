"""Segmentation, features and linking against analytic shapes, reference libraries and planted truth."""

import numpy as np
import pytest
from conftest import ROOT
from skimage.draw import disk, ellipse
from skimage.filters import threshold_otsu

from plateloom.demo.scenario import QUANTITIES, load_scenario
from plateloom.demo.simulate import simulate_site
from plateloom.well.features import measure_objects
from plateloom.well.segment import segment_nuclei
from plateloom.well.tracking import link_frames, track_features

PIXEL = 0.5  # um


def _image_with(masks, level=1000.0, background=100.0, noise=5.0, seed=0):
    image = np.full((200, 200), background, np.float32)
    for mask in masks:
        image[mask] += level
    return image + np.random.default_rng(seed).normal(0, noise, image.shape).astype(np.float32)


def test_disk_area_and_eccentricity_match_geometry():
    # A disk of radius r has area pi r^2 and eccentricity 0 (geometry).
    mask = np.zeros((200, 200), bool)
    mask[disk((100, 100), 30)] = True
    image = _image_with([mask])
    labels, _ = segment_nuclei(image, PIXEL, 0.5, 10.0, 5.0)
    table = measure_objects(labels, image[None], ["dna"], np.array([100.0]), PIXEL)
    assert len(table) == 1
    assert table["area_um2"].iloc[0] == pytest.approx(np.pi * (30 * PIXEL) ** 2, rel=0.02)
    assert table["eccentricity"].iloc[0] < 0.1
    assert table["mean_intensity_dna"].iloc[0] == pytest.approx(1000.0, rel=0.05)


def test_ellipse_eccentricity_matches_geometry():
    # An ellipse with semi-axes a >= b has eccentricity sqrt(1 - b^2/a^2) (geometry).
    mask = np.zeros((200, 200), bool)
    mask[ellipse(100, 100, 20, 40)] = True
    image = _image_with([mask])
    labels, _ = segment_nuclei(image, PIXEL, 0.5, 10.0, 5.0)
    table = measure_objects(labels, image[None], ["dna"], np.array([100.0]), PIXEL)
    assert table["eccentricity"].iloc[0] == pytest.approx(np.sqrt(1 - 20**2 / 40**2), abs=0.02)
    assert table["area_um2"].iloc[0] == pytest.approx(np.pi * 20 * 40 * PIXEL**2, rel=0.03)


def test_threshold_is_otsu_of_the_smoothed_image():
    # Otsu 1979; scikit-image's threshold_otsu is the reference implementation.
    from scipy import ndimage

    mask = np.zeros((200, 200), bool)
    mask[disk((60, 60), 20)] = True
    mask[disk((140, 130), 25)] = True
    image = _image_with([mask])
    _, threshold = segment_nuclei(image, PIXEL, 1.0, 10.0, 5.0)
    assert threshold == pytest.approx(threshold_otsu(ndimage.gaussian_filter(image, 1.0 / PIXEL)), rel=1e-6)


def test_touching_disks_are_split_and_a_blank_field_has_none():
    a, b = np.zeros((200, 200), bool), np.zeros((200, 200), bool)
    a[disk((100, 75), 25)] = True
    b[disk((100, 124), 25)] = True
    labels, _ = segment_nuclei(_image_with([a | b]), PIXEL, 0.5, 10.0, 8.0)
    assert labels.max() == 2
    blank, threshold = segment_nuclei(_image_with([]), PIXEL, 0.5, 10.0, 8.0)
    assert blank.max() == 0 and np.isnan(threshold)


def test_demo_nuclei_counted_as_planted():
    # Planted truth: the simulated site knows how many nuclei it drew.
    scenario = load_scenario(str(ROOT / "resources/demo/scenario.yaml"), frames=3)
    factor = {q: 1.0 for q in QUANTITIES}
    exact = 0
    for seed in range(10):
        rng = np.random.default_rng(seed)
        expected = int(np.random.default_rng(seed).poisson(scenario["cells_per_site"]))
        stack = simulate_site(scenario, factor, rng)
        labels, _ = segment_nuclei(stack[0, 0], scenario["pixel_size_um"], 1.0, 30.0, 7.0)
        exact += labels.max() == expected
    assert exact >= 9


def test_linking_recovers_a_permutation_and_starts_far_objects_anew():
    rng = np.random.default_rng(4)
    previous = rng.uniform(0, 500, (60, 2))
    order = rng.permutation(60)
    current = previous[order] + rng.normal(0, 0.5, (60, 2))
    current = np.vstack([current, [[2000.0, 2000.0]]])
    links = link_frames(previous, current, max_displacement_um=5.0)
    np.testing.assert_array_equal(links[:60], order)
    assert links[60] == -1


def test_track_features_of_a_straight_constant_speed_walk():
    frames = np.arange(6)
    x = 2.0 * frames  # 2 um per frame, frame interval 5 min -> 0.4 um/min
    features = track_features(frames, np.zeros(6, int), x.astype(float), np.zeros(6), 5.0, 3)
    assert features["speed_um_per_min"][0] == pytest.approx(0.4)
    assert features["straightness"][0] == pytest.approx(1.0)
    assert features["net_displacement_um"][0] == pytest.approx(10.0)
    short = track_features(frames[:2], np.zeros(2, int), x[:2], np.zeros(2), 5.0, 3)
    assert np.isnan(short["speed_um_per_min"][0])


def test_stacks_and_one_file_per_frame_give_the_same_tables(tmp_path):
    # The two image layouts of the filename template must be read identically.
    import tifffile

    from plateloom.io.images import index_plate_images
    from plateloom.well.stage import WellSettings, analyse_well

    scenario = load_scenario(str(ROOT / "resources/demo/scenario.yaml"), frames=4)
    stack = simulate_site(scenario, {q: 1.0 for q in QUANTITIES}, np.random.default_rng(5))
    stacks, frames = tmp_path / "stacks", tmp_path / "frames"
    stacks.mkdir()
    frames.mkdir()
    for channel, name in enumerate(("nuc", "rep")):
        tifffile.imwrite(stacks / f"C03_s1_{name}.tif", stack[:, channel], photometric="minisblack")
        for frame in range(4):
            tifffile.imwrite(frames / f"C03_s1_t{frame:03d}_{name}.tif", stack[frame, channel])
    settings = WellSettings.of_demo(
        channels=("nuc", "rep"),
        nuclei_channel="nuc",
        pixel_size_um=scenario["pixel_size_um"],
        reporter_channels=(),
        max_gap_frames=0,
    )
    from_stacks = analyse_well(
        index_plate_images(str(stacks), "{well}_s{site}_{channel}.tif", 96, ["nuc", "rep"]), "C03", settings
    )
    from_frames = analyse_well(
        index_plate_images(str(frames), "{well}_s{site}_t{frame}_{channel}.tif", 96, ["nuc", "rep"]), "C03", settings
    )
    for a, b in zip(from_stacks, from_frames):
        assert len(a) > 0
        assert a.equals(b)


def _dense_reference_links(previous, current, max_displacement):
    # Reference: the same augmented LAP solved densely by scipy.optimize.linear_sum_assignment.
    from scipy.optimize import linear_sum_assignment

    n, m = len(previous), len(current)
    d2 = ((previous[:, None, :] - current[None, :, :]) ** 2).sum(-1)
    big = 1e12
    cost = np.full((n + m, m + n), big)
    allowed = d2 <= max_displacement**2
    cost[:n, :m] = np.where(allowed, d2, big)
    cost[n:, m:] = np.where(allowed.T, d2.T, big)
    cost[np.arange(n), m + np.arange(n)] = max_displacement**2
    cost[n + np.arange(m), np.arange(m)] = max_displacement**2
    rows, cols = linear_sum_assignment(cost)
    links = np.full(m, -1)
    keep = (rows < n) & (cols < m)
    links[cols[keep]] = rows[keep]
    return links, cost[rows, cols].sum()


def test_sparse_linking_equals_the_dense_assignment():
    rng = np.random.default_rng(7)
    for _ in range(20):
        previous = rng.uniform(0, 60, (40, 2))
        current = np.vstack([previous[5:] + rng.normal(0, 1.5, (35, 2)), rng.uniform(0, 60, (4, 2))])
        links = link_frames(previous, current, 4.0)
        reference, _ = _dense_reference_links(previous, current, 4.0)
        np.testing.assert_array_equal(links, reference)


def _frame_to_frame_tracks(frame, x, y, max_displacement):
    """Track ids from linking consecutive frames only (what the per-frame stage produces)."""
    track = np.full(len(frame), -1)
    next_id = 0
    previous_rows = np.array([], int)
    for t in np.unique(frame):
        rows = np.nonzero(frame == t)[0]
        links = link_frames(
            np.column_stack([x[previous_rows], y[previous_rows]]), np.column_stack([x[rows], y[rows]]), max_displacement
        )
        for row, link in zip(rows, links):
            if link >= 0:
                track[row] = track[previous_rows[link]]
            else:
                track[row], next_id = next_id, next_id + 1
        previous_rows = rows
    return track


def test_gap_closing_rejoins_tracks_across_missed_frames():
    # Planted truth: 25 well-separated random walkers over 20 frames; each loses 1 or 2 consecutive frames.
    from plateloom.well.tracking import close_gaps

    rng = np.random.default_rng(3)
    grid = np.array([(i, j) for i in range(5) for j in range(5)], float) * 40 + 20
    rows = []
    for cell, (x0, y0) in enumerate(grid):
        x, y = x0 + np.cumsum(rng.normal(0, 1.0, 20)), y0 + np.cumsum(rng.normal(0, 1.0, 20))
        gap_start, gap_length = rng.integers(4, 15), rng.integers(1, 3)
        for t in range(20):
            if not gap_start <= t < gap_start + gap_length:
                rows.append((t, cell, x[t], y[t]))
    frame, truth, x, y = (np.array(c) for c in zip(*rows))
    linked = _frame_to_frame_tracks(frame, x, y, 6.0)
    assert len(np.unique(linked)) == 50  # every walker split in two by its gap
    closed = close_gaps(frame, linked, x, y, max_gap_frames=2, max_displacement_um=6.0)
    recovered = sum(len(np.unique(closed[truth == cell])) == 1 for cell in range(25))
    assert recovered == 25
    assert len(np.unique(closed)) == 25


def test_divisions_are_found_with_recall_of_at_least_0_8():
    # Planted truth: 20 mothers tracked for 8 frames, then each divides into two daughters 3 um either side.
    from plateloom.well.divisions import find_divisions

    rng = np.random.default_rng(4)
    rows = []
    for cell in range(20):
        x0, y0 = (cell % 5) * 40.0 + 20, (cell // 5) * 40.0 + 20
        x, y = x0 + np.cumsum(rng.normal(0, 0.5, 16)), y0 + np.cumsum(rng.normal(0, 0.5, 16))
        angle = rng.uniform(0, np.pi)
        offset = 3.0 * np.array([np.cos(angle), np.sin(angle)])
        for t in range(16):
            if t < 8:
                rows.append((t, x[t], y[t], f"m{cell}"))
            else:
                rows.append((t, x[t] + offset[0], y[t] + offset[1], f"a{cell}"))
                rows.append((t, x[t] - offset[0], y[t] - offset[1], f"b{cell}"))
    frame, x, y, truth = (np.array(c) for c in zip(*rows))
    frame, x, y = frame.astype(int), x.astype(float), y.astype(float)
    linked = _frame_to_frame_tracks(frame, x, y, 6.0)
    relabelled, parents = find_divisions(frame, linked, x, y, max_distance_um=8.0)
    found = 0
    for cell in range(20):
        mother = set(relabelled[truth == f"m{cell}"])
        daughters = [set(relabelled[truth == f"{d}{cell}"]) for d in "ab"]
        if len(mother) == 1 and all(len(d) == 1 for d in daughters):
            children = parents[parents["parent_track"] == mother.pop()]["track"]
            found += set(children) == {daughters[0].pop(), daughters[1].pop()}
    assert found / 20 >= 0.8, found
    assert len(parents) <= 2 * 20 + 4  # few spurious divisions


def test_neighbourhood_matches_brute_force_distances():
    # Reference: scipy.spatial.distance.cdist over all pairs.
    from scipy.spatial.distance import cdist

    from plateloom.well.features import neighbourhood

    xy = np.random.default_rng(8).uniform(0, 200, (300, 2))
    counts, nearest = neighbourhood(xy, 25.0)
    d = cdist(xy, xy)
    np.fill_diagonal(d, np.inf)
    np.testing.assert_array_equal(counts, (d <= 25.0).sum(axis=1))
    np.testing.assert_allclose(nearest, d.min(axis=1))
    alone_counts, alone_nearest = neighbourhood(xy[:1], 25.0)
    assert alone_counts[0] == 0 and np.isnan(alone_nearest[0])


def test_axis_lengths_and_isoperimetric_quotient_match_geometry():
    # An ellipse with semi-axes a, b has axes 2a and 2b; a disk has isoperimetric quotient 4 pi A / P^2 = 1 (geometry;
    # the pixel perimeter estimate makes it slightly lower).
    mask = np.zeros((200, 200), bool)
    mask[ellipse(100, 100, 20, 40)] = True
    disk_mask = np.zeros((200, 200), bool)
    disk_mask[disk((100, 100), 30)] = True
    for m, checks in ((mask, "ellipse"), (disk_mask, "disk")):
        image = _image_with([m])
        labels, _ = segment_nuclei(image, PIXEL, 0.5, 10.0, 5.0)
        row = measure_objects(labels, image[None], ["dna"], np.array([100.0]), PIXEL).iloc[0]
        if checks == "ellipse":
            assert row["major_axis_um"] == pytest.approx(2 * 40 * PIXEL, rel=0.03)
            assert row["minor_axis_um"] == pytest.approx(2 * 20 * PIXEL, rel=0.05)
        else:
            assert 0.9 < row["isoperimetric_quotient"] <= 1.05
            assert row["std_intensity_dna"] < 0.1 * row["mean_intensity_dna"]


def test_a_track_back_after_a_gap_is_not_taken_for_a_new_daughter():
    # Planted: track 0 runs frames 0-5; track 1 is seen at frames 0-1, missed at 2, back at 3-5
    # (joined by gap closing), next to track 0. It is not a track that starts at frame 3, so no
    # division; and no track is listed as a daughter twice.
    from plateloom.well.divisions import find_divisions

    frame = np.array([0, 1, 2, 3, 4, 5, 0, 1, 3, 4, 5])
    track = np.array([0, 0, 0, 0, 0, 0, 1, 1, 1, 1, 1])
    x = np.array([0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 4.0, 4.1, 4.2, 4.3, 4.4])
    y = np.zeros(len(frame))
    relabelled, parents = find_divisions(frame, track, x, y, max_distance_um=8.0)
    assert parents.empty and np.array_equal(relabelled, track)
