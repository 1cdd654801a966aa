"""Bad input fails fast with a message naming the file, row or key, and the fix."""

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import tifffile
from conftest import minimal_config, run_snakemake, tiny_well_settings

from plateloom.errors import InputError
from plateloom.io.images import index_plate_images, stream_site, template_regex
from plateloom.setup.screen_sheet import load_layout, load_screen_sheet
from plateloom.well.stage import WellSettings, analyse_well

HEADER = "well,role,condition,dose,dose_unit\n"


def _layout(tmp_path: Path, body: str) -> str:
    path = tmp_path / "layout.csv"
    path.write_text(HEADER + body)
    return str(path)


@pytest.mark.parametrize(
    "body, needle",
    [
        (
            "M13,test,X,1,uM\nA01,negative_control,vehicle,,\n",
            "row 2, column well: well 'M13' is not on a 96-well plate",
        ),
        (
            "A01,negative_control,vehicle,,\nA1,test,X,1,uM\n",
            "row 3, column well: well A01 is listed twice (also row 2)",
        ),
        ("A01,negative_control,vehicle,,\nA02,treated,X,1,uM\n", "row 3, column role: unknown role 'treated'"),
        ("A01,negative_control,vehicle,,\nA02,test,X,1,\n", "row 3, column dose_unit: well A02 has a dose but no unit"),
        ("A01,test,X,1,uM\n", "the layout has no negative_control wells"),
        (
            "A01,negative_control,vehicle,,\nA02,test,negative_control,,\n",
            "row 3, column condition: condition 'negative_control' is the name of a role",
        ),
        (
            "A01,negative_control,vehicle,,\nA02,test,X,300,nM\nA03,test,X,1,uM\n",
            "condition 'X' is dosed in nM and uM",
        ),
    ],
)
def test_bad_layouts_are_named(tmp_path, body, needle):
    path = _layout(tmp_path, body)
    with pytest.raises(InputError) as caught:
        load_layout(path, 96)
    assert str(caught.value).startswith(path)
    assert needle in str(caught.value)
    assert "Fix:" in str(caught.value)


def test_condition_names_with_markup_commas_and_non_ascii_are_kept(tmp_path):
    path = _layout(tmp_path, 'A01,negative_control,vehicle,,\nA02,test,"<b>Ölsäure, 2""x</b>",1,uM\n')
    layout = load_layout(path, 96)
    assert layout.loc[1, "treatment"] == '<b>Ölsäure, 2"x</b> 1 uM'


def test_bad_screen_sheets_are_named(tmp_path):
    layout = _layout(tmp_path, "A01,negative_control,vehicle,,\n")
    sheet = tmp_path / "plates.csv"
    sheet.write_text(f"plate,batch,plate_format,layout,image_folder\nP1,d1,96,{layout},img\nP1,d1,96,{layout},img\n")
    with pytest.raises(InputError, match=r"row 3: plate id 'P1' already used in row 2"):
        load_screen_sheet(str(sheet))
    sheet.write_text("plate,batch,plate_format,layout,image_folder\nP1,d1,96,missing.csv,img\n")
    with pytest.raises(InputError, match=r"row 2, column layout: layout file 'missing.csv' does not exist"):
        load_screen_sheet(str(sheet))
    sheet.write_text(f"plate,batch,plate_format,layout,image_folder\nP1,d1,95,{layout},img\n")
    with pytest.raises(InputError, match=r"column plate_format: '95' is not a plate format"):
        load_screen_sheet(str(sheet))


def test_two_plates_on_one_image_folder_are_refused(tmp_path):
    layout = _layout(tmp_path, "A01,negative_control,vehicle,,\n")
    (tmp_path / "img").mkdir()
    sheet = tmp_path / "plates.csv"
    sheet.write_text(
        f"plate,batch,plate_format,layout,image_folder\nP1,d1,96,{layout},{tmp_path}/img\nP2,d1,96,{layout},{tmp_path}/img/\n"
    )
    with pytest.raises(InputError, match=r"plate P2, column image_folder: .* is also the image folder of plate P1"):
        load_screen_sheet(str(sheet))


def test_a_compound_dosed_in_two_units_across_layouts_stops_the_plan(tmp_path):
    from plateloom.setup.plan import plan_screen

    first = tmp_path / "a.csv"
    first.write_text(HEADER + "A01,negative_control,vehicle,,\nA02,test,X,300,nM\n")
    second = tmp_path / "b.csv"
    second.write_text(HEADER + "A01,negative_control,vehicle,,\nA02,test,X,0.3,uM\n")
    for plate in ("P1", "P2"):
        (tmp_path / plate).mkdir()
    sheet = tmp_path / "plates.csv"
    sheet.write_text(
        "plate,batch,plate_format,layout,image_folder\n"
        f"P1,d1,96,{first},{tmp_path}/P1\nP2,d1,96,{second},{tmp_path}/P2\n"
    )
    config = minimal_config(sheet)
    with pytest.raises(InputError, match=r"condition 'X' is dosed in nM and uM"):
        plan_screen(config)


def test_two_spellings_of_one_well_are_refused_naming_both_files(tmp_path):
    for name in ("A7_s1_dna.tif", "A07_s1_dna.tif"):
        (tmp_path / name).write_bytes(b"II*\x00")
    with pytest.raises(InputError) as caught:
        index_plate_images(str(tmp_path), "{well}_s{site}_{channel}.tif", 96, ["dna"])
    said = str(caught.value)
    assert "A07_s1_dna.tif" in said and "A7_s1_dna.tif" in said and "spelt another way" in said


