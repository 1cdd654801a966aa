"""Rule plate_report: the self-contained HTML report of one plate."""

import json
import os

import pandas as pd
import tifffile

from plateloom.io.job import run_step
from plateloom.io.tables import read_provenance, write_text
from plateloom.plate.stage import PlateTables
from plateloom.report.plate_page import PlatePage, build_plate_report
from plateloom.setup.plate_formats import plate_format

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def read_profile(path: str) -> tuple:
    """An illumination profile and the sampled sites left out of it (from its description)."""
    with tifffile.TiffFile(path) as tif:
        description = json.loads(tif.pages[0].description or "{}")
        return tif.asarray(), description.get("skipped_sites", [])


def read_thumbnails(folders: list[str]) -> dict[str, bytes]:
    """The PNG of every well in the chunk folders, by well."""
    found = {}
    for folder in folders:
        for name in sorted(os.listdir(folder)):
            if name.endswith(".png"):
                with open(os.path.join(folder, name), "rb") as handle:
                    found[name[: -len(".png")]] = handle.read()
    return found


def step() -> None:
    with open(sm.input.notes, encoding="utf-8") as handle:
        notes = json.load(handle)
    tables = PlateTables(
        pd.read_parquet(sm.input.wells),
        pd.read_parquet(sm.input.qc),
        pd.read_parquet(sm.input.ledger),
        pd.read_parquet(sm.input.edge),
        notes["warnings"],
        notes["site_qc"],
        pd.read_parquet(sm.input.time_courses) if "time_courses" in sm.input.keys() else None,
    )
    profiles = {c: read_profile(p) for c, p in zip(sm.params.channels, sm.input.flat_fields)}
    flat_fields = {c: image for c, (image, _) in profiles.items()}
    page_info = PlatePage(
        sm.wildcards.plate,
        sm.params.batch,
        plate_format(sm.params.plate_format),
        sm.params.report_feature,
        read_provenance(sm.input.wells),
        flat_fields,
        read_thumbnails(list(sm.input.thumbnails)),
        notes.get("flagged_wells", {}),
        {c: skipped for c, (_, skipped) in profiles.items() if skipped},
        sm.params.max_control_drift,
    )
    html = build_plate_report(tables, page_info)
    write_text(html, sm.output.report)


run_step(sm.log[0], step, f"plate_report {sm.wildcards.plate}")
