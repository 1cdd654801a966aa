"""The screen report: forest plots of effects with CIs, hits, variance components, exclusions."""

from __future__ import annotations

from dataclasses import dataclass, field

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
from matplotlib.ticker import NullLocator

from plateloom.report.fate_panels import FateResults, fate_html
from plateloom.report.html import escape, figure_tag, folded, linked_cells, page, table_tag
from plateloom.report.time_panels import kinetics_html
from plateloom.report.treatment_pages import linked_treatments, montage_html
from plateloom.screen.dose_response import hill_curve

NICE_RATIOS = (0.01, 0.02, 0.05, 0.1, 0.2, 0.25, 0.33, 0.5, 0.67, 0.8, 0.9, 1.0, 1.1, 1.25, 1.5, 2.0, 3.0, 4.0, 5.0,
               10.0, 20.0, 50.0, 100.0)  # fmt: skip


def ratio_ticks(low: float, high: float, most: int = 9) -> list[float]:
    """Ratio tick values for a log axis spanning [low, high] (1 always among them): the round ratios
    inside the range, thinned evenly to at most ``most``."""
    if not (np.isfinite(low) and np.isfinite(high) and low > 0):
        return [1.0]
    inside = [r for r in NICE_RATIOS if min(low, 1.0) <= r <= max(high, 1.0)]
    if len(inside) > most:
        keep = np.unique(np.round(np.linspace(0, len(inside) - 1, most)).astype(int))
        inside = sorted(set([inside[i] for i in keep]) | {1.0})
    return inside


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
        ticks = ratio_ticks(float(np.nanmin(low)), float(np.nanmax(high)))
        axis.xaxis.set_minor_locator(NullLocator())
        axis.set_xticks(ticks, [f"{t:g}" for t in ticks])
    axis.set_yticks(y, rows["treatment"], fontsize=8)
    label = "ratio to negative control" if log_scale else "difference from negative control"
    axis.set_xlabel(f"{feature}: {label} ({ci_level:.0%} CI; red = hit)")
    figure.tight_layout()
    return figure


def volcano_plot(effects: pd.DataFrame, q_threshold: float = 0.05, labelled: int = 8) -> plt.Figure:
    """Effect (model scale) against -log10 q-value for every feature and test treatment; hits in red,
    the q-value threshold as a dashed line, the ``labelled`` smallest-q hits named."""
    figure, axis = plt.subplots(figsize=(7.5, 4.8))
    rows = effects[np.isfinite(effects["estimate"]) & np.isfinite(effects["q_value"])]
    height = -np.log10(np.clip(rows["q_value"].to_numpy(float), 1e-300, 1))
    colours = np.where(rows["hit"], "#b8322a", "#8a9aa8")
    axis.scatter(rows["estimate"], height, c=colours, s=14)
    axis.axvline(0, color="grey", linewidth=1)
    axis.axhline(-np.log10(q_threshold), color="#b8322a", linestyle="--", linewidth=1)
    axis.text(axis.get_xlim()[0], -np.log10(q_threshold), f" q = {q_threshold:g}", va="bottom", fontsize=7)
    top = rows.assign(_height=height)[rows["hit"].to_numpy(bool)].nlargest(labelled, "_height")
    for _, row in top.iterrows():
        axis.annotate(
            f"{row['treatment']}: {row['feature']}",
            (row["estimate"], row["_height"]),
            xytext=(4, 2),
            textcoords="offset points",
            fontsize=6.5,
        )
    axis.set_xlabel("effect (natural-log ratio, or difference for linear features)")
    axis.set_ylabel("-log10 q-value (Benjamini-Hochberg)")
    figure.tight_layout()
    return figure


def dose_response_plot(fit: pd.Series, points: pd.DataFrame) -> plt.Figure:
    """Well responses against dose (controls at the left edge) with the fitted four-parameter logistic."""
    figure, axis = plt.subplots(figsize=(4.6, 3.4))
    treated = points[points["dose"] > 0]
    lowest = treated["dose"].min()
    control_x = lowest / 10
    controls = points[points["dose"] == 0]
    axis.scatter(
        np.full(len(controls), control_x), controls["response"], s=8, color="#8a9aa8", label="negative controls"
    )
    axis.scatter(treated["dose"], treated["response"], s=10, color="#33546e", label="wells")
    if np.isfinite(fit.get("ec50", np.nan)):
        grid = np.logspace(np.log10(lowest) - 0.5, np.log10(treated["dose"].max()) + 0.5, 200)
        axis.plot(
            grid,
            hill_curve(grid, fit["bottom"], fit["top"], fit["log10_ec50"], fit["hill"]),
            color="#b8322a" if fit["identifiable"] else "#c9a227",
        )
        if fit["identifiable"]:
            axis.axvspan(fit["ec50_ci_low"], fit["ec50_ci_high"], color="#b8322a", alpha=0.12, label="EC50 CI")
    axis.set_xscale("log")
    axis.set_xlabel(f"dose ({fit['dose_unit']}); controls at left")
    axis.set_ylabel(fit["response_scale"])
    axis.set_title(f"{fit['condition']}: {fit['feature']}", fontsize=9)
    axis.legend(fontsize=7)
    figure.tight_layout()
    return figure


