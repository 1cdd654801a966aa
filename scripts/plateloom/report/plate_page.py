"""The plate report: heatmaps in plate geometry, control distributions, Z' table, exclusions."""

from __future__ import annotations

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
import seaborn as sns

from plateloom.report.html import escape, figure_tag, page, table_tag
from plateloom.setup.plate_formats import PlateFormat, row_label, well_grid

ROLE_ORDER = ["negative_control", "positive_control", "test"]


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


def control_distributions(profile: pd.DataFrame, features: list[str]) -> plt.Figure:
    """Well values by role, one panel per feature (four to a row)."""
    figure, axes = plt.subplots(1, 4, figsize=(16.8, 3.6), squeeze=False)
    for axis in axes[0][len(features) :]:
        axis.set_visible(False)
    data = profile[profile["excluded_by"] == ""]
    for axis, feature in zip(axes[0], features):
        order = [r for r in ROLE_ORDER if data.loc[data["role"] == r, feature].notna().any()]
        if not order:
            axis.text(0.5, 0.5, "no values", ha="center", va="center", transform=axis.transAxes)
            axis.set_title(feature, fontsize=9)
            continue
        sns.stripplot(data=data, x="role", y=feature, order=order, ax=axis, size=4, jitter=0.25)
        sns.boxplot(
            data=data,
            x="role",
            y=feature,
            order=order,
            ax=axis,
            showfliers=False,
            boxprops={"facecolor": "none"},
            width=0.5,
        )
        axis.tick_params(axis="x", labelrotation=20, labelsize=8)
        axis.set_xlabel("")
    figure.tight_layout()
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


def illumination_html(flat_fields: dict[str, np.ndarray] | None) -> str:
    """The report section on illumination correction."""
    if not flat_fields:
        return "<p>No illumination correction (illumination.method: none).</p>"
    return (
        "<p>Flat-field profiles estimated from this plate's own sites (a low per-pixel percentile of images scaled by "
        "their medians, smoothed, mean 1); every image was divided by its channel's profile before "
        "segmentation and measurement. Title: lowest to highest relative illumination.</p>"
        + figure_tag(flat_field_figure(flat_fields), "illumination profiles")
    )


def build_plate_report(
    profile: pd.DataFrame,
    qc: pd.DataFrame,
    ledger: pd.DataFrame,
    edge: pd.DataFrame,
    warnings: list[str],
    site_summary: dict[str, float],
    plate: str,
    batch: str,
    fmt: PlateFormat,
    report_feature: str,
    provenance: dict,
    flat_fields: dict[str, np.ndarray] | None = None,
) -> str:
    """The self-contained HTML report of one plate; ``flat_fields`` are the illumination profiles per channel."""
    excluded = profile[profile["excluded_by"] != ""]
    n_kept = int((profile["excluded_by"] == "").sum())
    plate_rule = profile["plate_excluded_by"].iloc[0] if "plate_excluded_by" in profile and len(profile) else ""
    status = (
        f'<p class="caution"><b>This plate is left out of the screen model</b> by the rule {escape(plate_rule)}.</p>'
        if plate_rule
        else "<p>This plate enters the screen model.</p>"
    )
    summary = (
        f"<p>Plate <b>{escape(plate)}</b>, batch <b>{escape(batch)}</b>, {fmt.wells}-well format: "
        f"{len(profile)} analysed wells, {n_kept} kept, {len(excluded)} excluded; "
        f"{int(profile['n_observations'].sum())} observations, {int(profile['n_tracks'].sum())} tracks.</p>" + status
    )
    if warnings:
        summary += "<ul>" + "".join(f"<li>{escape(w)}</li>" for w in warnings) + "</ul>"
    outliers = profile[profile.get("cell_count_outlier", False) == True]  # noqa: E712
    if len(outliers):
        summary += f"<p>Cell-count outliers (|robust z| &gt; 3.5): {escape(', '.join(outliers['well']))}.</p>"
    heatmaps = figure_tag(plate_heatmap(profile, "cell_count", fmt), "cell count heatmap")
    if report_feature in profile.columns and report_feature != "cell_count":
        heatmaps += figure_tag(plate_heatmap(profile, report_feature, fmt), f"{report_feature} heatmap")
    features = qc["feature"].tolist()
    distributions = "".join(
        figure_tag(control_distributions(profile, features[i : i + 4]), "control distributions")
        for i in range(0, len(features), 4)
    )
    site_html = table_tag(pd.DataFrame([site_summary]))
    qc_table = table_tag(
        qc[
            [
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
        ]
    )
    edge_html = (
        "<p>Least squares of each well value on its treatment plus an outer-well indicator (log scale for "
        "positive features): edge_shift is the outer-minus-inner difference (log ratio or unit).</p>" + table_tag(edge)
    )
    ledger_html = "<p>Nothing was excluded.</p>" if ledger.empty else table_tag(ledger)
    sections = [
        ("Summary", summary),
        ("Plate maps", heatmaps),
        ("Control and test wells", distributions),
        (
            "Z'-factor and SSMD per feature",
            "<p>Z' = 1 - 3(sd<sub>pos</sub> + sd<sub>neg</sub>) / |mean<sub>pos</sub> - "
            "mean<sub>neg</sub>| (Zhang, Chung &amp; Oldenburg 1999), robust form with medians and 1.4826 x MAD; "
            "SSMD = (mean<sub>pos</sub> - mean<sub>neg</sub>) / sqrt(var<sub>pos</sub> + var<sub>neg</sub>) "
            "(Zhang 2007). "
            "Verdict bands: Z' &ge; 0.5 excellent, 0 &lt; Z' &lt; 0.5 marginal, Z' &le; 0 unusable for single-point "
            "screening.</p>" + qc_table,
        ),
        ("Edge effect", edge_html),
        (
            "Image QC",
            "<p>Per site and frame: focus score (variance of the Laplacian over the squared mean), "
            "empty fields (no nucleus found) and the largest saturated-pixel fraction of any channel.</p>" + site_html,
        ),
        ("Illumination", illumination_html(flat_fields)),
        ("Exclusion ledger", ledger_html),
    ]
    return page(f"plateloom plate report: {plate}", sections, provenance)
