"""The bad-input catalogue, second part: images, sites and plates that are wrong in ways a lab meets.

Each case asserts the message (file, well, fix) or the QC flag and ledger entry, and that what
was right is kept. The first part (layouts, screen sheets, templates, truncated TIFFs, missing
frames and folders, unknown config keys and wells) is in test_inputs.py.
"""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tifffile
from conftest import minimal_config, plate_tables, run_snakemake, tiny_well_settings
from test_plate_stage import _plate

from plateloom.errors import InputError
from plateloom.io.images import index_plate_images, stream_site, unmatched_note
from plateloom.plate.exclusions import ExclusionRules
from plateloom.plate.stage import PlateDesign, PlateSettings, WellTables, build_plate_tables
from plateloom.screen.model_wells import build_model_wells
from plateloom.well.stage import WellSettings, analyse_well

TEMPLATE = "{well}_s{site}_{channel}.tif"


def _settings(channels=("dna",)) -> WellSettings:
    return tiny_well_settings(channels)


def _nuclei_stack(frames=3, size=64, level=1000, dtype=np.uint16):
    yy, xx = np.mgrid[:size, :size]
    image = np.full((size, size), 100.0)
    image[(yy - 32) ** 2 + (xx - 32) ** 2 < 64] += level
    return np.repeat(image[None], frames, axis=0).astype(dtype)


def _index(folder: Path, channels=("dna",)):
    return index_plate_images(str(folder), TEMPLATE, 96, list(channels))


def test_files_that_fit_no_template_field_are_listed_in_a_plate_note(tmp_path):
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", _nuclei_stack(), photometric="minisblack")
    (tmp_path / "A01_s1_dna_copy.tif").write_bytes(b"x")
    (tmp_path / "notes.txt").write_text("from the microscope")
    (tmp_path / "A01_s1_brightfield.tif").write_bytes(b"x")  # a channel not in config
    note = unmatched_note(str(tmp_path), TEMPLATE, 96, ["dna"])
    assert note.startswith("3 file(s) in ")
    for name in ("A01_s1_dna_copy.tif", "notes.txt", "A01_s1_brightfield.tif"):
        assert repr(name) in note
    assert "Fix: rename them" in note
    assert len(_index(tmp_path).table) == 1  # the good file is still analysed


def _problems(folder, channels=("dna",)):
    return [item.problem for item in stream_site(_index(folder, channels), "A01", 1, list(channels))]


def test_rgb_page_is_named_with_its_shape(tmp_path):
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", np.zeros((32, 32, 3), np.uint8), photometric="rgb")
    assert _problems(tmp_path)[0].endswith(
        "A01_s1_dna.tif: expected one 2-D plane per page, found shape (32, 32, 3). Fix: save one channel per file "
        "(and one page per frame for stacks)."
    )
    # every frame of the site is unusable: the site comes back empty with every frame flagged (the
    # ledger's unusable_frame rows), and the chunk's other wells are not lost
    cells, tracks, qc = analyse_well(_index(tmp_path), "A01", _settings())
    assert len(cells) == 0 and len(tracks) == 0 and "area_um2" in cells.columns
    assert qc["frame_problem"].str.contains(r"found shape \(32, 32, 3\)").all()


def test_a_wrong_size_first_frame_is_flagged_and_the_rest_of_the_site_analysed(tmp_path):
    good = _nuclei_stack(frames=4, size=64)
    dna = [good[0][:48, :48]] + list(good[1:])  # frame 0 of the first channel read has another size
    for frame in range(4):
        tifffile.imwrite(tmp_path / f"A01_s1_t{frame}_dna.tif", dna[frame])
        tifffile.imwrite(tmp_path / f"A01_s1_t{frame}_gfp.tif", good[frame])
    index = index_plate_images(str(tmp_path), "{well}_s{site}_t{frame}_{channel}.tif", 96, ["dna", "gfp"])
    cells, _, qc = analyse_well(index, "A01", _settings(channels=("dna", "gfp")))
    problem = qc.set_index("frame")["frame_problem"].fillna("")
    assert "A01_s1_t0_dna.tif: plane shape (48, 48) differs from the expected (64, 64)" in problem[0]
    assert (problem[[1, 2, 3]] == "").all() and sorted(cells["frame"].unique()) == [1, 2, 3]


