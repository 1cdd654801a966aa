"""Vectorised per-object measures against scikit-image (regionprops, graycomatrix), cell bodies and
the label-free path against planted truth."""

import numpy as np
import pytest
from conftest import ROOT
from scipy import ndimage
from segmentation_accuracy import pooled_average_precision
from skimage.draw import disk, ellipse
from skimage.feature import graycomatrix, graycoprops
from skimage.filters import threshold_li, threshold_otsu, threshold_triangle
from skimage.measure import regionprops_table

from plateloom.demo.scenario import QUANTITIES, load_scenario
from plateloom.demo.simulate import simulate_site
from plateloom.well.cell_bodies import grow_cell_bodies
from plateloom.well.features import convex_areas, measure_objects, perimeters
from plateloom.well.image_qc import focus_score
from plateloom.well.object_pixels import ObjectPixels
from plateloom.well.segment import segment_label_free, segment_nuclei
from plateloom.well.texture import GLCM_ANGLES, glcm_measures
from plateloom.well.thresholds import object_threshold, otsu_of_sorted, threshold_log_otsu


def _demo_frame(cells=60, size=256, seed=3):
    scenario = load_scenario(str(ROOT / "resources/demo/scenario.yaml"), frames=1, image_size_px=size)
    scenario["cells_per_site"] = cells
    stack = simulate_site(scenario, {q: 1.0 for q in QUANTITIES}, np.random.default_rng(seed))
    planes = stack[0].astype(np.float32)
    labels, _ = segment_nuclei(planes[0], scenario["pixel_size_um"], 1.0, 30.0, 7.0)
    return planes, labels


def test_vectorised_measures_equal_regionprops():
    # Reference: skimage.measure.regionprops_table, object by object.
    planes, labels = _demo_frame()
    assert labels.max() > 40
    pixel = 0.8
    table = measure_objects(labels, planes, ["nuc", "rep"], np.array([0.0, 0.0]), pixel)
    # float64 intensities, so the reference itself is not limited by float32 rounding (its SD differs by 1e-6)
    reference = regionprops_table(
        labels,
        intensity_image=np.moveaxis(planes, 0, -1).astype(np.float64),
        properties=(
            "label",
            "area",
            "perimeter",
            "eccentricity",
            "solidity",
            "axis_major_length",
            "axis_minor_length",
            "centroid",
            "intensity_mean",
            "intensity_std",
            "bbox",
        ),
    )
    np.testing.assert_array_equal(table["object"], reference["label"])
    pairs = [
        ("area_um2", reference["area"] * pixel**2),
        ("perimeter_um", reference["perimeter"] * pixel),
        ("eccentricity", reference["eccentricity"]),
        ("solidity", reference["solidity"]),
        ("major_axis_um", reference["axis_major_length"] * pixel),
        ("minor_axis_um", reference["axis_minor_length"] * pixel),
        ("centroid_x_um", reference["centroid-1"] * pixel),
        ("centroid_y_um", reference["centroid-0"] * pixel),
        ("mean_intensity_nuc", reference["intensity_mean-0"]),
        ("mean_intensity_rep", reference["intensity_mean-1"]),
        ("std_intensity_nuc", reference["intensity_std-0"]),
    ]
    for column, expected in pairs:
        np.testing.assert_allclose(table[column].to_numpy(), expected, rtol=1e-6, atol=1e-6, err_msg=column)
    border = (
        (reference["bbox-0"] == 0)
        | (reference["bbox-1"] == 0)
        | (reference["bbox-2"] == labels.shape[0])
        | (reference["bbox-3"] == labels.shape[1])
    )
    np.testing.assert_array_equal(table["touches_border"], border)


def _reference_glcm(image, mask, distance, levels):
    # Reference: skimage.feature.graycomatrix / graycoprops on one object; pixels outside it are put
    # on an extra grey level whose row and column are dropped before normalising.
    values = image[mask]
    low, high = values.min(), values.max()
    span = high - low if high > low else 1.0
    quantised = np.full(image.shape, levels, np.uint8)
    quantised[mask] = np.clip(((values - low) / span * levels).astype(int), 0, levels - 1)
    counts = graycomatrix(quantised, [distance], list(GLCM_ANGLES), levels=levels + 1, symmetric=True)[:levels, :levels]
    counts = counts.astype(float) / counts.sum(axis=(0, 1), keepdims=True)
    return {
        prop: float(graycoprops(counts, "ASM" if prop == "asm" else prop).mean())
        for prop in ("contrast", "homogeneity", "correlation", "asm")
    }


