"""Your own plates: scaffold a screen from an invented image folder, check it before launch, run it.

The image folders are invented for these tests (cell line and compounds of the demo scenario).
"""

import dataclasses
import os
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest
import tifffile
import yaml
from conftest import ROOT, copy_workflow, run_snakemake

from plateloom.demo.scenario import QUANTITIES, load_scenario
from plateloom.demo.simulate import simulate_site
from plateloom.errors import InputError
from plateloom.setup.check import check_screen, load_config
from plateloom.setup.plan import resolve_features
from plateloom.setup.scaffold import infer_template, survey_folder, write_scaffold

WELLS = [f"{row}{col:02d}" for row in "BC" for col in range(2, 8)]  # 12 wells
DAY = 86400.0
OME = {"PhysicalSizeX": 0.8, "PhysicalSizeXUnit": "µm", "TimeIncrement": 300.0, "TimeIncrementUnit": "s"}


@pytest.mark.parametrize(
    "names, template",
    [
        (
            ["B03_s1_t000_dapi.tif", "B03_s1_t001_dapi.tif", "B03_s2_t000_gfp.tif", "C11_s2_t001_gfp.tif"],
            "{well}_s{site}_t{frame}_{channel}.tif",
        ),
        (["B03-pos1-hoechst.tiff", "B03-pos2-ktr.tiff", "H12-pos1-ktr.tiff"], "{well}-pos{site}-{channel}.tiff"),
        (
            [
                "exp7_A01_site3_T0007_cy5.ome.tif",
                "exp7_A01_site3_T0008_cy5.ome.tif",
                "exp7_B02_site1_T0007_dapi.ome.tif",
            ],
            "exp7_{well}_site{site}_T{frame}_{channel}.ome.tif",
        ),
        # a single-channel folder: the one stain's name is the channel
        (
            ["B03_s1_t000_dapi.tif", "B03_s2_t001_dapi.tif", "C11_s1_t000_dapi.tif"],
            "{well}_s{site}_t{frame}_{channel}.tif",
        ),
        (["run_B03_s1_H2B.tif", "run_C04_s2_H2B.tif"], "run_{well}_s{site}_{channel}.tif"),
    ],
)
def test_filename_templates_are_inferred(names, template):
    assert infer_template(names) == template


def _site_stack(seed, frames=4, size=128):
    scenario = load_scenario(str(ROOT / "resources/demo/scenario.yaml"), frames=frames, image_size_px=size)
    scenario["cells_per_site"] = 10
    factor = {q: 1.0 for q in QUANTITIES}
    return simulate_site(scenario, factor, np.random.default_rng(seed))


def _write_plate(folder, style, seed, day):
    """One invented plate: 12 wells, 1 site, 4 frames, channels hoechst (nuclei) and ktr (a reporter)."""
    folder.mkdir(parents=True)
    for index, well in enumerate(WELLS):
        stack = _site_stack(seed * 100 + index)
        for channel, name in enumerate(("hoechst", "ktr")):
            if style == "per_frame":
                for frame in range(stack.shape[0]):
                    tifffile.imwrite(
                        folder / f"{well}_s1_t{frame:03d}_{name}.tif",
                        stack[frame, channel],
                        ome=True,
                        metadata={"axes": "YX", **OME},
                    )
            else:
                tifffile.imwrite(
                    folder / f"{well}-pos1-{name}.tiff", stack[:, channel], ome=True, metadata={"axes": "TYX", **OME}
                )
    for path in folder.iterdir():
        os.utime(path, (day, day))


def _fill_layout(path):
    layout = pd.read_csv(path, dtype=str, keep_default_na=False)
    roles = ["negative_control"] * 4 + ["test"] * 4 + ["test"] * 4
    layout["role"] = roles
    layout["condition"] = ["vehicle"] * 4 + ["LOOM-101"] * 4 + ["LOOM-104"] * 4
    layout["dose"] = [""] * 4 + ["1"] * 8
    layout["dose_unit"] = [""] * 4 + ["uM"] * 8
    layout.to_csv(path, index=False)