def test_a_site_of_another_size_than_the_plate_is_flagged_not_fatal(tmp_path):
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", _nuclei_stack(frames=3, size=48), photometric="minisblack")
    flat_field = np.ones((1, 64, 64), np.float32)  # the plate's size, from its illumination profile
    cells, _, qc = analyse_well(_index(tmp_path), "A01", _settings(), flat_field)
    assert len(cells) == 0
    assert qc["frame_problem"].str.contains(r"plane shape \(48, 48\) differs from the expected \(64, 64\)").all()


def test_channels_of_different_sizes_are_named(tmp_path):
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", _nuclei_stack(size=64), photometric="minisblack")
    tifffile.imwrite(tmp_path / "A01_s1_gfp.tif", _nuclei_stack(size=48), photometric="minisblack")
    problems = _problems(tmp_path, ("dna", "gfp"))
    assert len(problems) == 3 and all("A01_s1_gfp.tif: plane shape (48, 48) differs" in p for p in problems)


def test_missing_channel_is_named(tmp_path):
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", _nuclei_stack(), photometric="minisblack")
    with pytest.raises(InputError, match=r"well A01, site 1: no image for channel 'gfp'.*filename_template"):
        list(stream_site(_index(tmp_path, ("dna", "gfp")), "A01", 1, ["dna", "gfp"]))


def test_a_stack_shorter_than_the_other_channel_flags_the_missing_frames_and_keeps_the_rest(tmp_path):
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", _nuclei_stack(frames=3), photometric="minisblack")
    tifffile.imwrite(tmp_path / "A01_s1_gfp.tif", _nuclei_stack(frames=2), photometric="minisblack")
    cells, _, qc = analyse_well(_index(tmp_path, ("dna", "gfp")), "A01", _settings(("dna", "gfp")))
    assert sorted(cells["frame"].unique()) == [0, 1]
    problem = qc.set_index("frame")["frame_problem"]
    assert problem[0] == "" and problem[1] == ""
    assert "A01_s1_gfp.tif: has 2 pages while another channel has 3; frame 2 is missing" in problem[2]
    assert "Fix: re-copy or re-export the file" in problem[2]


def test_nan_pixels_flag_their_frame_and_the_rest_of_the_well_is_analysed(tmp_path):
    stack = _nuclei_stack(dtype=np.float32)
    stack[1, 5, 5] = np.nan
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", stack, photometric="minisblack")
    cells, _, qc = analyse_well(_index(tmp_path), "A01", _settings())
    assert sorted(cells["frame"].unique()) == [0, 2]
    flagged = qc[qc["frame_problem"] != ""]
    assert flagged["frame"].tolist() == [1]
    assert flagged["frame_problem"].iloc[0].startswith("well A01, site 1, frame 1: ")
    assert "image holds NaN or infinite pixels" in flagged["frame_problem"].iloc[0]
    from plateloom.plate.exclusions import site_frame_exclusions

    ledger = site_frame_exclusions(qc.assign(well="A01"), ExclusionRules.defaults(), "P1")
    assert ledger[["well", "frame", "rule"]].values.tolist() == [["A01", 1, "unusable_frame"]]


