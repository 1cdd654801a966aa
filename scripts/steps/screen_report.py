"""Rule screen_report: the self-contained HTML report of the screen."""
import pandas as pd

from plateloom.screen_report import build_screen_report
from plateloom.steps import run_step
from plateloom.tables import read_provenance, write_text

sm = snakemake  # noqa: F821  (injected by Snakemake's script directive)


def step() -> None:
    effects = pd.read_parquet(sm.input.effects)
    wells = pd.concat([pd.read_parquet(path) for path in sm.input.wells], ignore_index=True)
    ledger = pd.concat([pd.read_parquet(path) for path in sm.input.ledgers], ignore_index=True)
    p = sm.params.settings
    html = build_screen_report(effects, wells, ledger, p["ci_level"], p["hit_q_value"], p["hit_min_log_ratio"],
                               read_provenance(sm.input.effects))
    write_text(html, sm.output.report)


run_step(sm.log[0], step, "screen_report")
