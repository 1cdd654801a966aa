"""Rule screen_report: the self-contained HTML report of the screen and a page per treatment."""

import pandas as pd

from plateloom.io.job import run_step
from plateloom.io.tables import read_extra, read_provenance
from plateloom.report.fate_panels import FateResults
from plateloom.report.montage import crop_files
from plateloom.report.screen_page import ScreenResults
from plateloom.report.site import SiteOutputs, write_report_site

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    extra = read_extra(sm.input.model_wells)
    results = ScreenResults(
        pd.read_parquet(sm.input.effects),
        pd.concat([pd.read_parquet(path) for path in sm.input.wells], ignore_index=True),
        pd.concat([pd.read_parquet(path) for path in sm.input.ledgers], ignore_index=True),
        dose_fits=pd.read_parquet(sm.input.dose_response),
        dose_points=pd.read_parquet(sm.input.dose_points),
        variance=pd.read_parquet(sm.input.variance),
        components=pd.read_parquet(sm.input.components),
        design=pd.read_parquet(sm.input.design_check),
        correction_notes=extra.get("notes", []),
        design_warnings=extra.get("design_warnings", []),
        effects_over_time=pd.read_parquet(sm.input.kinetics[0]) if sm.input.kinetics else None,
        kinetic_summary=pd.read_parquet(sm.input.kinetics[1]) if sm.input.kinetics else None,
        crop_files=crop_files(list(sm.input.thumbnails)),
        fate=FateResults(*(pd.read_parquet(path) for path in sm.input.fate)),
    )
    settings = dict(sm.params.settings) | {"onset_windows": sm.params.onset_windows}
    outputs = SiteOutputs(sm.output.report, sm.output.volcano, sm.output.batch_pca, sm.output.treatments)
    write_report_site(results, settings, read_provenance(sm.input.effects), outputs, processes=sm.threads)


run_step(sm.log[0], step, "screen_report")
