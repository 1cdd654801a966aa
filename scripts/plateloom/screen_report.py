"""The screen report: forest plots of effects with CIs, hits, variance components, exclusions."""

from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
from matplotlib.ticker import FormatStrFormatter

from .report import figure_tag, page, table_tag


def forest_plot(effects: pd.DataFrame, feature: str, ci_level: float) -> plt.Figure:
    """Estimate and CI of every treatment on one feature; ratios on a log axis for log-scale features."""
    rows = effects[effects["feature"] == feature].sort_values(["role", "condition", "dose"], na_position="first")
    log_scale = (rows["scale"] == "log").all()
    centre = rows["ratio"] if log_scale else rows["estimate"]
    low = rows["ratio_ci_low"] if log_scale else rows["ci_low"]
    high = rows["ratio_ci_high"] if log_scale else rows["ci_high"]
    figure, axis = plt.subplots(figsize=(6.5, 0.28 * len(rows) + 1.2))
    y = np.arange(len(rows))[::-1]
    colours = np.where(rows["hit"], "#b8322a", "#33546e")
    axis.errorbar(centre, y, xerr=[centre - low, high - centre], fmt="none", ecolor=colours, elinewidth=1.5)
    axis.scatter(centre, y, c=colours, zorder=3, s=18)
    axis.axvline(1.0 if log_scale else 0.0, color="grey", linestyle="--", linewidth=1)
    if log_scale:
        axis.set_xscale("log")
        axis.xaxis.set_major_formatter(FormatStrFormatter("%.3g"))
        axis.xaxis.set_minor_formatter(FormatStrFormatter("%.3g"))
        axis.tick_params(axis="x", which="minor", labelsize=7)
    axis.set_yticks(y, rows["treatment"], fontsize=8)
    label = "ratio to negative control" if log_scale else "difference from negative control"
    axis.set_xlabel(f"{feature}: {label} ({ci_level:.0%} CI; red = hit)")
    figure.tight_layout()
    return figure


def build_screen_report(effects: pd.DataFrame, wells: pd.DataFrame, ledger: pd.DataFrame, ci_level: float,
                        hit_q_value: float, hit_min_effect: float, provenance: dict) -> str:
    """The self-contained HTML report of the whole screen."""
    plates = wells.groupby(["batch", "plate"]).agg(wells=("well", "size"),
                                                   excluded_wells=("excluded_by", lambda s: int((s != "").sum())),
                                                   plate_excluded_by=("plate_excluded_by", "first")).reset_index()
    in_model = (wells["excluded_by"] == "") & (wells["plate_excluded_by"] == "")
    summary = (f"<p>{wells['plate'].nunique()} plates in {wells['batch'].nunique()} batches, "
               f"{int(in_model.sum())} wells in the model, {effects['treatment'].nunique()} treatments, "
               f"{effects['feature'].nunique()} features. Hits: q &lt; {hit_q_value:g} (Benjamini-Hochberg over all "
               f"{len(effects)} feature-treatment pairs) and |effect| &ge; {hit_min_effect:g} "
               f"(natural-log ratio for log-scale features).</p>") + table_tag(plates)
    method = ("<p>Per feature, a linear mixed-effects model of well values (REML, statsmodels): treatment as fixed "
              "effect against the pooled negative-control wells, a random intercept per batch (imaging day) and per "
              "plate within batch. Strictly positive features are modelled as natural logs, so effects are ratios. "
              "Confidence intervals use t quantiles with between-within degrees of freedom "
              "(wells - plates - (treatments - 1)). Fits that did not converge are marked and fall back to least "
              "squares with plate fixed effects.</p>")
    hits = effects[effects["hit"]].sort_values("q_value")
    columns = ["feature", "treatment", "scale", "estimate", "ci_low", "ci_high", "ratio", "q_value", "n_wells"]
    hit_html = "<p>No hits.</p>" if hits.empty else table_tag(hits[columns])
    forest = "".join(figure_tag(forest_plot(effects, f, ci_level), f"forest plot {f}") for f in effects["feature"].unique())
    components = effects.drop_duplicates("feature")[["feature", "scale", "batch_variance", "plate_variance",
                                                     "residual_variance", "icc_batch_plate", "converged", "method", "note"]]
    counts = ledger.groupby(["level", "rule"]).size().rename("count").reset_index() if len(ledger) else ledger
    ledger_html = ("<p>Nothing was excluded.</p>" if ledger.empty else
                   table_tag(counts) + "<p>Wells and plates left out of the model:</p>"
                   + table_tag(ledger[ledger["level"] != "site_frame"]))
    sections = [("Summary", summary), ("Method", method), ("Hits", hit_html), ("Effects with confidence intervals", forest),
                ("Variance components", table_tag(components)), ("Exclusion ledger", ledger_html),
                ("All effects", table_tag(effects[columns + ["p_value", "hit"]]))]
    return page("plateloom screen report", sections, provenance)
