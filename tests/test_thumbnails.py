"""Thumbnails of segmentation and tracks: what the plate report shows of the images.

Planted truth: a realistic field (plateloom.demo.realistic) and hand-made tracks; the PNG is read
back with matplotlib's reader and, in the report, rendered by headless Chromium.
"""

from __future__ import annotations

import base64
import io
import os
import subprocess

import numpy as np
import pandas as pd
import pytest
from matplotlib import image as mpl_image

from plateloom.demo.realistic import simulate_field
from plateloom.report.thumbnails import choose_thumbnail_wells, thumbnails_html
from plateloom.well.nuclei import segment_nuclei_on_edges
from plateloom.well.snapshot import OUTLINE_RGB, TAIL_RGB, overlay_rgb, png_bytes, snapshot_frame, track_tails
from plateloom.well.thresholds import smooth_image

PIXEL_UM = 0.65


@pytest.fixture(scope="module")
def field():
    image, _, _ = simulate_field(201)
    labels, _ = segment_nuclei_on_edges(smooth_image(image, 1 / PIXEL_UM), PIXEL_UM, 20.0, 5.0, 12.0)
    return image, labels


def _is(rgb: np.ndarray, colour: np.ndarray) -> np.ndarray:
    return np.all(rgb == colour, axis=-1)


def test_every_nucleus_gets_an_outline_and_tracks_a_tail(field):
    image, labels = field[0][:256, :256], field[1][:256, :256]
    labels = np.unique(labels, return_inverse=True)[1].reshape(labels.shape)  # labels 1..n again
    tail = np.array([[40.0, 40.0], [60.0, 80.0], [100.0, 120.0]])  # (y, x) px
    rgb = overlay_rgb(image, labels, [tail])
    assert rgb.dtype == np.uint8 and rgb.shape == (*image.shape, 3)  # 256 px: no shrinking
    outlined = labels[_is(rgb, OUTLINE_RGB)]
    assert set(np.unique(outlined[outlined > 0])) == set(range(1, labels.max() + 1))
    yellow = np.argwhere(_is(rgb, TAIL_RGB))
    assert len(yellow) >= 80 and yellow.min(axis=0).tolist() == [40, 40] and yellow.max(axis=0).tolist() == [100, 120]


def test_a_large_frame_is_shrunk_and_the_png_reads_back_the_same(field):
    image, labels = field
    big_image, big_labels = np.tile(image, (3, 3)), np.tile(labels, (3, 3))
    rgb = overlay_rgb(big_image, big_labels, [])
    assert max(rgb.shape[:2]) <= 256 and _is(rgb, OUTLINE_RGB).sum() > 1000
    data = png_bytes(rgb)
    assert data == png_bytes(rgb)  # deterministic bytes
    back = (mpl_image.imread(io.BytesIO(data))[..., :3] * 255).round().astype(np.uint8)
    assert np.array_equal(back, rgb)


def test_the_flagged_frame_is_shown_else_the_last_usable_one():
    qc = pd.DataFrame(
        {
            "site": [1, 1, 1, 1, 2],
            "frame": [0, 1, 2, 3, 0],
            "threshold_jump": [False, False, True, False, False],
            "count_jump": [False, False, False, True, False],
            "frame_problem": ["", "", "", "", ""],
        }
    )
    assert snapshot_frame(qc, 1) == 2
    qc["threshold_jump"] = qc["count_jump"] = False
    qc.loc[3, "frame_problem"] = "truncated file"
    assert snapshot_frame(qc, 1) == 2 and snapshot_frame(qc, 3) is None


def test_tails_are_the_recent_positions_of_tracks_on_the_frame():
    cells = pd.DataFrame(
        {
            "site": 1,
            "frame": [0, 1, 2, 0, 1],
            "track": [7, 7, 7, 8, 8],  # track 8 ends before frame 2: no tail
            "centroid_y_um": [0.0, 6.5, 13.0, 50.0, 50.0],
            "centroid_x_um": [0.0, 0.0, 6.5, 50.0, 51.0],
        }
    )
    tails = track_tails(cells, 1, 2, PIXEL_UM)
    assert len(tails) == 1 and np.allclose(tails[0], [[0, 0], [10, 0], [20, 10]])


