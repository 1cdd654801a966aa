"""Figures and sections over time: control time courses (plate report) and effect curves with
their bands and the kinetic summary (screen report)."""

from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd

from plateloom.report.html import escape, figure_tag, folded, table_tag
from plateloom.screen.kinetics import BAND_METHOD, significant

MAX_CURVES_PER_FEATURE = 12
PANEL_COLUMNS = 4
SUMMARY_COLUMNS = [
    "feature",
    "treatment",
    "onset_min",
    "half_max_time_min",
    "peak_effect",
    "peak_ci_low",
    "peak_ci_high",
    "peak_time_min",
    "auc",
    "auc_ci_low",
    "auc_ci_high",
    "auc_q_value",
    "significant_windows",
    "n_windows",
]


def time_axis_label(origin: str) -> str:
    return "time after treatment (min)" if origin == "treatment" else "time since first frame (min)"


def _midpoints(table: pd.DataFrame) -> np.ndarray:
    return ((table["window_start_min"] + table["window_end_min"]) / 2).to_numpy(float)


def control_time_course_figure(time_course: pd.DataFrame, features: list[str]) -> plt.Figure:
    """Per feature, each kept negative-control well's window values (thin) and their median (thick)."""
    kept = time_course["excluded_by"].fillna("") == ""
    controls = time_course[(time_course["role"] == "negative_control") & kept]
    figure, axes = plt.subplots(1, len(features), figsize=(3.3 * len(features), 2.8), squeeze=False)
    for axis, feature in zip(axes[0], features):
        for _, well in controls.groupby("well", observed=True):
            axis.plot(_midpoints(well), well[feature], color="#8a9aa8", linewidth=0.8, alpha=0.7)
        median = controls.groupby("window_start_min")[feature].median()
        ends = controls.groupby("window_start_min")["window_end_min"].first()
        axis.plot((median.index + ends) / 2, median.to_numpy(), color="#33546e", linewidth=2.2, label="median")
        axis.set_title(feature, fontsize=9)
        axis.set_xlabel(time_axis_label(str(time_course["time_origin"].iloc[0])), fontsize=8)
        axis.tick_params(labelsize=7)
    axes[0][0].legend(fontsize=7)
    figure.tight_layout()
    return figure


def control_time_course_html(time_course: pd.DataFrame | None, features: list[str], max_drift: str) -> str:
    """The plate report's section on the negative controls over time."""
    if time_course is None or time_course.empty:
        return "<p>No time courses (kinetics.enabled is false).</p>"
    shown = [f for f in features if f in time_course.columns][:4]
    return (
        "<p>Negative-control wells per time window (thin: each well; thick: their median). Controls should be "
        "flat over the run apart from the cell count, which grows with proliferation; a drift of a feature by "
        f"more than {escape(max_drift)} is listed under warnings in the summary.</p>"
        + figure_tag(control_time_course_figure(time_course, shown), "negative controls over time")
    )


def _unit(log_scale: bool) -> str:
    return "natural-log ratio to controls" if log_scale else "difference from controls"


def effect_curves_figure(curves: pd.DataFrame, feature: str, panel: str = "treatment") -> plt.Figure:
    """Small multiples, one per value of ``panel`` (a treatment, or a feature for one treatment's
    page): the effect per window with its pointwise interval (bars) and the simultaneous band
    (shaded); zero = no effect. ``feature`` labels the y axes; panels of features label their own
    unit (their scales may differ)."""
    names = list(dict.fromkeys(curves[panel]))
    columns = min(PANEL_COLUMNS, len(names))
    rows = int(np.ceil(len(names) / columns))
    figure, axes = plt.subplots(
        rows, columns, figsize=(3.2 * columns, 2.5 * rows), squeeze=False, sharey=panel == "treatment"
    )
    for number, (axis, name) in enumerate(zip(axes.ravel(), names)):
        curve = curves[curves[panel] == name].sort_values("window")
        t = _midpoints(curve)
        axis.fill_between(t, curve["band_low"], curve["band_high"], color="#b8322a", alpha=0.15, linewidth=0)
        estimate = curve["estimate"].to_numpy(float)
        bars = [estimate - curve["ci_low"].to_numpy(float), curve["ci_high"].to_numpy(float) - estimate]
        axis.errorbar(t, estimate, yerr=bars, color="#33546e", marker="o", markersize=3, linewidth=1.2, capsize=2)
        axis.axhline(0.0, color="grey", linestyle="--", linewidth=0.8)
        axis.set_title(str(name), fontsize=8)
        axis.tick_params(labelsize=7)
        axis.set_xlabel(time_axis_label(str(curve["time_origin"].iloc[0])), fontsize=7)
        if panel == "feature":
            axis.set_ylabel(_unit((curve["scale"] == "log").all()), fontsize=7)
        elif number % columns == 0:
            unit = _unit((curves["scale"] == "log").all())
            axis.set_ylabel(f"{feature}\n{unit}" if feature else unit, fontsize=7)
    for axis in axes.ravel()[len(names) :]:
        axis.set_visible(False)
    fixed_margins(figure, rows)
    return figure


