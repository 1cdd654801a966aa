"""Flat-field estimation against the demo's planted vignetting."""

import numpy as np
import pytest
from conftest import ROOT

from plateloom.demo.scenario import load_scenario
from plateloom.demo.simulate import simulate_site, vignetting
from plateloom.well.illumination import apply_flat_field, flat_field_from_planes


def _sites(n=48, corner=0.75):
    # Planted truth: the demo simulator with its vignetting (relative illumination 0.75 in the corners).
    scenario = load_scenario(str(ROOT / "resources/demo/scenario.yaml"), frames=1)
    scenario["imaging"]["vignetting_corner"] = corner
    factor = {"area": 1.0, "reporter": 1.0, "speed": 1.0, "nuclear": 1.0, "cell_count": 1.0}
    return np.stack([simulate_site(scenario, factor, np.random.default_rng(s))[0, 0] for s in range(n)]).astype(
        np.float32
    )


def test_flat_field_recovers_the_planted_vignetting():
    planes = _sites()
    profile = flat_field_from_planes(planes, sigma_px=25)
    truth = vignetting(planes.shape[-1], 0.75)
    truth = truth / truth.mean()
    assert profile.mean() == pytest.approx(1.0, abs=1e-5)
    error = np.abs(profile / truth - 1)
    assert error.mean() < 0.015
    assert error.max() < 0.06  # at the field's edges, where wide smoothing flattens the curvature


def test_correction_flattens_a_uniform_field_at_least_threefold():
    # Acceptance: an evenly fluorescent field seen through the planted vignetting, corrected by the profile
    # estimated from the cell images, has at least 3x lower coefficient of variation (flat-field validation,
    # common practice).
    planes = _sites()
    profile = flat_field_from_planes(planes, sigma_px=25)
    rng = np.random.default_rng(5)
    uniform = 500.0 * vignetting(planes.shape[-1], 0.75) + rng.normal(0, 5, planes.shape[1:])
    corrected = apply_flat_field(uniform[None], profile[None])[0]
    cv_before, cv_after = uniform.std() / uniform.mean(), corrected.std() / corrected.mean()
    assert cv_before / cv_after >= 3.0, (cv_before, cv_after)


def test_profile_of_the_wrong_shape_is_a_clear_error():
    from plateloom.errors import InputError

    with pytest.raises(InputError, match="delete results/illumination and rerun"):
        apply_flat_field(np.ones((2, 32, 32)), np.ones((2, 16, 16)))


def test_unreadable_sampled_site_is_skipped_and_named(tmp_path):
    import tifffile

    from plateloom.io.images import index_plate_images
    from plateloom.well.illumination import IlluminationSettings, estimate_flat_field

    planes = _sites(n=6)
    for i, plane in enumerate(planes):
        tifffile.imwrite(tmp_path / f"A{i + 1:02d}_s1_dna.tif", plane[None].astype(np.uint16), photometric="minisblack")
    broken = tmp_path / "A03_s1_dna.tif"
    broken.write_bytes(broken.read_bytes()[:100])
    index = index_plate_images(str(tmp_path), "{well}_s{site}_{channel}.tif", 96, ["dna"])
    profile, n_planes, skipped = estimate_flat_field(index, "dna", ["dna"], IlluminationSettings.defaults(), 0.8)
    assert n_planes == 5 and len(skipped) == 1
    assert skipped[0].startswith("well A03, site 1:") and "cannot be read as TIFF" in skipped[0]
    assert profile.shape == planes.shape[1:] and np.isfinite(profile).all()


def test_black_wrong_size_and_negative_sites_are_left_out_and_named(tmp_path):
    import tifffile

    from plateloom.io.images import index_plate_images
    from plateloom.well.illumination import IlluminationSettings, estimate_flat_field

    planes = _sites(n=8)
    for i, plane in enumerate(planes):
        tifffile.imwrite(tmp_path / f"A{i + 1:02d}_s1_dna.tif", plane[None].astype(np.uint16), photometric="minisblack")
    tifffile.imwrite(tmp_path / "A02_s1_dna.tif", np.zeros((1, *planes.shape[1:]), np.uint16))  # black
    tifffile.imwrite(tmp_path / "A05_s1_dna.tif", planes[4][None, :40, :50].astype(np.uint16))  # another size
    tifffile.imwrite(tmp_path / "A07_s1_dna.tif", np.full((1, *planes.shape[1:]), -20, np.int16))  # int16, negative
    index = index_plate_images(str(tmp_path), "{well}_s{site}_{channel}.tif", 96, ["dna"])
    profile, n_planes, skipped = estimate_flat_field(index, "dna", ["dna"], IlluminationSettings.defaults(), 0.8)
    assert n_planes == 5 and profile.shape == planes.shape[1:] and np.isfinite(profile).all()
    said = " | ".join(skipped)
    assert "well A02, site 1: black" in said and "well A07, site 1: black or non-positive median" in said
    assert f"well A05, site 1: image size (40, 50) differs from the plate's {planes.shape[1:]}" in said


def test_too_few_usable_sites_stop_with_the_sites_named(tmp_path):
    import tifffile

    from plateloom.errors import InputError
    from plateloom.io.images import index_plate_images
    from plateloom.well.illumination import IlluminationSettings, estimate_flat_field

    planes = _sites(n=3)
    for i, plane in enumerate(planes):
        tifffile.imwrite(tmp_path / f"A{i + 1:02d}_s1_dna.tif", plane[None].astype(np.uint16), photometric="minisblack")
    tifffile.imwrite(tmp_path / "A02_s1_dna.tif", np.zeros((1, *planes.shape[1:]), np.uint16))
    index = index_plate_images(str(tmp_path), "{well}_s{site}_{channel}.tif", 96, ["dna"])
    with pytest.raises(InputError, match=r"only 2 usable image\(s\).*well A02, site 1: black"):
        estimate_flat_field(index, "dna", ["dna"], IlluminationSettings.defaults(), 0.8)
