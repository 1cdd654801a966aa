"""Rule plate_report: the self-contained HTML report of one plate."""

import json

import pandas as pd
import tifffile

from plateloom.io.job import run_step
from plateloom.io.tables import read_provenance, write_text
from plateloom.report.plate_page import build_plate_report
from plateloom.setup.plate_formats import plate_format

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    with open(sm.input.notes, encoding="utf-8") as handle:
        notes = json.load(handle)
    html = build_plate_report(
        pd.read_parquet(sm.input.wells),
        pd.read_parquet(sm.input.qc),
        pd.read_parquet(sm.input.ledger),
        pd.read_parquet(sm.input.edge),
        notes["warnings"],
        notes["site_qc"],
        sm.wildcards.plate,
        sm.params.batch,
        plate_format(sm.params.plate_format),
        sm.params.report_feature,
        read_provenance(sm.input.wells),
        {c: tifffile.imread(p) for c, p in zip(sm.params.channels, sm.input.flat_fields)},
    )
    write_text(html, sm.output.report)


run_step(sm.log[0], step, f"plate_report {sm.wildcards.plate}")
