"""The plate report: heatmaps in plate geometry, control distributions, Z' table, exclusions."""

from __future__ import annotations

from dataclasses import dataclass

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
import seaborn as sns

from plateloom.columns import ANALYSED_ROLES
from plateloom.plate.stage import PlateTables
from plateloom.report.html import escape, figure_tag, page, table_tag
from plateloom.report.thumbnails import thumbnails_html
from plateloom.report.time_panels import control_time_course_html, fixed_margins
from plateloom.setup.plate_formats import PlateFormat, row_label, well_grid


def plate_heatmap(profile: pd.DataFrame, feature: str, fmt: PlateFormat) -> plt.Figure:
    """Heatmap of one well feature laid out as the plate; excluded wells marked with x."""
    grid = well_grid(dict(zip(profile["well"], profile[feature])), fmt)
    width = min(14.0, 2 + fmt.columns * 0.45)
    figure, axis = plt.subplots(figsize=(width, width * fmt.rows / fmt.columns * 0.9 + 0.8))
    sns.heatmap(
        grid,
        ax=axis,
        cmap="viridis",
        square=True,
        cbar_kws={"label": feature},
        xticklabels=[str(c + 1) for c in range(fmt.columns)],
        yticklabels=[row_label(r) for r in range(fmt.rows)],
        linewidths=0.5,
        linecolor="white",
    )
    for _, well in profile[profile["excluded_by"] != ""].iterrows():
        axis.text(well["column"] - 0.5, well["row"] - 0.5, "x", ha="center", va="center", color="red", fontsize=12)
    axis.set_title(f"{feature} (x: excluded well; blank: no value)")
    axis.tick_params(labelsize=7 if fmt.wells <= 96 else 5)
    return figure


ROLE_COLOURS = {"empty": "#f2f2f2", "negative_control": "#33546e", "positive_control": "#c9a227", "test": "#9cc3d5"}


def role_map(profile: pd.DataFrame, fmt: PlateFormat) -> plt.Figure:
    """The plate's layout: each well coloured by its role (wells not analysed: empty); excluded wells x."""
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    roles = list(ROLE_COLOURS)
    codes = {w: float(roles.index(r)) for w, r in zip(profile["well"], profile["role"]) if r in roles}
    grid = np.nan_to_num(well_grid(codes, fmt), nan=0.0)
    width = min(14.0, 2 + fmt.columns * 0.45)
    figure, axis = plt.subplots(figsize=(width, width * fmt.rows / fmt.columns * 0.9 + 0.8))
    axis.imshow(grid, cmap=ListedColormap(list(ROLE_COLOURS.values())), vmin=-0.5, vmax=len(roles) - 0.5)
    axis.set_xticks(range(fmt.columns), [str(c + 1) for c in range(fmt.columns)])
    axis.set_yticks(range(fmt.rows), [row_label(r) for r in range(fmt.rows)])
    axis.set_xticks(np.arange(-0.5, fmt.columns), minor=True)
    axis.set_yticks(np.arange(-0.5, fmt.rows), minor=True)
    axis.grid(which="minor", color="white", linewidth=1)
    axis.tick_params(which="minor", length=0, labelsize=7 if fmt.wells <= 96 else 5)
    for _, well in profile[profile["excluded_by"] != ""].iterrows():
        axis.text(well["column"] - 1, well["row"] - 1, "x", ha="center", va="center", color="red", fontsize=12)
    handles = [Patch(color=c, label=r.replace("_", " ")) for r, c in ROLE_COLOURS.items()]
    axis.legend(handles=handles, bbox_to_anchor=(1.01, 1), loc="upper left", fontsize=8)
    axis.set_title("layout: well roles (x: excluded well)")
    return figure


def _role_panel(axis: plt.Axes, data: pd.DataFrame, feature: str, order: list[str]) -> None:
    """One feature's wells by role: every well a point (jittered across its role's column by a
    generator of its own, so the page does not depend on numpy's global state) over a box of the
    quartiles with whiskers to 1.5 IQR."""
    jitter = np.random.default_rng(0)
    values = [data.loc[data["role"] == role, feature].dropna().to_numpy(float) for role in order]
    for position, (role, points) in enumerate(zip(order, values)):
        x = position + jitter.uniform(-0.25, 0.25, len(points))
        axis.scatter(x, points, s=12, color=ROLE_COLOURS.get(role, "#777777"), edgecolor="#333333", linewidth=0.3)
    axis.boxplot(values, positions=range(len(order)), widths=0.5, showfliers=False, medianprops={"color": "black"})
    axis.set_xticks(range(len(order)), [role.replace("_", " ") for role in order], rotation=20, fontsize=8)
    axis.set_ylabel(feature, fontsize=8)


