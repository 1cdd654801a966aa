"""Shared fixtures: a private copy of the workflow to run Snakemake in."""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from plateloom.well.stage import WellSettings

ROOT = Path(__file__).resolve().parents[1]
WORKFLOW_PARTS = ("Snakefile", "workflow", "config", "resources", "scripts")


def copy_workflow(target: Path) -> Path:
    """Copy what a run needs (not results or generated images) into ``target``."""
    target.mkdir(parents=True, exist_ok=True)
    ignore = shutil.ignore_patterns("__pycache__", "*.egg-info")
    for part in WORKFLOW_PARTS:
        source = ROOT / part
        if source.is_dir():
            shutil.copytree(source, target / part, ignore=ignore)
        else:
            shutil.copy2(source, target / part)
    # the copy simulates its demo from its own scenario file, so that a test may change it
    config_path = target / "config" / "config.yaml"
    text, replaced = re.subn(
        r"(?m)^  scenario: null.*$", "  scenario: resources/demo/scenario.yaml", config_path.read_text()
    )
    assert replaced == 1, "config/config.yaml: the demo section's scenario line was not found"
    config_path.write_text(text, encoding="utf-8")
    return target


def run_snakemake(workdir: Path, *args: str, check: bool = True) -> subprocess.CompletedProcess:
    """Run Snakemake in ``workdir`` with the test's Python; returns the finished process."""
    command = [sys.executable, "-m", "snakemake", "--cores", "2", "--scheduler", "greedy", *args]
    env = {**os.environ, "PYTHONHASHSEED": "0"}
    result = subprocess.run(command, cwd=workdir, capture_output=True, text=True, env=env)
    if check and result.returncode != 0:
        raise AssertionError(
            f"snakemake failed ({result.returncode}):\n{result.stdout[-4000:]}\n{result.stderr[-6000:]}"
        )
    return result


def pytest_collection_modifyitems(config, items):
    """Run the cluster tests last: once SLURM's client tools are installed and its daemons stopped,
    every later Snakemake start would wait on them."""
    items.sort(key=lambda item: item.get_closest_marker("cluster") is not None)


@pytest.fixture
def workflow_dir(tmp_path: Path) -> Path:
    return copy_workflow(tmp_path / "screen")


def minimal_config(sheet, template: str = "{well}_s{site}_{channel}.tif") -> dict:
    """The smallest config of a one-channel (dna) screen from ``sheet``, schema defaults filled."""
    from plateloom.settings import fill_defaults

    return fill_defaults(
        {
            "screen_sheet": str(sheet),
            "images": {"filename_template": template, "pixel_size_um": 1, "frame_interval_min": 1},
            "channels": [{"name": "dna", "role": "nuclei"}],
        }
    )


def nuclear_only_settings(pixel_size_um: float, **overrides) -> WellSettings:
    """Per-well settings for one channel "nuclear" with no reporter (the realistic fields and time-lapses)."""
    return WellSettings.of_demo(
        channels=("nuclear",),
        nuclei_channel="nuclear",
        reporter_channels=(),
        texture_channels=None,
        pixel_size_um=pixel_size_um,
        min_nucleus_area_um2=20.0,
        split_min_distance_um=5.0,
        **overrides,
    )


def tiny_well_settings(channels) -> WellSettings:
    """Per-well settings for the small synthetic images of the bad-input tests (1 um pixels,
    1 min frames, nuclei of at least 10 um2, no gap closing)."""
    return WellSettings.of_demo(
        channels=tuple(channels),
        nuclei_channel="dna",
        pixel_size_um=1.0,
        frame_interval_min=1.0,
        min_nucleus_area_um2=10.0,
        split_min_distance_um=5.0,
        max_displacement_um=5.0,
        max_gap_frames=0,
        reporter_channels=(),
    )


def plate_tables(cells, tracks, site_qc, layout, settings=None, rules=None, collective=None):
    """The plate stage's tables of a synthetic plate P1 (batch d1, 96 wells) held in memory;
    settings and rules default to the schema's."""
    from plateloom.plate.exclusions import ExclusionRules
    from plateloom.plate.stage import PlateDesign, PlateSettings, WellTables, build_plate_tables

    return build_plate_tables(
        cells,
        WellTables(tracks, site_qc, collective),
        PlateDesign("P1", "d1", 96, layout),
        settings or PlateSettings.defaults(),
        rules or ExclusionRules.defaults(),
    )
