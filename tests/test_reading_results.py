"""A demo run with bad images on two of its three plates and a condition named like markup: each bad
image costs only its own site; every results table opens as one table with pandas, pyarrow, duckdb
and polars; the README's "Working with the results" snippets run on it; every report page loads
offline in headless Chromium with working links and the name shown as text."""

import base64
import io
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import yaml
from browser import content_height, require_chromium, screenshot, visit
from conftest import ROOT, copy_workflow, run_snakemake

PLATES = ("WV-D1-P1", "WV-D2-P1", "WV-D3-P1")
BAD_SITES = (("WV-D2-P1", "A01", "A01_s1_nuclear.tif"), ("WV-D1-P1", "B04", "B04_s1_reporter.tif"))
HOSTILE = "LOOM-104</script><script>document.title='42'</script><img src=x onerror=alert(1)> \"q\" Ölsäure ✓"


@pytest.fixture(scope="module")
def screen_with_bad_images(tmp_path_factory) -> Path:
    """Three plates of the demo (3 frames a site): WV-D2-P1 with a truncated TIFF and WV-D1-P1 with an
    empty one (interrupted copies), WV-D3-P1 clean, so one plate's exclusion ledger has no rows."""
    workdir = copy_workflow(tmp_path_factory.mktemp("bad_images") / "screen")
    sheet = workdir / "config" / "plates.csv"
    lines = sheet.read_text().splitlines()
    sheet.write_text("\n".join([lines[0]] + [line for line in lines[1:] if line.split(",")[0] in PLATES]) + "\n")
    layout = workdir / "config" / "layouts" / "demo_96.csv"  # the no-effect compound named like markup
    quoted = '"' + HOSTILE.replace('"', '""') + '"'
    layout.write_text(layout.read_text().replace("LOOM-104", quoted))
    config_path = workdir / "config" / "config.yaml"
    config = yaml.safe_load(config_path.read_text())
    config["demo"]["size"] = "full"  # 18 cells a site: no well of the clean plate falls below min_cells_per_well
    config["demo"]["frames"] = 3
    config["screen"]["design_check"]["n_screens"] = 10
    config_path.write_text(yaml.safe_dump(config, sort_keys=False))
    run_snakemake(workdir, *(f"demo_images/{plate}" for plate in PLATES))
    truncated = workdir / "demo_images" / "WV-D2-P1" / "A01_s1_nuclear.tif"
    truncated.write_bytes(truncated.read_bytes()[:200])
    (workdir / "demo_images" / "WV-D1-P1" / "B04_s1_reporter.tif").write_bytes(b"")
    run_snakemake(workdir, "--keep-going")
    return workdir


@pytest.mark.slow
def test_a_truncated_and_an_empty_image_cost_only_their_own_sites(screen_with_bad_images):
    # Every plate is analysed to its report; the bad sites' frames are in site QC with the file and
    # the fix, and in the ledger; their wells are left out of the model for want of cells.
    workdir = screen_with_bad_images
    assert (workdir / "results/reports/screen.html").exists()
    for plate, well, name in BAD_SITES:
        assert (workdir / f"results/reports/plates/{plate}.html").exists()
        qc = pd.read_parquet(
            next((workdir / f"results/site_qc/plate={plate}").glob(f"chunk-*/well={well}/part-0.parquet"))
        )
        problems = qc["frame_problem"].fillna("")
        assert (problems != "").all() and problems.str.contains(name).all() and problems.str.contains("re-").all()
        ledger = pd.read_parquet(workdir / f"results/exclusions/plate={plate}/part-0.parquet")
        rules = set(ledger.loc[ledger["well"] == well, "rule"])
        assert rules == {"unusable_frame", "min_cells_per_well"}, rules
    clean = pd.read_parquet(workdir / "results/exclusions/plate=WV-D3-P1/part-0.parquet")
    assert clean.empty


def _table_folders(results: Path) -> list[Path]:
    return sorted(
        folder
        for folder in results.iterdir()
        if folder.is_dir() and folder.name not in ("screen", "benchmarks") and any(folder.rglob("*.parquet"))
    )


@pytest.mark.slow
def test_every_results_table_opens_as_one_table_with_four_readers(screen_with_bad_images):
    import duckdb
    import polars as pl
    import pyarrow.dataset as ds

    results = screen_with_bad_images / "results"
    folders = _table_folders(results)
    expected = {"cells", "tracks", "site_qc", "collective", "events", "wells", "plate_qc", "edge_effects", "exclusions"}
    assert expected | {"time_courses"} <= {folder.name for folder in folders}
    for folder in folders:
        files = sorted(folder.rglob("*.parquet"))
        schemas = {str(pq.read_schema(file).remove_metadata()) for file in files}
        assert len(schemas) == 1, (folder.name, schemas)  # the same schema in every file, empty or not
        with_pandas = pd.read_parquet(folder)
        with_pyarrow = pq.read_table(folder)
        with_dataset = ds.dataset(folder).to_table()
        with_duckdb = duckdb.sql(f"select * from read_parquet('{folder}/**/*.parquet')").df()
        with_polars = pl.read_parquet(folder)
        counts = {len(with_pandas), with_pyarrow.num_rows, with_dataset.num_rows, len(with_duckdb), with_polars.height}
        assert counts == {sum(pq.read_metadata(file).num_rows for file in files)}, (folder.name, counts)
        for columns in (
            list(with_pandas.columns),
            with_pyarrow.column_names,
            with_dataset.column_names,
            list(with_duckdb.columns),
            with_polars.columns,
        ):
            assert "chunk" not in columns and "plate" in columns, (folder.name, columns)
            assert sorted(columns) == sorted(with_pandas.columns), folder.name
        plates = set(with_pandas["plate"].astype(str))
        assert plates == set(with_polars["plate"].cast(pl.String)) == set(with_duckdb["plate"].astype(str))
        # a ledger and an events table may have no row of a plate (nothing excluded, or too few
        # frames for a division or a death: this screen has 3)
        sparse = ("exclusions", "events")
        assert plates <= set(PLATES) and (folder.name in sparse or plates == set(PLATES)), (folder.name, plates)