@pytest.mark.slow
@pytest.mark.parametrize("style", ["per_frame", "stacks"])
def test_scaffold_then_run_to_effects_without_editing_the_config(tmp_path, style):
    workdir = copy_workflow(tmp_path / "screen")
    now = time.time()
    _write_plate(workdir / "microscope" / "plateA", style, 1, now - 2 * DAY)
    _write_plate(workdir / "microscope" / "plateB", style, 2, now - DAY)
    scaffold = subprocess.run(
        [sys.executable, "-m", "plateloom", "scaffold", "microscope", "--out", "myscreen"],
        cwd=workdir,
        capture_output=True,
        text=True,
    )
    assert scaffold.returncode == 0, scaffold.stderr
    expected = "{well}_s{site}_t{frame}_{channel}.tif" if style == "per_frame" else "{well}-pos{site}-{channel}.tiff"
    assert f"filename template: {expected}" in scaffold.stdout
    assert "sites per well: 1; frames per site: 4" in scaffold.stdout
    assert "channels: hoechst, ktr" in scaffold.stdout and "pixel size: 0.8 um (OME metadata)" in scaffold.stdout
    sheet = pd.read_csv(workdir / "myscreen/plates.csv")
    assert sheet["plate"].tolist() == ["plateA", "plateB"]
    assert sheet["batch"].nunique() == 2  # imaging dates of the files
    assert sheet["plate_format"].tolist() == [96, 96]
    again = subprocess.run(
        [sys.executable, "-m", "plateloom", "scaffold", "microscope", "--out", "myscreen"],
        cwd=workdir,
        capture_output=True,
        text=True,
    )
    assert again.returncode == 2 and "never overwrites" in again.stderr
    _fill_layout(workdir / "myscreen/layouts/plate_96.csv")
    check = subprocess.run(
        [sys.executable, "-m", "plateloom", "check", "--config", "myscreen/config.yaml"],
        cwd=workdir,
        capture_output=True,
        text=True,
    )
    assert check.returncode == 0, check.stdout + check.stderr
    assert "0 error(s)." in check.stdout and "2 plates, 24 wells" in check.stdout
    run_snakemake(workdir, "myscreen/results/effects.parquet", "--configfile", "myscreen/config.yaml")
    effects = pd.read_parquet(workdir / "myscreen/results/effects.parquet")
    assert {"LOOM-101 1 uM", "LOOM-104 1 uM"} <= set(effects["treatment"])
    assert effects["estimate"].notna().all() and effects["ci_low"].notna().all()
    cells = pd.concat(
        pd.read_parquet(path) for path in (workdir / "myscreen/results/cells/plate=plateA").rglob("*.parquet")
    )
    assert "mean_intensity_ktr" in cells.columns and cells["frame"].nunique() == 4


def _planted_problem_screen(root):
    """A screen with planted problems, one or more of each kind the check must find."""
    images = root / "images"
    stack = _site_stack(1, frames=3, size=64)
    folders = {}
    for plate in ("P1", "P2", "P3"):
        folder = images / plate
        folder.mkdir(parents=True)
        folders[plate] = folder
        for well in ("B02", "B03", "B04"):
            for frame in range(3):
                for channel, name in enumerate(("dapi", "gfp")):
                    tifffile.imwrite(folder / f"{well}_s1_t{frame}_{name}.tif", stack[frame, channel])
    (folders["P1"] / "B03_s1_t1_gfp.tif").unlink()  # 1: a missing frame
    for frame in range(3):
        (folders["P1"] / f"B04_s1_t{frame}_gfp.tif").unlink()  # 2: a missing channel
    tifffile.imwrite(folders["P2"] / "B02_s1_t0_dapi.tif", np.zeros((48, 48), np.uint16))  # 3: another image size
    for frame in range(3):
        tifffile.imwrite(folders["P2"] / f"C09_s1_t{frame}_dapi.tif", stack[frame, 0])  # 4: imaged, not in the layout
        tifffile.imwrite(folders["P2"] / f"C09_s1_t{frame}_gfp.tif", stack[frame, 1])
    (folders["P3"] / "B02_s1_t0_dapi copy.tif").write_bytes(b"")  # 5: a file matching no template
    layouts = root / "layouts"
    layouts.mkdir()
    good = (
        "well,role,condition,dose,dose_unit\nB02,negative_control,vehicle,,\n"
        "B03,test,LOOM-101,1,uM\nB04,test,LOOM-102,1,uM\n"
    )
    (layouts / "good.csv").write_text(good + "D05,test,LOOM-103,1,uM\n")  # 6: a layout well without images
    (layouts / "no_controls.csv").write_text(  # 7: no negative controls
        "well,role,condition,dose,dose_unit\nB02,test,vehicle,,\nB03,test,LOOM-101,1,uM\nB04,test,LOOM-102,1,uM\n"
    )
    (layouts / "no_unit.csv").write_text(  # 8: a dose without unit
        "well,role,condition,dose,dose_unit\nB02,negative_control,vehicle,,\nB03,test,LOOM-101,1,\nB04,test,LOOM-102,1,uM\n"
    )
    sheet = root / "plates.csv"
    sheet.write_text(
        "plate,batch,plate_format,layout,image_folder\n"
        f"P1,d1,96,{layouts / 'good.csv'},{folders['P1']}\n"
        f"P2,d1,96,{layouts / 'no_controls.csv'},{folders['P2']}\n"
        f"P3,d2,96,{layouts / 'no_unit.csv'},{folders['P3']}\n"
        f"P4,d2,96,{layouts / 'good.csv'},{images / 'P4'}\n"
    )  # 9: a missing image folder
    config = root / "config.yaml"
    config.write_text(
        f"screen_sheet: {sheet}\nimages:\n  filename_template: '{{well}}_s{{site}}_t{{frame}}_{{channel}}.tif'\n"
        "channels:\n  - {name: dapi, role: nuclei}\n  - {name: gfp, role: reporter}\n"
    )  # 10: no pixel size
    return config