def test_a_frame_of_the_wrong_shape_or_pixel_type_is_flagged(tmp_path):
    for frame in range(4):
        plane = _nuclei_stack(frames=1)[0]
        if frame == 1:
            plane = plane[:40, :40]  # wrong shape
        if frame == 2:
            plane = plane.astype(np.complex64)  # wrong pixel type
        tifffile.imwrite(tmp_path / f"A01_s1_t{frame}_dna.tif", plane)
    index = index_plate_images(str(tmp_path), "{well}_s{site}_t{frame}_{channel}.tif", 96, ["dna"])
    cells, _, qc = analyse_well(index, "A01", _settings())
    problem = qc.set_index("frame")["frame_problem"]
    assert "plane shape (40, 40) differs" in problem[1]
    assert "pixel type complex64 is not numeric" in problem[2]
    assert sorted(cells["frame"].unique()) == [0, 3]


def test_all_black_site_gives_an_empty_well_not_a_crash(tmp_path):
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", np.zeros((3, 64, 64), np.uint16), photometric="minisblack")
    cells, tracks, qc = analyse_well(_index(tmp_path), "A01", _settings())
    assert len(cells) == 0 and len(tracks) == 0
    assert list(qc["n_objects"]) == [0, 0, 0]


def test_saturated_site_is_measured_and_flagged(tmp_path):
    stack = _nuclei_stack(level=70000 - 100, dtype=np.uint32).clip(0, 65535).astype(np.uint16)
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", stack, photometric="minisblack")
    _, _, qc = analyse_well(_index(tmp_path), "A01", _settings())
    assert (qc["saturated_fraction_dna"] > 0.04).all()


def test_paths_with_spaces_and_non_ascii_letters_are_read(tmp_path):
    folder = tmp_path / "my plates" / "Prüfung 1"
    folder.mkdir(parents=True)
    tifffile.imwrite(folder / "A01_s1_dna.tif", _nuclei_stack(), photometric="minisblack")
    cells, _, _ = analyse_well(_index(folder), "A01", _settings())
    assert len(cells) == 3 and cells["area_um2"].iloc[0] == pytest.approx(np.pi * 64, rel=0.15)


def test_well_with_no_cells_is_excluded_with_a_ledger_entry():
    cells, tracks, qc, layout = _plate()
    cells = cells[cells["well"] != "C03"]
    tracks = tracks[tracks["well"] != "C03"]
    qc.loc[qc["well"] == "C03", "n_objects"] = 0
    tables = plate_tables(cells, tracks, qc, layout)
    row = tables.profile.set_index("well").loc["C03"]
    assert row["cell_count"] == 0 and row["excluded_by"].startswith("min_cells_per_well")
    assert ((tables.ledger["well"] == "C03") & (tables.ledger["rule"] == "min_cells_per_well")).any()
    assert len(tables.profile) == 96  # no row dropped


def test_plate_whose_every_well_fails_qc_leaves_the_model_and_the_rest_continues():
    cells, tracks, qc, layout = _plate(seed=1)
    failing = plate_tables(cells.iloc[0:0], tracks.iloc[0:0], qc.assign(n_objects=0), layout)
    assert (failing.profile["excluded_by"] != "").all()
    assert (failing.ledger["rule"] == "min_cells_per_well").sum() == 96
    good = [_plate_tables_of_seed(s, layout).profile for s in (2, 3)]
    wells = pd.concat([failing.profile, *good], ignore_index=True)
    model = build_model_wells(wells, ["area_um2"], {"area_um2"}, "control_location")
    assert set(model.wells["plate"]) == {"P2", "P3"}


def test_config_value_of_the_wrong_type_stops_the_workflow_with_its_key(workflow_dir):
    config = workflow_dir / "config" / "config.yaml"
    config.write_text(config.read_text().replace("chunk_wells: 24", "chunk_wells: twenty"))
    result = run_snakemake(workflow_dir, "-n", check=False)
    output = result.stdout + result.stderr
    assert result.returncode != 0
    assert "chunk_wells" in output and "'twenty' is not of type 'integer'" in output