def fixed_margins(figure: plt.Figure, rows: int) -> None:
    """Margins in inches for a grid of small panels with titles, axis labels and y labels on every
    panel, so that the figure can be drawn once (no tight_layout, no trimming: ``figure_tag(..., trim=False)``)."""
    width, height = figure.get_size_inches()
    figure.subplots_adjust(
        left=0.75 / width,
        right=1 - 0.1 / width,
        bottom=0.55 / height,
        top=1 - 0.3 / height,
        wspace=0.45,
        hspace=0.75 if rows > 1 else 0.2,
    )


def _moving(effects: pd.DataFrame, feature: str, threshold: float) -> pd.DataFrame:
    """The curves of one feature worth showing: treatments with a significant window (q-value at most
    ``threshold``; positive controls by p-value), most significant windows first, at most MAX_CURVES_PER_FEATURE."""
    rows = effects[effects["feature"] == feature]
    counts = rows.assign(_s=significant(rows, threshold)).groupby("treatment")["_s"].sum()
    chosen = counts[counts > 0].sort_values(ascending=False).index[:MAX_CURVES_PER_FEATURE]
    return rows[rows["treatment"].isin(chosen)]


def kinetics_html(effects: pd.DataFrame | None, summary: pd.DataFrame | None, settings: dict) -> str:
    """The screen report's section on effects over time."""
    if effects is None or summary is None or effects.empty:
        return "<p>Not run (kinetics.enabled is false).</p>"
    origin = str(effects["time_origin"].iloc[0])
    text = (
        f"<p>Each time window ({escape(time_axis_label(origin))}) is fitted with the endpoint model; bars are "
        f"pointwise {settings['ci_level']:.0%} intervals, the shaded band is simultaneous over each curve "
        f"({escape(BAND_METHOD)}). A window is significant at a q-value of at most "
        f"{settings['hit_q_value']:g} (Benjamini-Hochberg over every feature, test treatment and window; "
        "positive controls, outside the family, by their p-value). "
        f"Onset: the start of the first window from which {settings.get('onset_windows', 2)} consecutive windows are "
        "significant (or every remaining window). Time to half maximum: interpolated between window midpoints. "
        "The area under the effect curve (model-scale units x min) is fitted on each well's own area, wells "
        "with every window only. Shown per feature: treatments with a significant window.</p>"
    )
    panels, shown = "", 0
    for feature in effects["feature"].unique():
        moving = _moving(effects, feature, settings["hit_q_value"])
        if not moving.empty:
            shown += 1
            panels += f"<h3>{escape(feature)}</h3>" + figure_tag(
                effect_curves_figure(moving, feature), f"effects over time {feature}", trim=False
            )
    panels = folded(f"Effect curves of the {shown} features with a significant window", panels) if shown else ""
    ordered = summary.sort_values(["onset_min", "feature", "treatment"], na_position="last")
    acting = ordered[ordered["significant_windows"] > 0]
    table = table_tag(acting[SUMMARY_COLUMNS]) if not acting.empty else "<p>No treatment acts in any window.</p>"
    return text + (panels or "<p>No curve has a significant window.</p>") + "<p>Kinetic summary (by onset):</p>" + table
