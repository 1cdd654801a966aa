"""Job sizes scale with the data: memory with the frame size, run time with the pixels read."""

from pathlib import Path

import pytest

from plateloom.setup.sizing import ImagingSize, analyse_wells_size, screen_size


def test_per_well_job_size_grows_with_pixels_and_wells():
    small = analyse_wells_size(ImagingSize(160, 10, 1, 2), 24, 1.5, 2.0)
    large = analyse_wells_size(ImagingSize(1024, 100, 4, 2), 48, 1.5, 2.0)
    # 48 wells x 4 sites x 100 frames x 2 channels x 1.048576 MP x 1.5 s = 60,398 s; x 2 (safety) / 60 = 2013.3
    assert large.runtime_min == 2014
    assert small.runtime_min == 5  # floor of 5 minutes
    assert small.mem_mb == 1500  # (700 MB base + 5 MB of frames) x safety 2, up to 100 MB
    # memory follows one frame and one well, not the chunk: 48 wells cost what 1 well costs
    assert analyse_wells_size(ImagingSize(1024, 100, 4, 2), 1, 1.5, 2.0).mem_mb == large.mem_mb
    assert large.mem_mb > small.mem_mb


def test_screen_job_size_grows_with_wells():
    assert screen_size(15360, 200, 2.0).mem_mb > screen_size(288, 10, 2.0).mem_mb
    assert screen_size(288, 10, 2.0).runtime_min == 10


def test_the_quick_demo_is_the_scenarios_quick_section_and_full_keeps_its_own_numbers():
    from plateloom.demo.scenario import load_scenario

    path = str(Path(__file__).resolve().parents[1] / "resources/demo/scenario.yaml")
    quick, full = load_scenario(path, size="quick"), load_scenario(path)
    assert (quick["frames"], quick["image_size_px"], quick["cells_per_site"]) == (16, 88, 8)
    assert (full["frames"], full["image_size_px"], full["cells_per_site"]) == (36, 160, 18)
    assert "quick" not in quick and "quick" not in full
    assert load_scenario(path, frames=3, size="quick")["frames"] == 3  # explicit overrides win
    with pytest.raises(ValueError, match="demo.size"):
        load_scenario(path, size="tiny")