@pytest.mark.parametrize("distance", [1, 2, 3])
def test_glcm_texture_equals_scikit_image(distance):
    rng = np.random.default_rng(distance)
    image = rng.normal(100, 20, (120, 120)).astype(np.float32)
    image = ndimage.gaussian_filter(image, 1.0)  # some spatial correlation
    labels = np.zeros((120, 120), np.int32)
    labels[disk((30, 30), 14)] = 1
    labels[ellipse(80, 70, 12, 25)] = 2
    labels[disk((30, 95), 9)] = 3
    pixels = ObjectPixels.of(labels)
    ours = glcm_measures(image, labels, pixels, distance, levels=8)
    for label in (1, 2, 3):
        reference = _reference_glcm(image, labels == label, distance, 8)
        for prop, value in reference.items():
            assert ours[prop][label - 1] == pytest.approx(value, rel=1e-9, abs=1e-12), (label, prop)


@pytest.mark.parametrize(
    "method, reference", [("otsu", threshold_otsu), ("li", threshold_li), ("triangle", threshold_triangle)]
)
def test_threshold_methods_are_the_published_ones(method, reference):
    # Otsu 1979, Li & Tam 1998, Zack et al. 1977: scikit-image's implementations are the reference.
    planes, _ = _demo_frame(cells=20, size=160)
    _, threshold = segment_nuclei(planes[0], 0.8, 1.0, 30.0, 7.0, threshold_method=method)
    assert threshold == pytest.approx(reference(ndimage.gaussian_filter(planes[0], 1.0 / 0.8)), rel=1e-6)


def test_cell_bodies_grow_from_nuclei_and_give_cytoplasm_levels():
    # Planted truth: two cells whose bodies touch; nucleus and cytoplasm carry known reporter levels.
    size = 160
    nuclei_truth = np.zeros((size, size), np.int32)
    bodies_truth = np.zeros((size, size), np.int32)
    centres = [(80, 50), (80, 108)]
    for label, centre in enumerate(centres, start=1):
        bodies_truth[disk(centre, 30, shape=(size, size))] = label
    bodies_truth[:, 79] = 0  # a one-pixel cleft between the two touching bodies
    for label, centre in enumerate(centres, start=1):
        nuclei_truth[disk(centre, 12)] = label
    rng = np.random.default_rng(0)
    nuclear = 100 + 1000 * (nuclei_truth > 0) + rng.normal(0, 5, (size, size))
    body = 100 + 400 * (bodies_truth > 0) + rng.normal(0, 5, (size, size))
    reporter = (
        100 + np.where(nuclei_truth > 0, 600, np.where(bodies_truth > 0, 200, 0)) + rng.normal(0, 5, (size, size))
    )
    planes = np.stack([nuclear, body, reporter]).astype(np.float32)
    nuclei, _ = segment_nuclei(planes[0], 1.0, 0.0, 50.0, 10.0)
    cells = grow_cell_bodies(nuclei, planes[1], 1.0, 0.0)
    assert nuclei.max() == 2
    for label in (1, 2):
        found = cells == nuclei[centres[label - 1]]
        planted = bodies_truth == label
        assert (found & planted).sum() / (found | planted).sum() > 0.95
    table = measure_objects(
        nuclei, planes, ["nuclear", "body", "reporter"], np.array([100.0, 100.0, 100.0]), 1.0, cells
    )
    np.testing.assert_allclose(table["cytoplasm_mean_intensity_reporter"], 200, rtol=0.03)
    np.testing.assert_allclose(table["mean_intensity_reporter"], 600, rtol=0.03)
    np.testing.assert_allclose(table["nuclear_cytoplasmic_ratio_reporter"], 3.0, rtol=0.05)
    np.testing.assert_allclose(table["cell_area_um2"], [(bodies_truth == k).sum() for k in (1, 2)], rtol=0.05)
    assert not table["touches_border"].any()