def readme_snippets() -> list[str]:
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text[text.index("## Working with the results") :]
    section = section[: section.index("\n## ", 1)]
    return re.findall(r"```python\n(.*?)```", section, flags=re.S)


@pytest.mark.slow
def test_the_readme_snippets_run_on_a_finished_screen(screen_with_bad_images, monkeypatch, capsys):
    snippets = readme_snippets()
    assert len(snippets) == 3
    monkeypatch.chdir(screen_with_bad_images)
    names: dict = {}
    for snippet in snippets:
        exec(compile(snippet, "README.md", "exec"), names)  # noqa: S102 - the README's own code
    assert len(names["hits"]) > 0 and set(names["controls"].index.astype(str)) == set(PLATES)
    assert "vehicle" in set(names["speeds"]["treatment"]) and (names["speeds"]["tracks"] > 0).all()
    assert names["control_area"].height >= len(PLATES)
    assert "LOOM-" in capsys.readouterr().out


def _ids(html: str) -> set[str]:
    return set(re.findall(r'\bid="([^"]*)"', html))


def _image(dom: str, alt: str) -> np.ndarray:
    from skimage.io import imread

    found = re.search(r'<img alt="' + re.escape(alt) + r'" src="data:image/png;base64,([^"]+)"', dom)
    assert found, alt
    return imread(io.BytesIO(base64.b64decode(found.group(1))))


def _check_links(page: Path, dom: str) -> int:
    """Every href of the page resolves: an anchor of the page, or a file (and its anchor) beside it;
    every src is inline data. Returns the number of links checked."""
    links = re.findall(r'href="([^"]*)"', dom)
    for link in links:
        target, _, fragment = link.partition("#")
        assert not re.match(r"[a-z]+:", target), (page.name, link)  # nothing online, no file:// either
        path = (page.parent / target) if target else page
        assert path.exists(), (page.name, link)
        if fragment:
            assert fragment in _ids(dom if not target else path.read_text(encoding="utf-8")), (page.name, link)
    assert all(src.startswith("data:") for src in re.findall(r'\bsrc="([^"]*)"', dom)), page.name
    return len(links)


@pytest.mark.slow
def test_every_report_page_loads_offline_with_resolving_links(screen_with_bad_images, tmp_path):
    require_chromium()
    reports = screen_with_bad_images / "results/reports"
    effects = pd.read_parquet(screen_with_bad_images / "results/effects.parquet")
    treatments = sorted((reports / "treatments").glob("*.html"))
    assert len(treatments) == effects["treatment"].nunique() and len(list((reports / "plates").glob("*.html"))) == 3
    pages = [reports / "screen.html", *sorted((reports / "plates").glob("*.html")), *treatments]
    hostile_pages = 0
    for page in pages:
        seen = visit(page, tmp_path / "chromium")
        assert seen.console == [], (page.name, seen.console)  # no error, no warning, no script of a name
        assert seen.requests == [], (page.name, seen.requests)
        assert _check_links(page, seen.dom) > 0
        title = re.search(r"<title>(.*?)</title>", seen.dom, flags=re.S).group(1)
        assert title.startswith("plateloom"), (page.name, title)
        if "Ölsäure" in seen.dom:  # the markup-like name is on the page as text, nowhere as markup
            hostile_pages += 1
            assert "onerror=alert(1)&gt;" in seen.dom and '<img src="x"' not in seen.dom, page.name
    assert hostile_pages >= 5  # the screen report, its plates, its own treatment pages


@pytest.mark.slow
def test_report_pages_at_1400_px_are_short_enough_and_show_cells(screen_with_bad_images, tmp_path):
    reports = screen_with_bad_images / "results/reports"
    effects = pd.read_parquet(screen_with_bad_images / "results/effects.parquet")
    top = effects[effects["role"] == "test"].sort_values("q_value")["treatment"].iloc[0]
    from plateloom.report.treatment_pages import page_name

    treatment = reports / "treatments" / page_name(top)
    heights = {}
    for name, page in (
        ("overview", reports / "screen.html"),
        ("treatment", treatment),
        ("plate", reports / "plates/WV-D1-P1.html"),
    ):
        shot = screenshot(page, tmp_path / f"{name}.png", tmp_path / "chromium")
        heights[name] = content_height(shot)
        grey = shot[: heights[name], :, :3].mean(axis=-1)
        assert grey.std() > 10 and len(np.unique(grey.astype(int))) > 50, name  # figures and text drawn
    assert 1000 < heights["overview"] <= 8000, heights
    # the treatment page's montage and the negative controls' are drawn (cells, not a blank canvas)
    montage = _image(treatment.read_text(encoding="utf-8"), "cell montage")[..., :3].mean(axis=-1)
    assert montage.std() > 20 and len(np.unique(montage.astype(int))) > 100