def test_template_needs_its_fields():
    with pytest.raises(InputError, match="filename_template"):
        template_regex("{well}_{colour}.tif")
    assert (
        template_regex("{well}_s{site}_t{frame}_{channel}.tif").match("B03_s2_t0007_dapi.tif").group("frame") == "0007"
    )


def _settings() -> WellSettings:
    return tiny_well_settings(("dna",))


def test_missing_image_of_a_listed_well_is_named(tmp_path):
    tifffile.imwrite(tmp_path / "A01_s1_dna.tif", np.zeros((2, 32, 32), np.uint16), photometric="minisblack")
    index = index_plate_images(str(tmp_path), "{well}_s{site}_{channel}.tif", 96, ["dna"])
    with pytest.raises(InputError, match="well B02: the layout lists this well but no image of it was found"):
        analyse_well(index, "B02", _settings())


def test_truncated_tiff_is_named(tmp_path):
    path = tmp_path / "A01_s1_dna.tif"
    tifffile.imwrite(path, np.ones((3, 64, 64), np.uint16), photometric="minisblack")
    path.write_bytes(path.read_bytes()[:100])
    index = index_plate_images(str(tmp_path), "{well}_s{site}_{channel}.tif", 96, ["dna"])
    with pytest.raises(InputError, match=r"A01_s1_dna.tif: cannot be read as TIFF.*re-copy the file"):
        list(stream_site(index, "A01", 1, ["dna"]))


def test_missing_frame_in_a_per_frame_series_is_flagged_and_the_rest_read(tmp_path):
    for frame in (0, 1, 3, 4):
        tifffile.imwrite(tmp_path / f"A01_s1_t{frame}_dna.tif", np.ones((16, 16), np.uint16))
    index = index_plate_images(str(tmp_path), "{well}_s{site}_t{frame}_{channel}.tif", 96, ["dna"])
    frames = list(stream_site(index, "A01", 1, ["dna"]))
    assert [f.frame for f in frames] == [0, 1, 2, 3, 4]
    assert [f.planes is None for f in frames] == [False, False, True, False, False]
    assert frames[2].problem == (
        "well A01, site 1, frame 2: well A01, site 1, channel dna: frame 2 is missing from the "
        "series. Fix: re-export the missing frame; the other frames are analysed."
    )


def test_unknown_config_key_stops_the_workflow_with_its_name(workflow_dir):
    config = workflow_dir / "config" / "config.yaml"
    config.write_text(config.read_text().replace("chunk_wells: 24", "chunk_wells: 24\nchunk_welz: 3"))
    result = run_snakemake(workflow_dir, "-n", check=False)
    assert result.returncode != 0
    assert "chunk_welz" in result.stdout + result.stderr


def test_unknown_well_stops_the_workflow_naming_layout_row(workflow_dir):
    layout = workflow_dir / "config" / "layouts" / "demo_96.csv"
    layout.write_text(layout.read_text() + "Q01,test,LOOM-101,1,uM\n")
    result = run_snakemake(workflow_dir, "-n", check=False)
    output = result.stdout + result.stderr
    assert result.returncode != 0
    assert "config/layouts/demo_96.csv, row 98, column well: well 'Q01' is not on a 96-well plate" in output


def test_missing_image_folder_stops_the_workflow_naming_the_plate(workflow_dir):
    sheet = workflow_dir / "config" / "plates.csv"
    sheet.write_text(sheet.read_text() + "LAB-1,day4,96,config/layouts/demo_96.csv,/nonexistent/plate1\n")
    result = run_snakemake(workflow_dir, "-n", check=False)
    output = result.stdout + result.stderr
    assert result.returncode != 0
    assert "plate LAB-1, column image_folder: image folder '/nonexistent/plate1' does not exist" in output


@pytest.mark.parametrize("batch", ["</script><img src=x onerror=document.title=42>", 'day1"}', "=cmd()"])
def test_a_batch_with_markup_is_refused_before_it_reaches_job_parameters(tmp_path, batch):
    # Snakemake's --report writes job parameters into an inline script unescaped; the batch is a
    # job parameter, so it is kept to a plain set of characters.
    layout = _layout(tmp_path, "A01,negative_control,vehicle,,\n")
    sheet = tmp_path / "plates.csv"
    pd.DataFrame([{"plate": "P1", "batch": batch, "plate_format": 96, "layout": layout, "image_folder": "img"}]).to_csv(
        sheet, index=False
    )
    with pytest.raises(InputError, match=r"row 2, column batch: batch .* has characters other than"):
        load_screen_sheet(str(sheet))


@pytest.mark.parametrize("batch", ["2026-11-03", "day 1", "run_4.b", "2026/11/03 10:00", "A+B"])
def test_plain_batch_labels_are_accepted(tmp_path, batch):
    layout = _layout(tmp_path, "A01,negative_control,vehicle,,\n")
    sheet = tmp_path / "plates.csv"
    sheet.write_text(f"plate,batch,plate_format,layout,image_folder\nP1,{batch},96,{layout},img\n")
    assert load_screen_sheet(str(sheet))[0].batch == batch


def test_a_misspelt_config_key_gets_one_short_line_with_the_closest_key():
    from plateloom.settings import config_problems, demo_config

    config = demo_config()
    config["kinetcs"] = {"window_min": 20}
    config["screen"]["fiter"] = "exact"
    config["plate"]["well_summary"] = "mean"
    problems = config_problems(config)
    assert problems[0] == "kinetcs: not a known key (did you mean kinetics?)"
    assert "plate.well_summary: 'mean' is not one of ['median', 'mean_log']" in problems
    assert "screen.fiter: not a known key (did you mean fitter?)" in problems
    assert len(problems) == 3 and sum(len(p) for p in problems) < 300  # not the whole schema
    assert config_problems(demo_config()) == []
