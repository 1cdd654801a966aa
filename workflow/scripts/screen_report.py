"""Rule screen_report: the self-contained HTML report of the screen."""

import pandas as pd

from plateloom.io.job import run_step
from plateloom.io.tables import read_extra, read_provenance, write_text
from plateloom.report.html import write_figure
from plateloom.report.screen_page import (
    batch_components_plot,
    build_screen_report,
    volcano_plot,
)

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    effects = pd.read_parquet(sm.input.effects)
    wells = pd.concat([pd.read_parquet(path) for path in sm.input.wells], ignore_index=True)
    ledger = pd.concat([pd.read_parquet(path) for path in sm.input.ledgers], ignore_index=True)
    html = build_screen_report(
        effects,
        wells,
        ledger,
        dict(sm.params.settings),
        read_provenance(sm.input.effects),
        pd.read_parquet(sm.input.dose_response),
        pd.read_parquet(sm.input.dose_points),
        pd.read_parquet(sm.input.variance),
        pd.read_parquet(sm.input.components),
        pd.read_parquet(sm.input.design_check),
        read_extra(sm.input.model_wells).get("notes", []),
    )
    write_figure(volcano_plot(effects), sm.output.volcano)
    write_figure(batch_components_plot(pd.read_parquet(sm.input.components)), sm.output.batch_pca)
    write_text(html, sm.output.report)


run_step(sm.log[0], step, "screen_report")
