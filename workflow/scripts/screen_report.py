"""Rule screen_report: the self-contained HTML report of the screen."""

import pandas as pd

from plateloom.io.job import run_step
from plateloom.io.tables import read_extra, read_provenance, write_text
from plateloom.report.html import write_figure
from plateloom.report.montage import crop_files
from plateloom.report.screen_page import (
    ScreenResults,
    batch_components_plot,
    build_screen_report,
    volcano_plot,
)
from plateloom.report.treatment_pages import write_treatment_pages

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    effects = pd.read_parquet(sm.input.effects)
    wells = pd.concat([pd.read_parquet(path) for path in sm.input.wells], ignore_index=True)
    ledger = pd.concat([pd.read_parquet(path) for path in sm.input.ledgers], ignore_index=True)
    results = ScreenResults(
        effects,
        wells,
        ledger,
        dose_fits=pd.read_parquet(sm.input.dose_response),
        dose_points=pd.read_parquet(sm.input.dose_points),
        variance=pd.read_parquet(sm.input.variance),
        components=pd.read_parquet(sm.input.components),
        design=pd.read_parquet(sm.input.design_check),
        correction_notes=read_extra(sm.input.model_wells).get("notes", []),
        design_warnings=read_extra(sm.input.model_wells).get("design_warnings", []),
        effects_over_time=pd.read_parquet(sm.input.kinetics[0]) if sm.input.kinetics else None,
        kinetic_summary=pd.read_parquet(sm.input.kinetics[1]) if sm.input.kinetics else None,
        crop_files=crop_files(list(sm.input.thumbnails)),
    )
    settings = dict(sm.params.settings) | {"onset_windows": sm.params.onset_windows}
    provenance = read_provenance(sm.input.effects)
    html = build_screen_report(results, settings, provenance)
    write_treatment_pages(results, settings, provenance, sm.output.treatments)
    write_figure(volcano_plot(effects, settings["hit_q_value"]), sm.output.volcano)
    write_figure(batch_components_plot(pd.read_parquet(sm.input.components)), sm.output.batch_pca)
    write_text(html, sm.output.report)


run_step(sm.log[0], step, "screen_report")