def batch_components_plot(components: pd.DataFrame) -> plt.Figure:
    """First two principal components of well profiles, coloured by batch, before and after correction."""
    figure, axes = plt.subplots(1, 2, figsize=(8.5, 3.8))
    batches = sorted(components["batch"].unique())
    palette = plt.get_cmap("tab10")
    for axis, stage in zip(axes, ("before", "after")):
        rows = components[components["stage"] == stage]
        for i, batch in enumerate(batches):
            part = rows[rows["batch"] == batch]
            axis.scatter(part["pc1"], part["pc2"], s=9, color=palette(i % 10), label=str(batch))
        shares = rows[["pc1_share", "pc2_share"]].iloc[0] if len(rows) else [np.nan, np.nan]
        axis.set_xlabel(f"PC1 ({shares.iloc[0]:.0%})")
        axis.set_ylabel(f"PC2 ({shares.iloc[1]:.0%})")
        axis.set_title(f"{stage} batch correction", fontsize=9)
    for axis in axes:
        axis.legend(fontsize=7, title="batch", title_fontsize=7)
    figure.tight_layout()
    return figure


def _method_text(settings: dict, provenance: dict) -> str:
    versions = ", ".join(f"{k} {v}" for k, v in sorted(provenance.get("packages", {}).items()))
    correction = {
        "none": "no batch correction",
        "control_location": (
            "each batch shifted so that its negative-control median equals the pooled negative-control median"
        ),
        "control_location_scale": "each batch shifted and scaled to the pooled negative-control median and MAD",
        "combat": "empirical-Bayes ComBat (Johnson, Li & Rabinovic 2007) with the treatments as protected covariates",
    }[settings["batch_correction"]]
    fitter = (
        "statsmodels MixedLM, cross-checked against the exact REML optimum"
        if settings["fitter"] == "statsmodels"
        else "plateloom's exact nested REML, closed-form variance inverse"
    )
    values = (
        f"batch-corrected values ({escape(correction)})"
        if settings.get("model_on_corrected_values")
        else "uncorrected values (the batch random intercept absorbs day shifts); the batch correction "
        f"({escape(correction)}) feeds the pooled views and batch diagnostics only"
    )
    return (
        "<p>Wells are the experimental units. Features declared log-scale are modelled as natural logs, so effects "
        "read as ratios to the negative control; the others as differences in their unit. The cell count is "
        "modelled as a count: log of (nuclei + 0.5) with Poisson precision weights, wells below the cell-count "
        "floor kept. Per feature, a linear mixed-effects model on "
        f"{values}: treatment as fixed effect against the pooled negative-control wells, a random intercept per "
        f"batch (imaging day) and per plate within batch, fitted by REML ({escape(fitter)}). Standard errors come "
        "from (X'V<sup>-1</sup>X)<sup>-1</sup> at the REML estimates; confidence intervals are t intervals with "
        "Satterthwaite degrees of freedom for each treatment (column df): a treatment sharing plates with the "
        "negative controls has about as many as there are wells, one applied to whole plates about as many as "
        "its plates. They assume the declared design and a treatment effect that is the same on every day. "
        "Fits that do not converge are marked and fall back to least squares with plate fixed effects. "
        "q-values: Benjamini-Hochberg over the feature-treatment pairs of test treatments; positive controls "
        "keep their own p-values outside that family and are never called hits. "
        "Dose-response: four-parameter logistic (Hill equation) on well values relative to their plate's negative-"
        "control median, controls at dose 0, EC50 interval from the asymptotic covariance of log10 EC50 (wells "
        "treated as independent after plate centring); a fit is identifiable only with finite, moderate SEs, a "
        "finite EC50 interval, a detected response and no lack of fit against the per-dose means (F test, "
        "p &ge; 0.01). Design check: screens simulated on this design with this "
        "screen's fitted variance components and a planted effect, fitted by the same model.</p>"
        f'<p class="meta">Software: {escape(versions)}; Python {escape(provenance.get("python", ""))}.</p>'
    )


