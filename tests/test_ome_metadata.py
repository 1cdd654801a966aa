"""OME-TIFF metadata (OME data model, Goldberg et al. 2005, Genome Biol. 6:R47): pixel size, time
increment and channel names are read when present; config overrides them."""

import numpy as np
import pytest
import tifffile

from plateloom.errors import InputError
from plateloom.io.images import image_scale, read_ome_metadata


def _ome_file(path, **metadata):
    tifffile.imwrite(path, np.zeros((3, 16, 16), np.uint16), ome=True, metadata={"axes": "TYX", **metadata})
    return str(path)


def test_pixel_size_time_increment_and_channel_names_are_read_with_units(tmp_path):
    path = _ome_file(
        tmp_path / "A01_s1_dapi.ome.tif",
        PhysicalSizeX=650,
        PhysicalSizeXUnit="nm",
        TimeIncrement=300,
        TimeIncrementUnit="s",
        Channel={"Name": ["dapi"]},
    )
    metadata = read_ome_metadata(path)
    assert metadata.pixel_size_um == pytest.approx(0.65)
    assert metadata.frame_interval_min == pytest.approx(5.0)
    assert metadata.channel_names == ("dapi",)


def test_config_overrides_metadata_and_metadata_fills_what_config_leaves_out(tmp_path):
    path = _ome_file(tmp_path / "a.ome.tif", PhysicalSizeX=0.65, TimeIncrement=2, TimeIncrementUnit="min")
    assert image_scale({"pixel_size_um": 0.5, "frame_interval_min": 3.0}, path)[:2] == (0.5, 3.0)
    assert image_scale({"pixel_size_um": None, "frame_interval_min": 3.0}, path)[:2] == (pytest.approx(0.65), 3.0)
    assert image_scale({"pixel_size_um": None, "frame_interval_min": None}, path)[:2] == (pytest.approx(0.65), 2.0)


def test_plain_tiff_without_scale_in_config_is_an_error_naming_the_keys(tmp_path):
    path = tmp_path / "plain.tif"
    tifffile.imwrite(path, np.zeros((16, 16), np.uint16))
    assert read_ome_metadata(str(path)) is None
    with pytest.raises(
        InputError,
        match=r"plain.tif.*pixel_size_um not set and not in the image's OME metadata.*"
        r"Fix: set images.pixel_size_um",
    ):
        image_scale({"pixel_size_um": None, "frame_interval_min": 1.0}, str(path))


@pytest.mark.parametrize("unit", ["\u00b5m", "\u03bcm", "um"])
def test_micrometres_written_with_the_micro_sign_or_the_greek_mu(tmp_path, unit):
    # Unicode has two characters for micro: MICRO SIGN U+00B5 and GREEK SMALL LETTER MU U+03BC
    # (Unicode standard, compatibility decomposition of U+00B5); OME writers use either.
    path = _ome_file(tmp_path / "a.ome.tif", PhysicalSizeX=0.65, PhysicalSizeXUnit=unit)
    assert read_ome_metadata(path).pixel_size_um == pytest.approx(0.65)


@pytest.mark.parametrize("key, name", [("PhysicalSizeX", "pixel_size_um"), ("TimeIncrement", "frame_interval_min")])
def test_a_zero_scale_in_the_metadata_is_an_error_naming_the_key(tmp_path, key, name):
    scale = {"PhysicalSizeX": 0.65, "TimeIncrement": 300} | {key: 0}
    path = _ome_file(tmp_path / "a.ome.tif", **scale)
    with pytest.raises(InputError, match=rf"a.ome.tif.*gives {name} = 0, not a positive number.*set images.{name}"):
        image_scale({"pixel_size_um": None, "frame_interval_min": None}, path)
