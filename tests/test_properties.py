"""Property-based checks (hypothesis) of the statistical stages: invariances the declared model implies."""

import numpy as np
import pandas as pd
from conftest import plate_tables
from hypothesis import given, settings
from hypothesis import strategies as st
from test_plate_stage import _plate
from test_screen_stage import _wells

from plateloom.plate.qc import robust_z, z_prime
from plateloom.screen.effects import screen_effects
from plateloom.screen.hits import HitRule
from plateloom.screen.model_wells import build_model_wells, treatment_catalogue
from plateloom.stats import bh_qvalues

FAST = settings(max_examples=15, deadline=None)


def _effects(wells):
    model = build_model_wells(wells, ["value", "other"], {"value", "other"}, "control_location")
    table = screen_effects(
        model.wells, ["value", "other"], model.scales, 0.95, HitRule(), "exact", treatment_catalogue(wells)
    )
    return table.sort_values(["feature", "treatment"]).reset_index(drop=True)


BASE = _wells(seed=11)
BASE_EFFECTS = _effects(BASE)


@FAST
@given(shift=st.floats(-3, 3), batch=st.sampled_from(["d0", "d1", "d2"]))
def test_a_constant_added_to_one_batch_leaves_corrected_effects_unchanged(shift, batch):
    shifted = BASE.copy()
    rows = shifted["batch"] == batch
    shifted.loc[rows, ["value", "other"]] *= np.exp(shift)  # a constant on the log (model) scale
    table = _effects(shifted)
    np.testing.assert_allclose(table["estimate"], BASE_EFFECTS["estimate"], atol=1e-8)
    np.testing.assert_allclose(table["std_error"], BASE_EFFECTS["std_error"], rtol=1e-5)


@FAST
@given(seed=st.integers(0, 2**32 - 1))
def test_row_order_of_the_well_table_does_not_change_the_effects(seed):
    permuted = BASE.sample(frac=1.0, random_state=np.random.RandomState(seed % (2**32 - 1))).reset_index(drop=True)
    table = _effects(permuted)
    pd.testing.assert_frame_equal(table, BASE_EFFECTS, check_exact=False, rtol=1e-7, atol=1e-10)


@FAST
@given(values=st.lists(st.floats(-1e3, 1e3), min_size=3, max_size=40))
def test_robust_z_of_the_controls_themselves_has_median_zero(values):
    controls = np.asarray(values)
    z = robust_z(controls, controls)
    if np.all(np.isfinite(z)):
        assert abs(np.median(z)) < 1e-9


@FAST
@given(p=st.lists(st.floats(0, 1), min_size=1, max_size=60), seed=st.integers(0, 1000))
def test_bh_q_values_are_at_least_p_monotone_and_order_free(p, seed):
    p = np.asarray(p)
    q = bh_qvalues(p)
    assert np.all(q >= p - 1e-15) and np.all(q <= 1)
    order = np.argsort(p, kind="stable")
    assert np.all(np.diff(q[order]) >= -1e-15)
    permutation = np.random.default_rng(seed).permutation(len(p))
    np.testing.assert_allclose(bh_qvalues(p[permutation]), q[permutation])


@FAST
@given(seed=st.integers(0, 1000))
def test_plate_tables_do_not_depend_on_the_order_of_cells(seed):
    cells, tracks, qc, layout = _plate(seed=3)
    reference = plate_tables(cells, tracks, qc, layout)
    shuffled = cells.sample(frac=1.0, random_state=seed).reset_index(drop=True)
    tables = plate_tables(shuffled, tracks.sample(frac=1.0, random_state=seed), qc, layout)
    pd.testing.assert_frame_equal(tables.profile, reference.profile, check_exact=False, rtol=1e-9)
    pd.testing.assert_frame_equal(tables.qc, reference.qc, check_exact=False, rtol=1e-9)