def _plate_tables_of_seed(seed, layout):
    cells, tracks, qc = _plate(seed=seed)[:3]
    return build_plate_tables(
        cells,
        WellTables(tracks, qc),
        PlateDesign(f"P{seed}", f"d{seed}", 96, layout),
        PlateSettings.defaults(),
        ExclusionRules.defaults(),
    )


@pytest.mark.parametrize(
    ("content", "said"),
    [
        (b"well,role,condition,dose,dose_unit\nA01,negative_control,v\xe9hicle,,\n", "utf-8"),
        (b"", "not a readable CSV"),
        (b"wel,role,condition,dose,dose_unit\nA01,negative_control,v,,\n", "missing column(s) well"),
    ],
    ids=["latin-1", "zero bytes", "misspelt column"],
)
def test_check_reports_an_unreadable_layout_without_a_traceback(tmp_path, content, said):
    from plateloom.setup.check import check_screen

    (tmp_path / "images").mkdir()
    (tmp_path / "layout.csv").write_bytes(content)
    sheet = tmp_path / "plates.csv"
    sheet.write_text(
        f"plate,batch,plate_format,layout,image_folder\nP1,d1,96,{tmp_path}/layout.csv,{tmp_path}/images\n"
    )
    config = minimal_config(sheet)
    report = check_screen(config)
    assert any(said in e.message and "layout.csv" in e.message for e in report.errors), report.text()