def test_label_free_path_finds_textured_cells_on_a_smooth_dish():
    # Planted truth: phase-contrast-like cells (bright/dark texture, mean equal to the dish) on a smooth,
    # slightly noisy background; the mean grey level gives no contrast, only the texture does.
    rng = np.random.default_rng(9)
    size = 200
    truth = np.zeros((size, size), np.int32)
    for label, centre in enumerate([(40, 40), (40, 120), (110, 70), (150, 150), (120, 165)], start=1):
        truth[disk(centre, 16, shape=(size, size))] = label
    texture = ndimage.gaussian_filter(rng.normal(0, 1, (size, size)), 1.0)
    image = 1000 + 300 * texture / texture.std() * (truth > 0) + rng.normal(0, 5, (size, size))
    labels, threshold = segment_label_free(image.astype(np.float32), 1.0, 5.0, 100.0, 12.0)
    ap = pooled_average_precision([(truth, labels)], (0.5, 0.75))
    assert np.isfinite(threshold)
    assert ap[0.5] == 1.0
    flat, threshold = segment_label_free(
        np.full((size, size), 1000.0, np.float32) + rng.normal(0, 5, (size, size)).astype(np.float32),
        1.0,
        5.0,
        100.0,
        12.0,
    )
    assert flat.max() == 0 and np.isnan(threshold)


def test_focus_score_is_the_variance_of_the_laplacian_and_falls_with_defocus():
    # Reference: scipy.ndimage.laplace (the 5-point discrete Laplacian); variance-of-Laplacian focus
    # measure (Pech-Pacheco et al. 2000). The score uses every FOCUS_ROW_STRIDE-th interior row.
    from plateloom.well.image_qc import FOCUS_ROW_STRIDE

    planes, _ = _demo_frame(cells=60, size=256)
    sharp = ndimage.gaussian_filter(planes[0], 1.0)
    reference = ndimage.laplace(sharp.astype(np.float64))[1:-1:FOCUS_ROW_STRIDE, 1:-1]
    assert focus_score(sharp) == pytest.approx(reference.var() / sharp.astype(np.float64).mean() ** 2, rel=1e-5)
    blurred = ndimage.gaussian_filter(planes[0], 4.0)
    assert focus_score(blurred) < 0.2 * focus_score(sharp)
    assert focus_score(1.7 * sharp) == pytest.approx(focus_score(sharp), rel=1e-5)  # exposure-independent


def test_threshold_from_a_grid_sample_of_a_large_frame_matches_the_whole_frame():
    # Reference: skimage.filters.threshold_otsu on every pixel of a 1024x1024 frame. The sampled
    # threshold must fall within one histogram bin (1/256 of the grey range) of it.
    planes, _ = _demo_frame(cells=250, size=1024)
    smooth = ndimage.gaussian_filter(planes[0], 1.25)
    bin_width = (float(smooth.max()) - float(smooth.min())) / 256
    assert abs(object_threshold(smooth) - threshold_otsu(smooth)) <= bin_width


def test_thresholds_from_sorted_values_equal_skimage_and_numpy():
    # Reference: skimage.filters.threshold_otsu and numpy.percentile on the unsorted values. The
    # sorted-sample forms must give the same floats on awkward samples: ties, two levels, a
    # constant, a few huge outliers, float32 and float64.
    rng = np.random.default_rng(8)
    samples = [
        rng.lognormal(3, 1, 5000).astype(np.float32),
        np.round(rng.lognormal(3, 1, 4001)).astype(np.float32),  # ties on histogram edges
        np.repeat([10.0, 30.0], [900, 100]),
        np.full(50, 7.0, np.float32),
        np.concatenate([rng.normal(100, 5, 3000), [60000.0] * 3]),
        rng.normal(0, 1, 17),
    ]
    for values in samples:
        ordered = np.sort(values)
        if values.min() < values.max():
            assert otsu_of_sorted(ordered) == float(threshold_otsu(values))
        else:
            assert otsu_of_sorted(ordered) == values[0]
        floor = float(np.percentile(values, 0.5))
        logs = np.log1p(np.maximum(values.astype(np.float64) - floor, 0.0))
        expected = float(np.expm1(threshold_otsu(logs)) + floor) if logs.max() > logs.min() else float(values.max())
        assert threshold_log_otsu(values) == expected