@FAST
@given(shift=st.floats(-100, 100), scale=st.floats(0.1, 10))
def test_z_prime_is_unchanged_by_a_change_of_units(shift, scale):
    rng = np.random.default_rng(4)
    positive, negative = rng.normal(10, 1, 16), rng.normal(0, 1, 16)
    assert np.isclose(z_prime(positive * scale + shift, negative * scale + shift), z_prime(positive, negative))


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 10_000), st.floats(0.1, 0.9), st.integers(1, 40), st.integers(1, 40))
def test_cross_morphology_by_slices_equals_scipy(seed, density, height, width):
    # reference: scipy.ndimage.binary_erosion / binary_dilation with their default structure
    from scipy import ndimage

    from plateloom.well.morphology import dilate_cross, dilate_square, erode_cross, same_as_neighbours

    rng = np.random.default_rng(seed)
    mask = rng.random((height, width)) < density
    assert np.array_equal(erode_cross(mask), ndimage.binary_erosion(mask))
    assert np.array_equal(dilate_cross(mask), ndimage.binary_dilation(mask))
    assert np.array_equal(dilate_square(mask), ndimage.binary_dilation(mask, np.ones((3, 3), bool)))
    # label erosion: a pixel keeps its label when the cross around it holds only that label, the
    # image edge repeated (grey erosion and dilation by the cross, mode "nearest", agree with it)
    labels = rng.integers(0, 4, (height, width))
    cross = ndimage.generate_binary_structure(2, 1)
    uniform = (ndimage.grey_erosion(labels, footprint=cross, mode="nearest") == labels) & (
        ndimage.grey_dilation(labels, footprint=cross, mode="nearest") == labels
    )
    assert np.array_equal(same_as_neighbours(labels), uniform)


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 10_000), st.integers(0, 4), st.integers(1, 30), st.integers(1, 30))
def test_square_maximum_by_slices_equals_scipy(seed, reach, height, width):
    # reference: scipy.ndimage.maximum_filter (edges reflected) on float, integer label and boolean images
    from scipy import ndimage

    from plateloom.well.morphology import maximum_square

    rng = np.random.default_rng(seed)
    size = 2 * reach + 1
    for image in (
        rng.normal(0, 1, (height, width)).astype(np.float32),
        rng.integers(0, 6, (height, width)).astype(np.int32),
        rng.random((height, width)) < 0.1,
    ):
        assert np.array_equal(maximum_square(image, size), ndimage.maximum_filter(image, size=size))


@settings(max_examples=40, deadline=None)
@given(st.integers(0, 10_000), st.integers(1, 12))
def test_label_medians_equal_numpy_per_label(seed, n_labels):
    # reference: numpy's median of each label's values (the lower middle value for an even count,
    # as the edge cut uses)
    from plateloom.well.nuclei import _medians_by_owner

    rng = np.random.default_rng(seed)
    labels = rng.integers(0, n_labels + 1, (20, 30))
    values = rng.normal(500, 200, labels.shape).astype(np.float32)
    inside = labels > 0
    found = _medians_by_owner(labels[inside], values[inside], n_labels)
    for label in range(1, n_labels + 1):
        own = np.sort(values[labels == label])
        expected = own[(len(own) - 1) // 2] if len(own) else 0.0
        assert found[label] == expected


@settings(max_examples=20, deadline=None)
@given(st.integers(0, 10_000), st.integers(2, 30), st.integers(2, 30))
def test_gradient_magnitude_equals_skimage_sobel(seed, height, width):
    # reference: skimage.filters.sobel (equal within float32 rounding)
    from skimage.filters import sobel

    from plateloom.well.nuclei import gradient_magnitude

    image = np.random.default_rng(seed).normal(5, 1, (height, width)).astype(np.float32)
    np.testing.assert_allclose(gradient_magnitude(image), sobel(image), rtol=1e-5, atol=1e-5)


@settings(max_examples=20, deadline=None)
@given(st.integers(0, 10_000), st.sampled_from([np.int32, np.int64]), st.integers(1, 70_000))
def test_stable_label_order_equals_numpy_stable_argsort(seed, dtype, top):
    from plateloom.well.object_pixels import stable_label_order

    labels = np.random.default_rng(seed).integers(0, top, 500).astype(dtype)
    assert np.array_equal(stable_label_order(labels), np.argsort(labels, kind="stable"))