def _profile():
    wells = [f"B{c:02d}" for c in range(1, 13)] + [f"C{c:02d}" for c in range(1, 13)]
    roles = ["negative_control"] * 6 + ["positive_control"] * 4 + ["test"] * 14
    return pd.DataFrame({"well": wells, "role": roles, "condition": ["vehicle"] * 6 + ["pos"] * 4 + ["LOOM-7"] * 14})


def test_flagged_wells_are_always_shown_and_the_sample_is_fixed():
    profile = _profile()
    available = set(profile["well"]) - {"B02"}
    chosen = choose_thumbnail_wells(profile, {"C11": ["site 1: linking distance binds"]}, available)
    assert chosen[0] == "C11" and len(chosen) == len(set(chosen)) == 1 + 3 + 3 + 6
    assert "B02" not in chosen and chosen == choose_thumbnail_wells(profile, {"C11": ["x"]}, available)
    roles = profile.set_index("well").loc[chosen[1:], "role"].tolist()
    assert roles == ["negative_control"] * 3 + ["positive_control"] * 3 + ["test"] * 6


def test_thumbnails_load_in_headless_chromium(tmp_path, field):
    from skimage.io import imread
    from test_reports import _chromium

    if _chromium() is None:
        if os.environ.get("PLATELOOM_REQUIRE_CHROMIUM"):
            pytest.fail("chromium is required here (PLATELOOM_REQUIRE_CHROMIUM is set) but not installed")
        pytest.skip("Debian package chromium not installed (.ci/run installs it)")
    image, labels = field
    png = png_bytes(overlay_rgb(image, labels, []))
    profile = _profile()
    html = "<html><body style='margin:0'>" + thumbnails_html(profile, {"B01": png, "C12": png}, {"C12": ["<flag>"]})
    page = tmp_path / "thumbs.html"
    page.write_text(html + "</body></html>", encoding="utf-8")
    assert "&lt;flag&gt;" in html and base64.b64encode(png).decode() in html
    shot = tmp_path / "shot.png"
    command = [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run"]
    command += [
        f"--user-data-dir={tmp_path / 'profile'}",
        "--window-size=800,900",
        f"--screenshot={shot}",
        page.as_uri(),
    ]
    subprocess.run(command, check=True, capture_output=True, timeout=120)
    pixels = imread(shot)[..., :3].astype(int)
    # the outlines' cyan shows only if the images were decoded and drawn
    cyan = (np.abs(pixels - OUTLINE_RGB.astype(int)).sum(axis=-1) < 60).sum()
    assert cyan > 500, cyan


@pytest.mark.parametrize("per_frame", [False, True])
def test_one_frame_read_alone_equals_the_streamed_frame(tmp_path, per_frame):
    import tifffile

    from plateloom.io.images import index_plate_images, read_site_frame, stream_site

    rng = np.random.default_rng(0)
    stacks = {c: rng.integers(0, 4000, (4, 32, 40)).astype(np.uint16) for c in ("dna", "rep")}
    for channel, stack in stacks.items():
        if per_frame:
            for frame, plane in enumerate(stack):
                tifffile.imwrite(tmp_path / f"A01_s1_t{frame}_{channel}.tif", plane)
        else:
            tifffile.imwrite(tmp_path / f"A01_s1_{channel}.tif", stack, photometric="minisblack")
    template = "{well}_s{site}_t{frame}_{channel}.tif" if per_frame else "{well}_s{site}_{channel}.tif"
    index = index_plate_images(str(tmp_path), template, 96, ["dna", "rep"])
    streamed = {item.frame: item.planes for item in stream_site(index, "A01", 1, ["dna", "rep"])}
    for frame in (0, 3):
        assert np.array_equal(read_site_frame(index, "A01", 1, ["dna", "rep"], frame), streamed[frame])
    assert read_site_frame(index, "A01", 1, ["dna", "rep"], 9) is None


def test_beyond_the_shown_flagged_wells_the_rest_are_named():
    from plateloom.report.thumbnails import MAX_FLAGGED

    wells = [f"{row}{col:02d}" for row in "ABCDEFGH" for col in range(1, 13)]
    profile = pd.DataFrame({"well": wells, "role": "test", "condition": "LOOM-7"})
    flagged = {w: ["site 1: linking distance binds"] for w in wells[: MAX_FLAGGED + 2]}
    html = thumbnails_html(profile, {w: b"png" for w in wells}, flagged)
    assert html.count('class="thumb"') == MAX_FLAGGED + 6  # every shown flagged well, and six test wells
    assert f"2 more flagged well(s) not shown: {wells[MAX_FLAGGED]}, {wells[MAX_FLAGGED + 1]}." in html


def test_cell_crops_span_the_sizes_and_montages_share_one_contrast(tmp_path):
    from plateloom.report.montage import crop_files, montage_figure, sample_crops
    from plateloom.well.snapshot import cell_crops, crops_bytes

    # planted: 8 disks of radius 3..10 px on a 200 x 200 field, channel 2 = 2 x channel 1
    labels = np.zeros((200, 200), np.int32)
    yy, xx = np.mgrid[:200, :200]
    for i, radius in enumerate(range(3, 11)):
        cy, cx = 30 + (i // 4) * 100, 25 + (i % 4) * 50
        labels[(yy - cy) ** 2 + (xx - cx) ** 2 <= radius**2] = i + 1
    planes = np.stack([labels > 0, 2 * (labels > 0)]).astype(np.float32) * 100
    crops, areas, objects = cell_crops(planes, labels, pixel_size_um=1.0, count=4)
    assert objects.tolist() == [1, 3, 6, 8]  # evenly spaced ranks of area: 0, 2.3, 4.7, 7 rounded
    assert crops.shape == (4, 2, 24, 24)  # 12 um half side at 1 um per pixel
    assert np.all(np.diff(areas) > 0) and areas[0] == (labels == 1).sum() and areas[-1] == (labels == 8).sum()
    np.testing.assert_array_equal(crops[:, 1], 2 * crops[:, 0])
    assert crops[0, 0, 12, 12] == 100  # centred on its nucleus
    folder = tmp_path / "thumbnails" / "plate=P1" / "chunk-000"
    folder.mkdir(parents=True)
    features = pd.DataFrame({"mean_intensity_rep": [40.0, np.nan, 20.0, 10.0]})  # another per-cell feature
    for well in ("B02", "C03"):
        (folder / f"{well}.npz").write_bytes(crops_bytes(crops, areas, 1.0, ["dna", "rep"], features))
    files = crop_files([str(folder)])
    assert set(files) == {("P1", "B02"), ("P1", "C03")}
    wells = pd.DataFrame({"batch": "d1", "plate": "P1", "well": ["C03", "B02"]})
    sampled, sampled_areas, pixel, channels = sample_crops(wells, files, per_well=3, most=5)
    assert len(sampled) == 5 and np.all(np.diff(sampled_areas) >= 0) and channels == ["dna", "rep"]
    # ordered by the page's feature instead: lowest first, a cell without a value last
    by_intensity, values, _, _ = sample_crops(wells, files, per_well=3, most=5, order_by="mean_intensity_rep")
    # (3 crops of B02 evenly spaced over its 4: values 40, 20, 10; then 2 of C03: 40, 10)
    np.testing.assert_array_equal(values, [10.0, 10.0, 20.0, 40.0, 40.0])
    assert by_intensity[0, 0].sum() == crops[3, 0].sum() and by_intensity[-1, 0].sum() == crops[0, 0].sum()
    _, areas_only, _, _ = sample_crops(wells, files, per_well=2, most=2, order_by="not_in_the_files")
    assert np.isnan(areas_only).all()
    figure = montage_figure([("a", sampled), ("b", sampled[:2])], pixel, channels)
    first, second = (axis.get_images()[0].get_array() for axis in figure.axes)
    assert first.max() == second.max() == 1.0  # one contrast: the same values give the same grey