@pytest.mark.parametrize("sigma_um", [1.0, 2.5])
def test_cell_bodies_match_planted_bodies_on_full_and_binned_grids(sigma_um):
    # Planted truth: 12 cells on a 256x256 field, bodies of radius 22 px, some touching, around
    # nuclei of radius 8 px. sigma 1.0 px runs at full resolution, 2.5 px on the 2x2-binned grid.
    size, rng = 256, np.random.default_rng(4)
    centres = [(40 + 44 * i + 10 * (j % 2), 40 + 58 * j) for i in range(4) for j in range(3)]
    nuclei_truth = np.zeros((size, size), np.int32)
    for label, centre in enumerate(centres, start=1):
        nuclei_truth[disk(centre, 8, shape=(size, size))] = label
    distance, (iy, ix) = ndimage.distance_transform_edt(nuclei_truth == 0, return_indices=True)
    bodies_truth = np.where(distance <= 14, nuclei_truth[iy, ix], 0)
    body = 100 + 400 * (bodies_truth > 0) + rng.normal(0, 10, (size, size))
    cells = grow_cell_bodies(nuclei_truth, body.astype(np.float32), 1.0, sigma_um)
    assert set(np.unique(cells)) == set(range(13))
    np.testing.assert_array_equal(cells[nuclei_truth > 0], nuclei_truth[nuclei_truth > 0])
    for label in range(1, 13):
        found, planted = cells == label, bodies_truth == label
        assert (found & planted).sum() / (found | planted).sum() > 0.95
        assert found.sum() == pytest.approx(planted.sum(), rel=0.04)


def test_a_cell_body_reaching_the_image_edge_flags_its_nucleus_as_touching_the_border():
    # Common practice: an object cut by the field edge is not a whole cell. Nucleus 1 lies inside the
    # field but its body reaches the top-left edge; cell 2 lies wholly inside.
    nuclei = np.zeros((100, 100), np.int32)
    cells = np.zeros((100, 100), np.int32)
    cells[disk((20, 20), 25, shape=(100, 100))] = 1
    cells[disk((70, 70), 12)] = 2
    nuclei[disk((20, 20), 6)] = 1
    nuclei[disk((70, 70), 6)] = 2
    planes = np.stack([100.0 + 50 * (nuclei > 0), 100.0 + 20 * (cells > 0)]).astype(np.float32)
    table = measure_objects(nuclei, planes, ["nuc", "body"], np.array([100.0, 100.0]), 1.0, cells)
    np.testing.assert_array_equal(table["touches_border"], [True, False])
    np.testing.assert_allclose(table["cell_area_um2"], [(cells == 1).sum(), (cells == 2).sum()])
    np.testing.assert_allclose(table["cytoplasm_mean_intensity_body"], [20.0, 20.0])


def test_background_level_is_the_median_away_from_objects_on_odd_sized_fields():
    # Reference: median of every pixel at least 3 px from any object (scipy distance transform),
    # on a 101x99 field (not a multiple of the sampling stride); planted background 100.
    from plateloom.well.image_qc import background_levels

    rng = np.random.default_rng(8)
    labels = np.zeros((101, 99), np.int32)
    for label, centre in enumerate([(10, 10), (50, 60), (90, 95), (30, 80)], start=1):
        labels[disk(centre, 8, shape=labels.shape)] = label
    planes = np.stack(
        [
            100 + 900 * (labels > 0) + rng.normal(0, 4, labels.shape),
            40 + 10 * (labels > 0) + rng.normal(0, 2, labels.shape),
        ]
    ).astype(np.float32)
    far = ndimage.distance_transform_edt(labels == 0) >= 3
    reference = np.median(planes[:, far], axis=1)
    np.testing.assert_allclose(background_levels(planes, labels), reference, atol=0.6)
    np.testing.assert_allclose(background_levels(planes, labels), [100, 40], atol=1.0)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_fill_holes_equals_scipy_binary_fill_holes(seed):
    # Reference: scipy.ndimage.binary_fill_holes (default 4-connected background), on rings (holes)
    # and on fields whose background all reaches the border (no hole).
    from plateloom.well.thresholds import fill_holes

    rng = np.random.default_rng(seed)
    mask = ndimage.gaussian_filter(rng.random((120, 130)), 3) > 0.52
    rings = np.zeros_like(mask)
    rings[disk((60, 60), 15)] = True
    rings[disk((60, 60), 6)] = False
    for field in (mask, mask | rings, np.zeros_like(mask), np.ones_like(mask)):
        np.testing.assert_array_equal(fill_holes(field), ndimage.binary_fill_holes(field))
    assert fill_holes(mask | rings)[60, 60]