def control_distributions(profile: pd.DataFrame, features: list[str]) -> plt.Figure:
    """Well values by role, one panel per feature (four to a row)."""
    figure, axes = plt.subplots(1, 4, figsize=(16.8, 3.6), squeeze=False)
    for axis in axes[0][len(features) :]:
        axis.set_visible(False)
    data = profile[profile["excluded_by"] == ""]
    for axis, feature in zip(axes[0], features):
        order = [r for r in ANALYSED_ROLES if data.loc[data["role"] == r, feature].notna().any()]
        axis.set_title(feature, fontsize=9)
        if not order:
            axis.text(0.5, 0.5, "no values", ha="center", va="center", transform=axis.transAxes)
            continue
        _role_panel(axis, data, feature, order)
    fixed_margins(figure, 1)  # drawn once: no tight_layout, no trimming
    return figure


def flat_field_figure(flat_fields: dict[str, np.ndarray]) -> plt.Figure:
    """The illumination profile of every channel (relative illumination, mean 1)."""
    figure, axes = plt.subplots(1, len(flat_fields), figsize=(3.6 * len(flat_fields), 3.2), squeeze=False)
    for axis, (channel, profile) in zip(axes[0], flat_fields.items()):
        shown = axis.imshow(profile, cmap="viridis")
        axis.set_title(f"{channel}: {profile.min():.2f} to {profile.max():.2f}", fontsize=9)
        axis.set_xticks([])
        axis.set_yticks([])
        figure.colorbar(shown, ax=axis, fraction=0.046)
    figure.tight_layout()
    return figure


def illumination_html(flat_fields: dict[str, np.ndarray] | None, skipped: dict[str, list[str]] | None = None) -> str:
    """The report section on illumination correction (with the sampled sites left out, per channel)."""
    if not flat_fields:
        return "<p>No illumination correction (illumination.method: none).</p>"
    left_out = "".join(
        f"<li>{escape(channel)}: {escape(reason)}</li>"
        for channel, reasons in (skipped or {}).items()
        for reason in reasons
    )
    return (
        "<p>Flat-field profiles estimated from this plate's own sites (a low per-pixel percentile of images scaled by "
        "their medians, smoothed, mean 1); every image was divided by its channel's profile before "
        "segmentation and measurement. Title: lowest to highest relative illumination.</p>"
        + figure_tag(flat_field_figure(flat_fields), "illumination profiles")
        + (
            f'<div class="caution">Sampled sites left out of the flat field:<ul>{left_out}</ul></div>'
            if left_out
            else ""
        )
    )


QC_COLUMNS = [
    "feature",
    "n_negative",
    "n_positive",
    "negative_median",
    "positive_median",
    "negative_cv",
    "positive_cv",
    "z_prime",
    "robust_z_prime",
    "ssmd",
    "robust_ssmd",
    "signal_window",
    "verdict",
]
QC_TEXT = (
    "<p>Z' = 1 - 3(sd<sub>pos</sub> + sd<sub>neg</sub>) / |mean<sub>pos</sub> - "
    "mean<sub>neg</sub>| (Zhang, Chung &amp; Oldenburg 1999), robust form with medians and 1.4826 x MAD; "
    "SSMD = (mean<sub>pos</sub> - mean<sub>neg</sub>) / sqrt(var<sub>pos</sub> + var<sub>neg</sub>) "
    "(Zhang 2007). "
    "Verdict bands: Z' &ge; 0.5 excellent, 0 &lt; Z' &lt; 0.5 marginal, Z' &le; 0 unusable for single-point "
    "screening.</p>"
)
EDGE_TEXT = (
    "<p>Least squares of each well value on its treatment plus an outer-well indicator (log scale for "
    "positive features): edge_shift is the outer-minus-inner difference (log ratio or unit).</p>"
)
IMAGE_QC_TEXT = (
    "<p>Per site and frame: focus score (variance of the Laplacian over the squared mean), "
    "empty fields (no nucleus found) and the largest saturated-pixel fraction of any channel.</p>"
)