@dataclass(frozen=True)
class ScreenResults:
    """What the screen report shows: effects, well profiles, exclusion ledger and, when run,
    dose-response fits and points, batch diagnostics, the design check and correction notes."""

    effects: pd.DataFrame
    wells: pd.DataFrame
    ledger: pd.DataFrame
    dose_fits: pd.DataFrame | None = None
    dose_points: pd.DataFrame | None = None
    variance: pd.DataFrame | None = None
    components: pd.DataFrame | None = None
    design: pd.DataFrame | None = None
    correction_notes: list[str] = field(default_factory=list)
    design_warnings: list[str] = field(default_factory=list)
    effects_over_time: pd.DataFrame | None = None
    kinetic_summary: pd.DataFrame | None = None
    crop_files: dict | None = None  # (plate, well) -> crops (plateloom.report.montage.crop_files)
    fate: FateResults | None = None  # the fate_effects rule's tables


EFFECT_COLUMNS = [
    "feature",
    "treatment",
    "scale",
    "estimate",
    "ci_low",
    "ci_high",
    "df",
    "ratio",
    "standardized_effect",
    "q_value",
    "n_wells",
]
COMPONENT_COLUMNS = [
    "feature",
    "scale",
    "batch_variance",
    "plate_variance",
    "residual_variance",
    "icc_batch_plate",
    "converged",
    "method",
    "note",
]
DOSE_COLUMNS = [
    "feature",
    "condition",
    "ec50",
    "ec50_ci_low",
    "ec50_ci_high",
    "dose_unit",
    "hill",
    "top",
    "identifiable",
    "flag",
]


def _summary_html(results: ScreenResults, settings: dict) -> str:
    wells, effects = results.wells, results.effects
    plates = (
        wells.groupby(["batch", "plate"])
        .agg(
            wells=("well", "size"),
            excluded_wells=("excluded_by", lambda s: int((s != "").sum())),
            plate_excluded_by=("plate_excluded_by", "first"),
        )
        .reset_index()
    )
    in_model = (wells["excluded_by"] == "") & (wells["plate_excluded_by"] == "")
    family = int(effects["in_fdr_family"].sum()) if "in_fdr_family" in effects else len(effects)
    warnings = "".join(f"<li>{escape(w)}</li>" for w in results.design_warnings)
    return (
        (f'<div class="caution"><p>Design warnings:</p><ul>{warnings}</ul></div>' if warnings else "")
        + f"<p>{wells['plate'].nunique()} plates in {wells['batch'].nunique()} batches, "
        f"{int(in_model.sum())} wells in the model, {effects['treatment'].nunique()} treatments, "
        f"{effects['feature'].nunique()} features. Hits: q &lt; {settings['hit_q_value']:g} (Benjamini-Hochberg "
        f"over the {family} feature-test-treatment pairs; positive controls outside the family) and an effect of "
        f"at least {settings['hit_min_log_ratio']:g} natural-log ratio (log-scale features) or "
        f"{settings.get('hit_min_standardized_effect', 1.0):g} negative-control well SDs (linear-scale features).</p>"
    ) + linked_cells(table_tag(plates), {p: f"plates/{p}.html" for p in plates["plate"].astype(str)})


def _components_html(effects: pd.DataFrame) -> str:
    components_table = effects.drop_duplicates("feature")[COMPONENT_COLUMNS]
    flagged = effects[effects["note"].str.contains("treatment|batch only", regex=True) & ~effects["note"].eq("")]
    notes_html = (
        ""
        if flagged.empty
        else "<p>Rows with a note:</p>" + table_tag(flagged[["feature", "treatment", "estimate", "note"]])
    )
    return table_tag(components_table) + notes_html


def _ledger_html(ledger: pd.DataFrame) -> str:
    if ledger.empty:
        return "<p>Nothing was excluded.</p>"
    counts = ledger.groupby(["level", "rule"]).size().rename("count").reset_index()
    left_out = ledger[ledger["level"] != "site_frame"]
    return table_tag(counts) + "<p>Wells and plates left out of the model:</p>" + table_tag(left_out)


def _raised_share_note(wide: pd.DataFrame) -> str:
    """A note naming the features whose batch share the correction raised, and what that means."""
    raised = wide.index[wide["batch_share_after"] > wide["batch_share_before"] + 1e-9].tolist()
    if not raised:
        return ""
    return (
        f"<p>The correction raised the batch share of {len(raised)} feature(s) ({escape(', '.join(raised))}). "
        "It aligns each batch's negative-control median, which removes a day's shift only as far as the "
        "controls measure it: with few or noisy control wells, or a batch shift that is not the same for "
        "every treatment, the aligned values can differ more between batches than before. The effects "
        "do not depend on it: the model is fitted on uncorrected values with a random intercept per batch "
        "(screen.model_on_corrected_values is off by default); these columns are diagnostics.</p>"
    )


