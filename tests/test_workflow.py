"""End to end on a reduced demo screen: planted truth recovered, new plates cost only their own jobs."""

import os
import re
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest
import yaml
from conftest import copy_workflow, run_snakemake
from scipy import stats

from plateloom.demo.scenario import load_scenario, planted_ratios
from plateloom.report.html import anchor
from plateloom.setup.screen_sheet import load_layout

NEW_PLATE = "WV-D3-P3"


@pytest.fixture(scope="module")
def finished_screen(tmp_path_factory):
    """The demo screen with 5 frames a site, run to the end once for the tests of this module.

    The scenario gains a seventh plate that the screen sheet does not list yet (added later by a test).
    """
    workdir = copy_workflow(tmp_path_factory.mktemp("e2e") / "screen")
    scenario_path = workdir / "resources" / "demo" / "scenario.yaml"
    scenario = yaml.safe_load(scenario_path.read_text())
    scenario["batches"][2]["plates"].append(NEW_PLATE)
    scenario_path.write_text(yaml.safe_dump(scenario, sort_keys=False))
    config_path = workdir / "config" / "config.yaml"
    config = yaml.safe_load(config_path.read_text())
    config["demo"]["size"] = "full"  # the full-size fields (160 px, 18 cells) with 5 frames
    config["demo"]["frames"] = 5
    config["screen"]["design_check"]["n_screens"] = 30
    config_path.write_text(yaml.safe_dump(config, sort_keys=False))
    run_snakemake(workdir)
    return workdir


def _truth_and_effects(workdir):
    scenario = load_scenario(str(workdir / "resources/demo/scenario.yaml"))
    layout = load_layout(str(workdir / "config/layouts/demo_96.csv"), 96)
    effects = pd.read_parquet(workdir / "results/effects.parquet")
    truth = planted_ratios(scenario, layout)[["treatment", "feature", "ratio"]].rename(columns={"ratio": "true_ratio"})
    merged = truth.merge(effects, on=["treatment", "feature"], validate="one_to_one")
    merged["log_truth"] = np.log(merged["true_ratio"])
    return effects, merged


@pytest.mark.slow
def test_effects_table_is_complete(finished_screen):
    effects = pd.read_parquet(finished_screen / "results/effects.parquet")
    config = yaml.safe_load((finished_screen / "config/config.yaml").read_text())
    treatments = load_layout(str(finished_screen / "config/layouts/demo_96.csv"), 96)
    expected = set(treatments.loc[treatments["role"].isin(["test", "positive_control"]), "treatment"])
    assert set(effects["treatment"]) == expected
    assert len(effects) == len(expected) * effects["feature"].nunique()
    assert effects["feature"].nunique() == 15
    # With 5 frames a site, tracks are shorter than collective.min_overlap_frames (12): the readouts that
    # compare neighbours' traces have no value, and too few cells die for any spreading (index 1 everywhere).
    # They are listed as not fitted, with the reason.
    short = effects["feature"].isin(
        [
            "neighbour_correlation_reporter",
            "coupled_link_fraction_reporter",
            "coupled_link_fraction_d2_reporter",
            "spreading_index",
        ]
    )
    assert (effects.loc[short, "method"] == "not fitted").all()
    assert (
        effects.loc[short & (effects["feature"] != "spreading_index"), "note"]
        .str.contains("collective.min_overlap_frames")
        .all()
    )
    assert effects.loc[effects["feature"] == "spreading_index", "note"].str.contains("constant across wells").all()
    assert not effects.loc[short, "hit"].any()
    fitted = effects[~short]
    for column in ("estimate", "ci_low", "ci_high", "std_error", "df"):
        assert fitted[column].notna().all(), column
    # the FDR family is the test treatments: positive controls keep their p-values, without q-values
    tests = fitted["role"] == "test"
    assert fitted.loc[tests, "q_value"].notna().all() and fitted.loc[tests, "in_fdr_family"].all()
    assert fitted.loc[~tests, "q_value"].isna().all() and fitted.loc[~tests, "p_value"].notna().all()
    assert (fitted["df_method"] == "Satterthwaite").all()
    assert fitted["converged"].all()
    csv = pd.read_csv(finished_screen / "results/effects.csv")
    assert len(csv) == len(effects)
    assert config["screen"]["ci_level"] == 0.95


