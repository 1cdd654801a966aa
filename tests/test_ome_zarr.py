"""OME-Zarr (NGFF) high-content plates: read through the plate / well / field hierarchy and analysed to
the same tables as the same images given as TIFF files. The store is written with ome-zarr's own writer
(the reference implementation of the format, Moore et al. 2021, Nat. Methods 18:1496)."""

import numpy as np
import pandas as pd
import pytest
import tifffile
from conftest import ROOT

from plateloom.demo.scenario import QUANTITIES, load_scenario
from plateloom.demo.simulate import simulate_site
from plateloom.io.images import index_plate_images, read_ome_metadata
from plateloom.well.stage import WellSettings, analyse_well

ome_writer = pytest.importorskip("ome_zarr.writer")
zarr = pytest.importorskip("zarr")

CHANNELS = ("nuclear", "reporter")
WELLS = {"B02": ("B", "2"), "C03": ("C", "3")}


def _stacks():
    scenario = load_scenario(str(ROOT / "resources/demo/scenario.yaml"), frames=3, image_size_px=96)
    scenario["cells_per_site"] = 8
    factor = {q: 1.0 for q in QUANTITIES}
    return {
        (well, site): simulate_site(scenario, factor, np.random.default_rng([i, site]))
        for i, well in enumerate(WELLS)
        for site in (1, 2)
    }


def _write_zarr_plate(path, stacks):
    root = zarr.open_group(str(path), mode="w")
    ome_writer.write_plate_metadata(root, ["B", "C"], ["2", "3"], ["/".join(p) for p in WELLS.values()])
    for well, (row, column) in WELLS.items():
        group = root.require_group(row).require_group(column)
        ome_writer.write_well_metadata(group, ["0", "1"])
        for field in ("0", "1"):
            channels = [
                {
                    "label": name,
                    "color": "FFFFFF",
                    "active": True,
                    "window": {"start": 0, "end": 65535, "min": 0, "max": 65535},
                }
                for name in CHANNELS
            ]
            ome_writer.write_image(
                image=stacks[(well, int(field) + 1)],
                group=group.require_group(field),
                axes="tcyx",
                scale_factors=[],
                scale={"t": 300.0, "c": 1.0, "y": 0.8, "x": 0.8},
                axes_units={"t": "second", "y": "micrometer", "x": "micrometer"},
                omero={"channels": channels, "rdefs": {"model": "greyscale"}},
                storage_options={"chunks": (1, 1, 96, 96)},
            )


def test_ome_zarr_plate_gives_the_same_tables_as_tiff_files(tmp_path):
    stacks = _stacks()
    tiff_folder = tmp_path / "tiff"
    tiff_folder.mkdir()
    for (well, site), stack in stacks.items():
        for channel, name in enumerate(CHANNELS):
            tifffile.imwrite(tiff_folder / f"{well}_s{site}_{name}.tif", stack[:, channel], photometric="minisblack")
    store = tmp_path / "plate.zarr"
    _write_zarr_plate(store, stacks)
    settings = WellSettings.of_demo(channels=CHANNELS)
    from_tiff = index_plate_images(str(tiff_folder), "{well}_s{site}_{channel}.tif", 96, list(CHANNELS))
    from_zarr = index_plate_images(str(store), "{well}_s{site}_{channel}.tif", 96, list(CHANNELS))
    assert from_zarr.source == "zarr" and sorted(from_zarr.table["well"].unique()) == ["B02", "C03"]
    assert sorted(from_zarr.table["site"].unique()) == [1, 2]
    for well in WELLS:
        tiff_tables = analyse_well(from_tiff, well, settings)
        zarr_tables = analyse_well(from_zarr, well, settings)
        for a, b in zip(tiff_tables, zarr_tables):
            assert len(a) > 0
            pd.testing.assert_frame_equal(a, b)
    metadata = read_ome_metadata(from_zarr.table["path"].iloc[0])
    assert metadata.pixel_size_um == pytest.approx(0.8) and metadata.frame_interval_min == pytest.approx(5.0)
    assert metadata.channel_names == CHANNELS


def test_a_store_that_is_no_plate_is_named(tmp_path):
    from plateloom.errors import InputError

    zarr.open_group(str(tmp_path / "x.zarr"), mode="w")
    with pytest.raises(InputError, match=r"x.zarr: has no OME-Zarr plate metadata"):
        index_plate_images(str(tmp_path / "x.zarr"), "{well}_s{site}_{channel}.tif", 96, ["nuclear"])


def test_multichannel_ome_tiff_per_site_gives_the_same_tables_as_one_file_per_channel(tmp_path):
    # One OME-TIFF per site with axes TCYX and the channel names in its OME metadata (OME data model).
    stacks = _stacks()
    per_channel, per_site = tmp_path / "per_channel", tmp_path / "per_site"
    per_channel.mkdir()
    per_site.mkdir()
    for (well, site), stack in stacks.items():
        for channel, name in enumerate(CHANNELS):
            tifffile.imwrite(per_channel / f"{well}_s{site}_{name}.tif", stack[:, channel], photometric="minisblack")
        tifffile.imwrite(
            per_site / f"{well}_s{site}.ome.tif",
            stack,
            ome=True,
            metadata={"axes": "TCYX", "Channel": {"Name": list(CHANNELS)}, "PhysicalSizeX": 0.8},
        )
    settings = WellSettings.of_demo(channels=CHANNELS, reporter_channels=())
    one = index_plate_images(str(per_channel), "{well}_s{site}_{channel}.tif", 96, list(CHANNELS))
    multi = index_plate_images(str(per_site), "{well}_s{site}.ome.tif", 96, list(CHANNELS))
    assert multi.source == "ome_tiff" and len(multi.table) == 8
    for a, b in zip(analyse_well(one, "C03", settings), analyse_well(multi, "C03", settings)):
        assert len(a) > 0
        pd.testing.assert_frame_equal(a, b)