def _batch_html(results: ScreenResults) -> str:
    html = "<p>No diagnostics.</p>"
    if results.variance is not None and results.components is not None:
        shares = ("batch_share", "plate_share", "residual_share")
        wide = results.variance.pivot(index="feature", columns="stage", values=list(shares))
        wide.columns = [f"{share}_{stage}" for share, stage in wide.columns]
        order = [f"{share}_{stage}" for share in shares for stage in ("before", "after")]
        html = (
            figure_tag(batch_components_plot(results.components), "principal components by batch")
            + "<p>Share of treatment-adjusted variance between batches, plates within batch and wells, "
            "before and after correction:</p>" + table_tag(wide[order].reset_index()) + _raised_share_note(wide)
        )
    if results.correction_notes:
        html += "<ul>" + "".join(f"<li>{escape(n)}</li>" for n in results.correction_notes) + "</ul>"
    return html


def _dose_html(dose_fits: pd.DataFrame | None, dose_points: pd.DataFrame | None) -> str:
    if dose_fits is None or not len(dose_fits):
        return "<p>No compound has enough doses for a dose-response fit.</p>"
    figures = ""
    for _, fit in dose_fits[dose_fits["identifiable"]].iterrows():
        same_compound = (dose_points["condition"] == fit["condition"]) | (dose_points["role"] == "negative_control")
        points = dose_points[(dose_points["feature"] == fit["feature"]) & same_compound]
        figures += figure_tag(dose_response_plot(fit, points), f"dose-response {fit['condition']} {fit['feature']}")
    return (
        table_tag(dose_fits[DOSE_COLUMNS])
        + "<p>Curves of the identifiable fits (red; shaded: EC50 interval):</p>"
        + (figures or "<p>None is identifiable.</p>")
    )


def _design_html(design: pd.DataFrame | None) -> str:
    if design is None or not len(design):
        return "<p>Not run.</p>"
    return (
        "<p>Simulated screens on this design, with this screen's variance components for "
        f"{escape(design['feature'].iloc[0])} and a planted effect of {design['effect'].iloc[0]:g} "
        "(model scale) on every treatment. Coverage should be near the nominal level; power is the "
        "share of treatments detected at p &lt; 0.05.</p>" + table_tag(design)
    )


def build_screen_report(results: ScreenResults, settings: dict, provenance: dict) -> str:
    """The self-contained HTML report of the whole screen."""
    effects = results.effects
    hits = effects[effects["hit"]].sort_values("q_value")
    names = sorted(effects["treatment"].unique())
    hit_html = "<p>No hits.</p>" if hits.empty else linked_treatments(table_tag(hits[EFFECT_COLUMNS]), names)
    features = effects["feature"].unique()
    forest = (
        "<p>Every treatment's effect on each feature with its interval, one plot per feature (a treatment's "
        "effects on every feature are on its own page).</p>"
        + folded(
            f"Forest plots of the {len(features)} features",
            "".join(figure_tag(forest_plot(effects, f, settings["ci_level"]), f"forest plot {f}") for f in features),
        )
    )
    sections = [
        ("Summary", _summary_html(results, settings)),
        ("Method", _method_text(settings, provenance)),
        ("Hits", hit_html),
        ("Volcano plot", figure_tag(volcano_plot(effects, settings["hit_q_value"]), "volcano plot")),
        ("Effects with confidence intervals", forest),
        ("Dose-response", _dose_html(results.dose_fits, results.dose_points)),
        ("Cell fate", fate_html(results.fate)),
        ("Effects over time", kinetics_html(results.effects_over_time, results.kinetic_summary, settings)),
        (
            "Cells",
            montage_html(
                results.wells, hits.drop_duplicates("treatment")["treatment"].head(3).tolist(), results.crop_files
            ),
        ),
        ("Batch diagnostics", _batch_html(results)),
        ("Variance components", _components_html(effects)),
        ("Design check", _design_html(results.design)),
        ("Exclusion ledger", _ledger_html(results.ledger)),
        (
            "All effects",
            linked_treatments(table_tag(effects[EFFECT_COLUMNS + ["p_value", "in_fdr_family", "hit", "note"]]), names),
        ),
    ]
    return page("plateloom screen report", sections, provenance)
