"""The screen's report site: the screen page with its figure files and one page per treatment,
written by a few forked processes (the pages are independent; drawing them is most of the time)."""

from __future__ import annotations

import multiprocessing
import os
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass

from plateloom.io.tables import write_text
from plateloom.report.html import write_figure
from plateloom.report.screen_page import ScreenResults, batch_components_plot, build_screen_report, volcano_plot
from plateloom.report.treatment_pages import page_name, treatment_context, treatment_page

_SITE: dict = {}  # what the writing processes share (inherited when they are forked)


@dataclass(frozen=True)
class SiteOutputs:
    report: str  # the screen page (HTML)
    volcano: str  # PNG
    batch_pca: str  # PNG
    treatments: str  # folder of the treatment pages


def _write_screen_page() -> None:
    results, settings, outputs = _SITE["results"], _SITE["settings"], _SITE["outputs"]
    html = build_screen_report(results, settings, _SITE["provenance"])
    write_figure(volcano_plot(results.effects, settings["hit_q_value"]), outputs.volcano)
    write_figure(batch_components_plot(results.components), outputs.batch_pca)
    write_text(html, outputs.report)


def _write_treatment_pages(treatments: list[str]) -> None:
    for treatment in treatments:
        html = treatment_page(treatment, _SITE["context"], _SITE["provenance"])
        write_text(html, os.path.join(_SITE["outputs"].treatments, page_name(treatment)))


def _runs(treatments: list[str], count: int) -> list[list[str]]:
    """``treatments`` cut into ``count`` runs of consecutive names (a compound's doses mostly share a
    run, so its dose-response figures are drawn once or twice)."""
    size = -(-len(treatments) // max(count, 1))
    return [treatments[i : i + size] for i in range(0, len(treatments), size)] if treatments else []


def write_report_site(
    results: ScreenResults, settings: dict, provenance: dict, outputs: SiteOutputs, processes: int = 1
) -> None:
    """The screen page, its volcano and batch-PCA figures, and a page per treatment of the effects
    table, by ``processes`` forked processes (in this process when 1 or where fork is not available)."""
    os.makedirs(outputs.treatments, exist_ok=True)
    treatments = sorted(results.effects["treatment"].unique())
    _SITE.update(
        results=results,
        settings=settings,
        provenance=provenance,
        outputs=outputs,
        context=treatment_context(results, settings),
    )
    try:
        if processes <= 1 or "fork" not in multiprocessing.get_all_start_methods():
            _write_screen_page()
            _write_treatment_pages(treatments)
            return
        with ProcessPoolExecutor(processes, mp_context=multiprocessing.get_context("fork")) as pool:
            jobs = [pool.submit(_write_screen_page)]
            jobs += [pool.submit(_write_treatment_pages, run) for run in _runs(treatments, 4 * processes)]
            for job in jobs:
                job.result()
    finally:
        _SITE.clear()
