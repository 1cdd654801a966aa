"""Reports: hostile names escaped, excluded plates said so, pages render offline in headless Chromium."""

import os
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from browser import chromium as _chromium
from browser import require_chromium, screenshot
from conftest import plate_tables
from test_plate_stage import _plate

from plateloom.plate.exclusions import ExclusionRules
from plateloom.report.plate_page import PlatePage, build_plate_report
from plateloom.screen.hits import HitRule
from plateloom.setup.plate_formats import plate_format

HOSTILE = '<b>x</b> "quoted", comma & Ölsäure'


def _report(tmp_path: Path, rules: ExclusionRules | None = None) -> Path:
    rules = rules or ExclusionRules.defaults()
    cells, tracks, qc, layout = _plate()
    layout.loc[layout["role"] == "test", "treatment"] = HOSTILE
    tables = plate_tables(cells, tracks, qc, layout, rules=rules)
    tables.profile.loc[tables.profile["well"] == "D05", "treatment"] = HOSTILE
    tables.warnings.append(HOSTILE)
    html = build_plate_report(tables, PlatePage("P1", "d1", plate_format(96), "area_um2", {"config_sha256": "abc"}))
    path = tmp_path / "plate.html"
    path.write_text(html, encoding="utf-8")
    return path


def test_condition_names_are_escaped(tmp_path):
    html = _report(tmp_path).read_text(encoding="utf-8")
    assert "<b>x</b>" not in html
    assert "&lt;b&gt;x&lt;/b&gt;" in html and "Ölsäure" in html


def test_excluded_plate_report_says_so(tmp_path):
    html = _report(tmp_path, ExclusionRules.defaults(min_plate_z_prime=0.99)).read_text(encoding="utf-8")
    assert "This plate is left out of the screen model" in html
    assert "min_plate_z_prime (area_um2)" in html


def test_plate_report_renders_offline_in_headless_chromium(tmp_path):
    require_chromium()
    image = screenshot(_report(tmp_path), tmp_path / "shot.png", tmp_path, width=1200, height=2400)
    assert image.shape[0] >= 1000
    grey = image[..., :3].mean(axis=-1)
    # not blank: the heatmaps and tables put many distinct grey levels on the page
    assert grey.std() > 10 and len(np.unique(grey.astype(int))) > 50


def test_screen_report_escapes_hostile_treatment_names(tmp_path):
    from test_screen_stage import _wells

    from plateloom.report.screen_page import ScreenResults, build_screen_report
    from plateloom.screen.effects import screen_effects
    from plateloom.screen.model_wells import build_model_wells

    wells = _wells(seed=2)
    wells.loc[wells["condition"] == "X", "treatment"] = HOSTILE
    model = build_model_wells(wells, ["value"], {"value"}, "control_location")
    effects = screen_effects(model.wells, ["value"], model.scales, 0.95, HitRule(), "exact")
    ledger = pd.DataFrame(columns=["level", "plate", "well", "site", "frame", "rule", "value", "threshold"])
    settings = {
        "ci_level": 0.95,
        "hit_q_value": 0.05,
        "hit_min_log_ratio": 0.1,
        "batch_correction": "control_location",
        "fitter": "exact",
    }
    results = ScreenResults(
        effects, wells, ledger, variance=model.variance, components=model.components, correction_notes=[HOSTILE]
    )
    html = build_screen_report(results, settings, {"packages": {}})
    assert "<b>x</b>" not in html
    assert "&lt;b&gt;x&lt;/b&gt; &quot;quoted&quot;, comma &amp; Ölsäure" in html


def test_tex_like_names_are_drawn_as_text_not_parsed_as_math():
    import matplotlib.pyplot as plt

    from plateloom.report.html import figure_tag

    figure, axis = plt.subplots()
    axis.set_title("$\\notacommand{ batch $x^$")  # malformed math: mathtext would raise on drawing
    assert figure_tag(figure, "t").startswith("<img")


def test_plate_report_is_the_same_whatever_numpy_global_state(tmp_path):
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    first = _report(tmp_path / "a").read_bytes()
    np.random.seed(12345)
    np.random.random(17)
    assert _report(tmp_path / "b").read_bytes() == first