@pytest.mark.slow
def test_planted_effects_recovered_within_their_intervals(finished_screen):
    effects, merged = _truth_and_effects(finished_screen)
    # 99% intervals around the planted log ratios (the scenario states truth as ratios to control).
    half = stats.t.ppf(0.995, merged["df"]) * merged["std_error"]
    inside = (merged["estimate"] - half <= merged["log_truth"]) & (merged["log_truth"] <= merged["estimate"] + half)
    # With calibrated 99% intervals, misses among n are Binomial(n, 0.01); more than 3 of 81 has probability
    # about 1%, while a biased measure or model misses far more often.
    assert len(merged) == 81  # 27 treatments (the 3 with time courses have their own test) x 3 planted features
    assert (~inside).sum() <= 3, merged.loc[~inside, ["treatment", "feature", "true_ratio", "ratio"]]
    # The positive control's 95% CI on nuclear area excludes no effect (0 on the log scale).
    positive = effects[(effects["role"] == "positive_control") & (effects["feature"] == "area_um2")].iloc[0]
    assert positive["ci_low"] > 0
    # The no-effect compound: simultaneous 95% intervals (Bonferroni over its doses and the planted features) cover 0,
    # and it is no hit on any feature.
    null = merged[merged["condition"] == "LOOM-104"]
    wide = stats.t.ppf(1 - 0.025 / len(null), null["df"]) * null["std_error"]
    assert ((null["estimate"] - wide <= 0) & (0 <= null["estimate"] + wide)).all()
    assert not effects.loc[effects["condition"] == "LOOM-104", "hit"].any()


@pytest.mark.slow
def test_planted_ec50s_fall_inside_their_intervals(finished_screen):
    # The scenario plants Hill curves (ratio to control) with these EC50s on the features they move.
    fits = pd.read_parquet(finished_screen / "results/dose_response.parquet").set_index(["condition", "feature"])
    scenario = load_scenario(str(finished_screen / "resources/demo/scenario.yaml"))
    planted = {c["name"]: c["ec50_um"] for c in scenario["compounds"]}
    for compound, feature in (
        ("LOOM-101", "area_um2"),
        ("LOOM-102", "mean_intensity_reporter"),
        ("LOOM-103", "speed_um_per_min"),
    ):
        fit = fits.loc[(compound, feature)]
        assert fit["identifiable"], fit["flag"]
        assert fit["ec50_ci_low"] <= planted[compound] <= fit["ec50_ci_high"], (compound, fit["ec50"])
    # The no-effect compound has no identifiable dose-response on any feature, and says why.
    null = fits.loc["LOOM-104"]
    assert not null["identifiable"].any() and null["flag"].str.contains("no dose-response").all()


@pytest.mark.slow
def test_design_check_reports_coverage_near_nominal(finished_screen):
    table = pd.read_parquet(finished_screen / "results/design_check.parquet").set_index("design")
    assert list(table.index) == ["as imaged", "+2 batches"]
    assert table.loc["+2 batches", "n_batches"] == 5
    for design in table.index:
        coverage, se = table.loc[design, ["coverage", "coverage_mc_se"]]
        assert abs(coverage - 0.95) < 4 * se + 0.01, (design, coverage)
    assert table.loc["+2 batches", "mean_ci_width"] < table.loc["as imaged", "mean_ci_width"]