def test_check_reports_every_planted_problem_at_once_with_file_and_fix(tmp_path):
    report = check_screen(load_config(str(_planted_problem_screen(tmp_path))))
    text = report.text()
    expected = [
        ("warning", "well B03, site 1, channel gfp: frames [1] are missing"),
        ("error", "plate P1: well B04, site 1: no image for channel 'gfp'"),
        ("error", "B02_s1_t0_dapi.tif: image size (48, 48) differs from (64, 64)"),
        ("warning", "1 imaged well(s) have no layout row: C09"),
        ("warning", "1 file(s) match neither images.filename_template"),
        ("error", "1 well(s) in the layout have no images: D05"),
        ("error", "no_controls.csv: the layout has no negative_control wells"),
        ("error", "no_unit.csv, row 3, column dose_unit: well B03 has a dose but no unit"),
        ("error", "plate P4, column image_folder: image folder"),
        ("error", "pixel_size_um and frame_interval_min not set and not in the images' OME metadata"),
    ]
    for severity, needle in expected:
        found = [p for p in report.problems if needle in p.message]
        assert found, f"{needle!r} not reported:\n{text}"
        assert found[0].severity == severity, (needle, found[0].severity)
        assert "Fix:" in found[0].message
    assert len(report.problems) >= 10
    assert "run estimate: 3 plates" in text


def test_check_command_exits_non_zero_on_errors_and_names_a_bad_config_key(tmp_path):
    config = _planted_problem_screen(tmp_path)
    result = subprocess.run(
        [sys.executable, "-m", "plateloom", "check", "--config", str(config)], capture_output=True, text=True
    )
    assert result.returncode == 1 and "error(s):" in result.stdout
    config.write_text(config.read_text() + "chunk_well: 3\n")
    with pytest.raises(InputError, match=r"chunk_well"):
        load_config(str(config))


def test_survey_describes_a_folder_without_writing(tmp_path):
    _write_plate(tmp_path / "one_plate", "stacks", 3, time.time())
    survey = survey_folder(str(tmp_path / "one_plate"))
    assert survey.template == "{well}-pos{site}-{channel}.tiff"
    assert survey.frames == 4 and survey.sites == 1 and survey.channels == ["hoechst", "ktr"]
    assert survey.image_shape == (128, 128) and survey.dtype == "uint16"
    assert survey.frame_interval_min == pytest.approx(5.0)
    assert not (tmp_path / "screen").exists()
    written = write_scaffold(survey, str(tmp_path / "screen"))
    assert [os.path.basename(p) for p in written] == ["config.yaml", "plates.csv", "plate_96.csv"]
    with pytest.raises(InputError, match="never overwrites"):
        write_scaffold(survey, str(tmp_path / "screen"))
    write_scaffold(survey, str(tmp_path / "screen"), force=True)
    # 4 frames: too short for the neighbour readouts, which stay out of the modelled features
    features = yaml.safe_load((tmp_path / "screen" / "config.yaml").read_text())["screen"]["features"]
    assert "coupled_link_fraction_{reporter}" not in features and "area_um2" in features
    # a reporter imaged for 36 frames: the collective readouts are modelled as well
    write_scaffold(dataclasses.replace(survey, frames=36), str(tmp_path / "long"))
    features = yaml.safe_load((tmp_path / "long" / "config.yaml").read_text())["screen"]["features"]
    assert features[-5:] == [
        "phase_order_{reporter}",
        "neighbour_correlation_{reporter}",
        "coupled_link_fraction_{reporter}",
        "coupled_link_fraction_d2_{reporter}",
        "spreading_index",
    ]