def test_report_tables_sort_by_a_clicked_column_and_filter_offline(tmp_path):
    # The inline script of every report page: numbers sort as numbers, empty cells last; typing in the
    # filter box hides the rows without the text. Checked in headless Chromium (--dump-dom after a click).
    import re

    from plateloom.report.html import page, table_tag

    if _chromium() is None:
        if os.environ.get("PLATELOOM_REQUIRE_CHROMIUM"):
            pytest.fail("chromium is required here (PLATELOOM_REQUIRE_CHROMIUM is set) but not installed")
        pytest.skip("Debian package chromium not installed (.ci/run installs it)")
    values = [5.0, 40.0, None, 3.5, 100.0, 12.0, None, 7.0, 0.5, 60.0, 8.0, 2.0]
    frame = pd.DataFrame({"treatment": [f"T{i:02d}" for i in range(12)], "onset_min": values})
    html = page("t", [("Kinetic summary", table_tag(frame))], {})
    assert html.count("<script>") == 1 and 'id="kinetic-summary"' in html and 'href="#kinetic-summary"' in html
    click = "<script>document.querySelectorAll('th')[1].click();</script></body>"
    target = tmp_path / "sort.html"
    target.write_text(html.replace("</body>", click), encoding="utf-8")
    command = [_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run"]
    command += [f"--user-data-dir={tmp_path / 'profile'}", "--dump-dom", target.as_uri()]
    dom = subprocess.run(command, check=True, capture_output=True, timeout=120, text=True).stdout
    order = re.findall(r"<td>(T\d\d)</td>", dom)
    assert order == ["T08", "T11", "T03", "T00", "T07", "T10", "T05", "T01", "T09", "T04", "T02", "T06"]
    assert 'class="filter"' in dom  # a table of 10 or more rows gets a filter box


def test_log_axes_get_round_ratio_ticks_across_the_data():
    from plateloom.report.screen_page import ratio_ticks

    # area hits near 1.5 must be read off the axis: ticks above 1, not only "0.9" and "1"
    assert ratio_ticks(0.85, 1.6) == [0.9, 1.0, 1.1, 1.25, 1.5]
    assert ratio_ticks(1.2, 2.5) == [1.0, 1.1, 1.25, 1.5, 2.0]  # 1 always shown
    wide = ratio_ticks(0.01, 100.0)
    assert len(wide) <= 10 and 1.0 in wide and wide[0] == 0.01 and wide[-1] == 100.0


def test_volcano_plot_draws_the_q_threshold_and_names_the_top_hits():
    from plateloom.report.screen_page import volcano_plot

    effects = pd.DataFrame(
        {
            "feature": ["area_um2"] * 4,
            "treatment": ["A 1 uM", "B 1 uM", "C 1 uM", "D 1 uM"],
            "estimate": [0.4, -0.3, 0.01, 0.2],
            "q_value": [1e-6, 1e-4, 0.8, 0.01],
            "hit": [True, True, False, True],
        }
    )
    figure = volcano_plot(effects, q_threshold=0.05, labelled=2)
    axis = figure.axes[0]
    horizontal = [line.get_ydata()[0] for line in axis.get_lines() if line.get_ydata()[0] == line.get_ydata()[1]]
    assert any(abs(y - (-np.log10(0.05))) < 1e-12 for y in horizontal)
    names = sorted(t.get_text() for t in axis.texts if ":" in t.get_text())
    assert names == ["A 1 uM: area_um2", "B 1 uM: area_um2"]


def _treatment_context(treatment: str) -> dict:
    effects = pd.DataFrame(
        {
            "feature": ["area_um2", "solidity", "speed_um_per_min"],
            "treatment": treatment,
            "condition": "T",
            "dose": 1.0,
            "dose_unit": "uM",
            "role": "test",
            "scale": ["log", "linear", "log"],
            "estimate": [0.3, 0.0, 0.9],
            "ci_low": [0.2, -0.01, 0.7],
            "ci_high": [0.4, 0.01, 1.1],
            "ratio": [np.exp(0.3), np.nan, np.exp(0.9)],
            "df": 40.0,
            "q_value": [1e-4, 0.9, 1e-6],
            "hit": [True, False, True],
            "n_wells": 6,
            "standardized_effect": [3.0, 0.0, 9.0],
            "control_well_sd": [0.1, 0.02, 0.1],
            "note": "",
        }
    )
    wells = pd.DataFrame(
        {"batch": "day1", "plate": "P1", "well": ["B02", "C03"], "treatment": treatment, "excluded_by": ["", "focus"]}
    )
    return {"effects": effects, "wells": wells, "settings": {"ci_level": 0.95, "hit_q_value": 0.05}}


def test_treatment_pages_have_safe_distinct_names_and_link_back():
    from plateloom.report.treatment_pages import linked_treatments, page_feature, page_name, treatment_page

    assert page_name("LOOM-101 0.3 uM").startswith("LOOM-101_0.3_uM-") and page_name("a/b").startswith("a_b-")
    assert page_name("a b") != page_name("a_b")  # the hash keeps look-alike names apart
    assert page_name("<script>x</script>").startswith("script_x_script-")
    context = _treatment_context("T 1 uM")
    html = treatment_page("T 1 uM", context, {})
    assert '<a href="../plates/P1.html">P1</a>: B02, C03 (excluded: focus)' in html
    assert 'href="../screen.html"' in html and "2 hit(s) over 3 features" in html
    linked = linked_treatments("<td>T 1 uM</td><td>T 1 uM</td>", ["T 1 uM"])
    assert linked.count(f'href="treatments/{page_name("T 1 uM")}"') == 2
    # the montage follows the page's strongest per-cell hit (speed is a track feature: no cell has it)
    effects = context["effects"]
    assert page_feature(effects, {"area_um2", "solidity"}) == "area_um2"
    assert page_feature(effects, {"solidity"}) == "solidity" and page_feature(effects, set()) == "area_um2"


def test_a_hostile_treatment_name_is_text_on_its_page():
    from plateloom.report.treatment_pages import treatment_page

    name = "<script>alert(1)</script> \"q\" 'x' Ölsäure µM ✓"
    html = treatment_page(name, _treatment_context(name), {})
    assert "<script>alert" not in html
    import html as html_module
    import re

    heading = re.search(r"<h1>(.*?)</h1>", html).group(1)
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in heading and html_module.unescape(heading).endswith(name)
    assert html.count("<script") == 1  # the page's own table script only


def test_a_batch_share_raised_by_the_correction_is_explained():
    from plateloom.report.screen_page import _raised_share_note

    wide = pd.DataFrame(
        {"batch_share_before": [0.30, 0.05], "batch_share_after": [0.02, 0.09]}, index=["area_um2", "solidity"]
    )
    note = _raised_share_note(wide)
    assert "raised the batch share of 1 feature(s) (solidity)" in note and "uncorrected values" in note
    assert _raised_share_note(wide.iloc[:1]) == ""