@pytest.mark.slow
def test_reports_are_self_contained(finished_screen):
    report = (finished_screen / "results/reports/screen.html").read_text()
    # one inline script of our own (sorting and filtering tables); nothing loaded from anywhere
    assert "data:image/png;base64," in report and report.count("<script") == 1 and "<script src" not in report
    assert "http://" not in report and "https://" not in report
    assert "not for clinical" in report
    for section in (
        "Volcano plot",
        "Dose-response",
        "Batch diagnostics",
        "Design check",
        "Variance components",
        "Exclusion ledger",
        "Method",
    ):
        assert f">{section}</h2>" in report and f'href="#{anchor(section)}"' in report
    # one page per treatment, linked from the screen report; each links back and to its plates
    pages = sorted((finished_screen / "results/reports/treatments").glob("*.html"))
    effects = pd.read_parquet(finished_screen / "results/effects.parquet")
    assert len(pages) == effects["treatment"].nunique()
    assert all(f'href="treatments/{page.name}"' in report for page in pages)
    assert all('href="../screen.html"' in page.read_text() for page in pages[:3])
    plate = (finished_screen / "results/reports/plates/WV-D1-P1.html").read_text()
    assert "-factor and SSMD per feature</h2>" in plate
    assert plate.count("data:image/png;base64,") >= 4
    assert 'id="illumination">Illumination</h2>' in plate and "illumination profiles" in plate


@pytest.mark.slow
def test_snakemake_report_holds_the_plate_and_screen_reports(finished_screen, tmp_path):
    target = tmp_path / "run_report.zip"
    run_snakemake(finished_screen, "--report", str(target))
    import zipfile

    names = zipfile.ZipFile(target).namelist()
    for expected in (
        "screen.html",
        "WV-D1-P1.html",
        "volcano.png",
        "batch_pca.png",
        "effects.csv",
        "dose_response.csv",
    ):
        assert any(name.endswith(expected) for name in names), expected
    pages = [page.name for page in (finished_screen / "results/reports/treatments").glob("*.html")]
    assert len(pages) > 20 and all(any(name.endswith(page) for name in names) for page in pages)


@pytest.mark.slow
def test_hard_stop_during_per_well_stage_then_resume_gives_identical_tables(finished_screen, tmp_path):
    # SIGKILL the whole Snakemake process group while per-well jobs run, rerun, compare with the uninterrupted run.
    workdir = copy_workflow(tmp_path / "screen")
    shutil.copy2(finished_screen / "config" / "config.yaml", workdir / "config" / "config.yaml")
    shutil.copy2(
        finished_screen / "resources" / "demo" / "scenario.yaml", workdir / "resources" / "demo" / "scenario.yaml"
    )
    command = [sys.executable, "-m", "snakemake", "--cores", "2", "--scheduler", "greedy"]
    process = subprocess.Popen(
        command, cwd=workdir, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True
    )
    cells = workdir / "results" / "cells"
    deadline = time.time() + 600
    while time.time() < deadline and len(list(cells.glob("plate=*/chunk-*/well=*/part-0.parquet"))) < 30:
        time.sleep(0.2)
    os.killpg(process.pid, signal.SIGKILL)
    process.wait()
    assert not (workdir / "results" / "effects.parquet").exists()
    run_snakemake(workdir, "--unlock")  # a killed Snakemake leaves its lock behind
    run_snakemake(workdir, "--rerun-incomplete")
    for table in ["effects.parquet"] + [
        f"wells/plate={p}/part-0.parquet" for p in ("WV-D1-P1", "WV-D2-P2", "WV-D3-P1")
    ]:
        pd.testing.assert_frame_equal(
            pd.read_parquet(workdir / "results" / table), pd.read_parquet(finished_screen / "results" / table)
        )
    for plate in ("WV-D1-P1", "WV-D2-P2", "WV-D3-P1"):  # the plate reports too, to the byte
        report = f"results/reports/plates/{plate}.html"
        assert (workdir / report).read_bytes() == (finished_screen / report).read_bytes(), report