def test_config_reference_is_current_and_lists_every_key():
    # config/REFERENCE.md is generated from the schema; regenerate with `plateloom config-reference`.
    from plateloom.setup.config import config_reference

    text = config_reference()
    assert (ROOT / "config" / "REFERENCE.md").read_text(encoding="utf-8") == text
    for key in (
        "`images.pixel_size_um`",
        "`segmentation.threshold_method`",
        "`measurement.texture_distance_um`",
        "`channels[].role`",
        "`screen.fitter`",
        "`exclusion_rules.min_cells_per_well`",
    ):
        assert key in text


def test_survey_says_where_each_batch_came_from_and_check_warns_on_one_batch(tmp_path):
    # the invented plate's OME metadata has no AcquisitionDate: the batch is the file date, and the survey says so
    _write_plate(tmp_path / "one_plate", "stacks", 3, time.mktime((2026, 11, 2, 12, 0, 0, 0, 0, -1)))
    text = survey_folder(str(tmp_path / "one_plate")).text()
    assert "one_plate [batch 2026-11-02 from file modification time" in text
    assert "a copy changes it" in text
    write_scaffold(survey_folder(str(tmp_path / "one_plate")), str(tmp_path / "screen"))
    sheet = pd.read_csv(tmp_path / "screen" / "plates.csv")
    pd.concat([sheet, sheet.assign(plate="copy")]).to_csv(tmp_path / "screen" / "plates.csv", index=False)
    report = check_screen(load_config(str(tmp_path / "screen" / "config.yaml")), read_headers=False)
    assert any("every plate is in batch 2026-11-02" in problem.message for problem in report.problems)


def test_a_single_channel_folder_is_surveyed_with_its_stain_as_the_channel(tmp_path):
    folder = tmp_path / "plate"
    _write_plate(folder, "stacks", 5, time.time())
    for path in folder.glob("*-ktr.tiff"):
        path.unlink()
    survey = survey_folder(str(folder))
    assert survey.template == "{well}-pos{site}-{channel}.tiff" and survey.channels == ["hoechst"]
    write_scaffold(survey, str(tmp_path / "screen"))
    config = yaml.safe_load((tmp_path / "screen" / "config.yaml").read_text())
    assert config["channels"] == [{"name": "hoechst", "role": "nuclei"}]
    # without a reporter, {reporter} falls back to the nuclear stain: each feature modelled once
    resolved = resolve_features(config["screen"]["features"], config)
    assert "mean_intensity_hoechst" in resolved and len(resolved) == len(set(resolved))


def test_upper_case_channel_names_in_file_names_are_kept_and_match_the_files(tmp_path):
    from plateloom.io.images import index_plate_images

    folder = tmp_path / "plate"
    _write_plate(folder, "stacks", 6, time.time())
    for path in folder.glob("*.tiff"):
        path.rename(path.with_name(path.name.replace("hoechst", "DAPI").replace("ktr", "KTR")))
    survey = survey_folder(str(folder))
    assert survey.channels == ["DAPI", "KTR"]
    write_scaffold(survey, str(tmp_path / "screen"))
    config = load_config(str(tmp_path / "screen" / "config.yaml"))  # the schema accepts the names
    assert [c["name"] for c in config["channels"]] == ["DAPI", "KTR"]
    index = index_plate_images(str(folder), survey.template, 96, ["DAPI", "KTR"])
    assert len(index.table) == 2 * len(WELLS)