@dataclass(frozen=True)
class PlatePage:
    """What a plate report names: plate, batch, format, the heatmap feature, provenance, flat fields."""

    plate: str
    batch: str
    fmt: PlateFormat
    report_feature: str
    provenance: dict
    flat_fields: dict[str, np.ndarray] | None = None
    thumbnails: dict[str, bytes] | None = None  # PNG per well (plateloom.well.snapshot)
    flagged_wells: dict[str, list[str]] | None = None  # site-QC flags per well
    flat_field_skipped: dict[str, list[str]] | None = None  # per channel: sampled sites left out, with why
    max_control_drift: float = 0.2  # kinetics.max_control_drift (natural-log ratio)


def _summary_html(tables: PlateTables, page_info: PlatePage) -> str:
    profile = tables.profile
    excluded = profile[profile["excluded_by"] != ""]
    n_kept = int((profile["excluded_by"] == "").sum())
    plate_rule = profile["plate_excluded_by"].iloc[0] if "plate_excluded_by" in profile and len(profile) else ""
    status = (
        f'<p class="caution"><b>This plate is left out of the screen model</b> by the rule {escape(plate_rule)}.</p>'
        if plate_rule
        else "<p>This plate enters the screen model.</p>"
    )
    summary = (
        f"<p>Plate <b>{escape(page_info.plate)}</b>, batch <b>{escape(page_info.batch)}</b>, "
        f"{page_info.fmt.wells}-well format: "
        f"{len(profile)} analysed wells, {n_kept} kept, {len(excluded)} excluded; "
        f"{int(profile['n_observations'].sum())} observations, {int(profile['n_tracks'].sum())} tracks.</p>" + status
    )
    if tables.warnings:
        summary += "<ul>" + "".join(f"<li>{escape(w)}</li>" for w in tables.warnings) + "</ul>"
    outliers = profile[profile.get("cell_count_outlier", False) == True]  # noqa: E712
    if len(outliers):
        summary += f"<p>Cell-count outliers (|robust z| &gt; 3.5): {escape(', '.join(outliers['well']))}.</p>"
    return summary


def _maps_html(profile: pd.DataFrame, report_feature: str, fmt: PlateFormat) -> str:
    heatmaps = figure_tag(role_map(profile, fmt), "layout role map")
    heatmaps += figure_tag(plate_heatmap(profile, "cell_count", fmt), "cell count heatmap")
    if report_feature in profile.columns and report_feature != "cell_count":
        heatmaps += figure_tag(plate_heatmap(profile, report_feature, fmt), f"{report_feature} heatmap")
    return heatmaps


def _controls_over_time(tables: PlateTables, page_info: PlatePage) -> str:
    course = tables.time_course
    intensity = [c for c in course.columns if c.startswith("mean_intensity_")] if course is not None else []
    features = list(dict.fromkeys(["cell_count", page_info.report_feature, *intensity]))
    drift = f"{page_info.max_control_drift:g} natural-log ratio (kinetics.max_control_drift)"
    return control_time_course_html(course, features, drift)


def build_plate_report(tables: PlateTables, page_info: PlatePage) -> str:
    """The self-contained HTML report of one plate from its plate-stage tables."""
    profile, qc = tables.profile, tables.qc
    features = qc["feature"].tolist()
    distributions = "".join(
        figure_tag(control_distributions(profile, features[i : i + 4]), "control distributions", trim=False)
        for i in range(0, len(features), 4)
    )
    ledger_html = "<p>Nothing was excluded.</p>" if tables.ledger.empty else table_tag(tables.ledger)
    sections = [
        ("Summary", _summary_html(tables, page_info)),
        ("Plate maps", _maps_html(profile, page_info.report_feature, page_info.fmt)),
        ("Control and test wells", distributions),
        ("Z'-factor and SSMD per feature", QC_TEXT + table_tag(qc[QC_COLUMNS])),
        ("Edge effect", EDGE_TEXT + table_tag(tables.edge)),
        ("Image QC", IMAGE_QC_TEXT + table_tag(pd.DataFrame([tables.site_summary]))),
        ("Controls over time", _controls_over_time(tables, page_info)),
        ("Segmentation and tracks", thumbnails_html(profile, page_info.thumbnails, page_info.flagged_wells)),
        ("Illumination", illumination_html(page_info.flat_fields, page_info.flat_field_skipped)),
        ("Exclusion ledger", ledger_html),
    ]
    return page(f"plateloom plate report: {page_info.plate}", sections, page_info.provenance)