@pytest.mark.slow
def test_planted_edge_effect_detected_then_removed_by_median_polish(finished_screen):
    # The scenario plants a 1.12 ratio on the reporter in every outer well of every plate.
    reporter = "mean_intensity_reporter"

    def edges():
        tables = [
            pd.read_parquet(p)
            for p in sorted((finished_screen / "results/edge_effects").glob("plate=*/part-0.parquet"))
        ]
        return pd.concat(tables).set_index("feature").loc[reporter]

    before = edges()
    assert len(before) == 6
    assert (before["p_value"] < 0.05).sum() >= 5
    assert before["edge_shift"].median() == pytest.approx(np.log(1.12), abs=0.05)
    config_path = finished_screen / "config" / "config.yaml"
    config = yaml.safe_load(config_path.read_text())
    config["plate"]["positional_correction"] = "median_polish"
    config_path.write_text(yaml.safe_dump(config, sort_keys=False))
    result = run_snakemake(finished_screen)
    assert "analyse_wells" not in re.findall(r"^rule (\w+):", result.stdout + result.stderr, flags=re.M)
    after = edges()
    assert after["edge_shift_corrected"].abs().median() < 0.4 * np.log(1.12)
    wells = pd.read_parquet(finished_screen / "results/wells/plate=WV-D1-P1/part-0.parquet")
    assert f"{reporter}_b_score" in wells and f"{reporter}_uncorrected" in wells


@pytest.mark.slow
def test_new_plate_schedules_only_its_own_jobs_and_the_fan_ins(finished_screen):
    sheet = finished_screen / "config" / "plates.csv"
    sheet.write_text(sheet.read_text() + f"{NEW_PLATE},day3,96,config/layouts/demo_96.csv,demo_images/{NEW_PLATE}\n")
    # a quick look at the new plate alone: its own jobs and report, no screen model
    look = run_snakemake(finished_screen, "-n", "--config", f'only_plates=["{NEW_PLATE}"]')
    look_jobs = pd.Series(re.findall(r"^rule (\w+):", look.stdout + look.stderr, flags=re.M)).value_counts().to_dict()
    # 74 analysed wells in chunks of 24: 4 per-well jobs
    assert look_jobs == {
        "make_demo_plate": 1,
        "estimate_illumination": 2,
        "analyse_wells": 4,
        "plate_profiles": 1,
        "plate_report": 1,
        "all": 1,
    }
    result = run_snakemake(finished_screen, "-n")
    output = result.stdout + result.stderr
    jobs = re.findall(r"^rule (\w+):", output, flags=re.M)
    counts = pd.Series(jobs).value_counts().to_dict()
    assert counts == {
        "make_demo_plate": 1,
        "estimate_illumination": 2,
        "analyse_wells": 4,
        "plate_profiles": 1,
        "plate_report": 1,
        "correct_batches": 1,
        "fit_effects": 3,
        "screen_effects": 1,
        "dose_response": 1,
        "fate_effects": 1,
        "effects_over_time": 1,
        "design_check": 1,
        "screen_report": 1,
        "all": 1,
    }
    blocks = re.split(r"^rule ", output, flags=re.M)[1:]
    per_plate = [
        b
        for b in blocks
        if b.split(":")[0]
        in ("make_demo_plate", "estimate_illumination", "analyse_wells", "plate_profiles", "plate_report")
    ]
    plates = {re.search(r"wildcards: plate=([\w.-]+)", block).group(1) for block in per_plate}
    assert plates == {NEW_PLATE}
    # after the run, the old plates' reports are untouched: same bytes, same modification times
    reports = sorted((finished_screen / "results/reports/plates").glob("*.html"))
    before = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in reports}
    run_snakemake(finished_screen)
    after = {p.name: (p.read_bytes(), p.stat().st_mtime_ns) for p in reports}
    assert after == before
    assert (finished_screen / f"results/reports/plates/{NEW_PLATE}.html").exists()


@pytest.mark.slow
def test_the_whole_demo_overview_is_at_most_8000_px_tall_at_1400_px(finished_screen, tmp_path):
    from browser import content_height, require_chromium, screenshot

    require_chromium()
    shot = screenshot(finished_screen / "results/reports/screen.html", tmp_path / "overview.png", tmp_path / "c")
    assert 2000 < content_height(shot) <= 8000