@pytest.mark.parametrize("shape, sigma", [((256, 300), 1.25), ((64, 50), 2.5), ((7, 9), 1.25), ((40, 3), 0.6)])
def test_smoothing_equals_scipy_gaussian_filter(shape, sigma):
    # Reference: scipy.ndimage.gaussian_filter (truncate 4, mode "reflect"), within float32 rounding.
    from plateloom.well.thresholds import smooth_image

    image = (np.random.default_rng(1).gamma(2.0, 300.0, shape)).astype(np.float32)
    reference = ndimage.gaussian_filter(image, sigma)
    smooth = smooth_image(image, sigma)
    assert smooth.dtype == np.float32 and smooth.flags["C_CONTIGUOUS"]
    np.testing.assert_allclose(smooth, reference, rtol=0, atol=2e-6 * float(np.abs(reference).max()))


def test_bounding_boxes_from_pixels_equal_find_objects():
    # Reference: scipy.ndimage.find_objects on a label image with gaps in its ids.
    from plateloom.well.segment import _bounding_boxes

    rng = np.random.default_rng(11)
    labels, count = ndimage.label(ndimage.gaussian_filter(rng.random((90, 110)), 2) > 0.53)
    labels[labels == 3] = 0
    index = np.flatnonzero(labels)
    wanted = np.array([k for k in range(1, count + 1) if k != 3][::2])
    expected = ndimage.find_objects(labels)
    assert _bounding_boxes(index, labels.ravel()[index], wanted, labels.shape[1]) == [expected[k - 1] for k in wanted]


def test_upsampling_of_binned_images_is_bilinear_interpolation():
    # Reference: scipy.ndimage.map_coordinates (order 1, edges repeated) at the binned coordinates
    # of the full pixel centres, (y - 1/2) / 2 and (x - 1/2) / 2.
    from plateloom.well.cell_bodies import _upsample2

    binned = np.random.default_rng(12).normal(size=(37, 52)).astype(np.float32)
    yy, xx = np.mgrid[0:74, 0:104]
    reference = ndimage.map_coordinates(
        binned.astype(np.float64), [(yy - 0.5) / 2, (xx - 0.5) / 2], order=1, mode="nearest"
    )
    np.testing.assert_allclose(_upsample2(binned), reference, atol=1e-5)


def test_cell_bodies_on_a_field_without_body_signal_are_the_nuclei():
    # Common practice: with no contrast in the body channel, each cell is just its nucleus.
    nuclei = np.zeros((128, 128), np.int32)
    nuclei[disk((40, 40), 8)] = 1
    nuclei[disk((90, 70), 8)] = 2
    flat = (500 + np.random.default_rng(13).normal(0, 5, nuclei.shape)).astype(np.float32)
    np.testing.assert_array_equal(grow_cell_bodies(nuclei, flat, 0.5, 1.25), nuclei)


def test_convex_areas_equal_regionprops_on_awkward_shapes():
    # Reference: skimage.measure.regionprops' area_convex, object by object. Shapes that stress the
    # hull: random walks (concave, with holes and notches), single pixels, one-pixel lines in every
    # direction, and objects touching the image edge.
    rng = np.random.default_rng(11)
    labels = np.zeros((160, 160), np.int32)
    label = 0
    for top in range(0, 160, 20):
        for left in range(0, 160, 20):
            label += 1
            kind = label % 4
            if kind == 0:  # a single pixel
                labels[top + 10, left + 10] = label
            elif kind == 1:  # a line, horizontal, vertical or diagonal
                length = int(rng.integers(2, 18))
                step = [(0, 1), (1, 0), (1, 1), (1, -1)][label % 16 // 4]
                rows = top + 1 + step[0] * np.arange(length) // (2 if step[1] == 0 else 1)
                cols = left + 9 + step[1] * np.arange(length) // 2
                labels[np.clip(rows, top, top + 19), np.clip(cols, left, left + 19)] = label
            else:  # a random walk of fat steps
                y, x = top + 9, left + 9
                for _ in range(int(rng.integers(5, 60))):
                    y = int(np.clip(y + rng.integers(-2, 3), top, top + 18))
                    x = int(np.clip(x + rng.integers(-2, 3), left, left + 18))
                    labels[y : y + 2, x : x + int(rng.integers(1, 3))] = label
    pixels = ObjectPixels.of(labels)
    _, border = perimeters(labels, pixels)
    ours = convex_areas(pixels, border)
    reference = regionprops_table(labels, properties=("label", "area_convex"))
    present = np.bincount(labels.ravel(), minlength=pixels.count + 1)[1:] > 0
    assert present.sum() == len(reference["label"]) == 64
    np.testing.assert_array_equal(ours[present], reference["area_convex"])
