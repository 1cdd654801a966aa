"""Rule plate_report: the self-contained HTML report of one plate."""
import pandas as pd

from plateloom.plate_formats import plate_format
from plateloom.plate_report import build_plate_report
from plateloom.steps import run_step
from plateloom.tables import provenance, write_text

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    profile = pd.read_parquet(sm.input.wells)
    qc = pd.read_parquet(sm.input.qc)
    html = build_plate_report(profile, qc, sm.wildcards.plate, sm.params.batch, plate_format(sm.params.plate_format),
                              sm.params.report_feature, provenance(dict(sm.params.settings)))
    write_text(html, sm.output.report)


run_step(sm.log[0], step, f"plate_report {sm.wildcards.plate}")