def test_check_names_an_8_bit_site_in_a_16_bit_plate_and_a_possible_z_stack(tmp_path):
    from plateloom.setup.check import check_screen

    images = tmp_path / "images"
    images.mkdir()
    for well in ("A01", "A02", "A03", "A04", "A05"):
        stack = _nuclei_stack(frames=3)
        if well == "A02":
            stack = (stack // 16).astype(np.uint8)  # one site exported as 8-bit
        if well == "A03":
            stack = np.concatenate([stack, stack])  # 2 z planes per frame saved as pages
        tifffile.imwrite(images / f"{well}_s1_dna.tif", stack, photometric="minisblack")
    layout = tmp_path / "layout.csv"
    layout.write_text(
        "well,role,condition,dose,dose_unit\nA01,negative_control,vehicle,,\n"
        + "".join(f"A0{i},test,X,1,uM\n" for i in range(2, 6))
    )
    sheet = tmp_path / "plates.csv"
    sheet.write_text(f"plate,batch,plate_format,layout,image_folder\nP1,d1,96,{layout},{images}\n")
    text = check_screen(minimal_config(sheet, TEMPLATE)).text()
    assert "A02_s1_dna.tif: pixel type uint8 differs from the plate's uint16" in text
    assert "well A03, site 1, channel dna: has 6 pages, 2 times the plate's usual 3: possibly a z-stack" in text


@pytest.mark.parametrize(
    ("text", "said"),
    [
        ("screen_sheet: [unclosed\n", "is not valid YAML at line 2, column 1"),
        ("- a list\n- not a mapping\n", "is not a mapping of keys to values"),
    ],
    ids=["yaml syntax", "not a mapping"],
)
def test_a_config_that_is_not_yaml_is_named_without_a_traceback(tmp_path, text, said):
    from plateloom.setup.check import load_config

    path = tmp_path / "config.yaml"
    path.write_text(text)
    with pytest.raises(InputError) as caught:
        load_config(str(path))
    assert said in str(caught.value) and "config.yaml" in str(caught.value) and "Fix:" in str(caught.value)


def test_an_8_bit_site_in_a_16_bit_plate_is_flagged_not_measured(tmp_path):
    from plateloom.io.images import usual_pixel_type
    from plateloom.well.chunk import ChunkOutputs, analyse_chunk

    images = tmp_path / "images"
    images.mkdir()
    for well in ("A01", "A02", "A03", "A04"):
        stack = _nuclei_stack(frames=3)
        if well == "A03":
            stack = (stack // 16).astype(np.uint8)  # exported at another bit depth
        tifffile.imwrite(images / f"{well}_s1_dna.tif", stack, photometric="minisblack")
    index = _index(images)
    assert usual_pixel_type(index) == "uint16"
    out = tmp_path / "out"
    folders = ChunkOutputs(str(out / "cells"), str(out / "tracks"), str(out / "site_qc"))
    analyse_chunk(index, "P1", ["A01", "A02", "A03", "A04"], _settings(), folders, {})
    qc = pd.concat(pd.read_parquet(p) for p in sorted((out / "site_qc").glob("well=*/part-0.parquet")))
    flagged = qc[qc["frame_problem"].fillna("") != ""]
    assert set(flagged["well"]) == {"A03"} and len(flagged) == 3
    assert (
        flagged["frame_problem"].str.contains("A03_s1_dna.tif: pixel type uint8 differs from the plate's uint16").all()
    )
    cells = pd.concat(pd.read_parquet(p) for p in sorted((out / "cells").glob("well=*/part-0.parquet")))
    assert set(cells["well"]) == {"A01", "A02", "A04"}


def test_an_empty_image_file_costs_only_its_site(tmp_path):
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", _nuclei_stack(), photometric="minisblack")
    (tmp_path / "A01_s2_dna.tif").write_bytes(b"")  # an interrupted copy
    cells, _, qc = analyse_well(_index(tmp_path), "A01", _settings())
    assert set(cells["site"]) == {1} and len(cells) > 0
    flagged = qc[qc["frame_problem"].fillna("") != ""]
    assert flagged["site"].tolist() == [2]
    assert (
        "well A01, site 2:" in flagged["frame_problem"].iloc[0] and "A01_s2_dna.tif" in flagged["frame_problem"].iloc[0]
    )
    # a well whose only site cannot be read has the site-QC columns (and types) of any other well
    (tmp_path / "A01_s1_dna.tif").write_bytes(b"")
    _, _, unreadable = analyse_well(_index(tmp_path), "A01", _settings())
    assert list(unreadable.columns) == list(qc.columns)
    assert unreadable["links"].dtype == qc["links"].dtype == np.int64


def test_exported_labels_are_an_ome_tiff_time_series_matching_the_cells_table(tmp_path):
    # Reference: tifffile's OME-TIFF reader (axes, physical size in the OME-XML); the label under each
    # nucleus's centroid is its object number in the cells table of that frame.
    from plateloom.well.chunk import ChunkOutputs, analyse_chunk

    images = tmp_path / "images"
    images.mkdir()
    tifffile.imwrite(images / "A01_s1_dna.tif", _nuclei_stack(frames=3), photometric="minisblack")
    (images / "A01_s2_dna.tif").write_bytes(b"")  # an unreadable site: no labels written for it
    out = tmp_path / "out"
    folders = ChunkOutputs(str(out / "cells"), str(out / "tracks"), str(out / "site_qc"), labels=str(out / "labels"))
    analyse_chunk(_index(images), "P1", ["A01"], _settings(), folders, {})
    assert sorted(p.name for p in (out / "labels").iterdir()) == ["A01_s1.ome.tif"]
    with tifffile.TiffFile(out / "labels" / "A01_s1.ome.tif") as tif:
        assert tif.is_ome and tif.series[0].axes == "TYX"
        labels = tif.asarray()
        assert 'PhysicalSizeX="1.0"' in tif.ome_metadata and 'TimeIncrement="1.0"' in tif.ome_metadata
    cells = pd.read_parquet(out / "cells" / "well=A01" / "part-0.parquet")
    cells = cells[cells["site"] == 1]
    assert labels.shape[0] == 3 and len(cells) > 0
    x = np.rint(cells["centroid_x_um"].to_numpy()).astype(int)  # 1 um pixels
    y = np.rint(cells["centroid_y_um"].to_numpy()).astype(int)
    assert (labels[cells["frame"].to_numpy(), y, x] == cells["object"].to_numpy()).mean() > 0.95
