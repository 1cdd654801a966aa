"""One report page per treatment: its effects on every feature, its compound's dose-response, its
effects over time, and the plates and wells it sits in (linked to the plate reports)."""

from __future__ import annotations

import functools
import hashlib
import re

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd

from plateloom.report.html import escape, figure_tag, linked_cells, page, table_tag
from plateloom.report.montage import crop_feature_names, montage_figure, sample_crops
from plateloom.report.time_panels import effect_curves_figure
from plateloom.screen.kinetics import significant
from plateloom.screen.model_wells import in_model

TREATMENT_COLUMNS = ["feature", "scale", "estimate", "ci_low", "ci_high", "ratio", "df", "q_value", "hit", "n_wells"]


def page_name(treatment: str) -> str:
    """The file name of a treatment's page: its name with every character other than a letter, a
    digit, '-' or '.' replaced by '_', and 6 hex digits of its SHA-256 so that two names never share a file."""
    slug = re.sub(r"[^A-Za-z0-9.-]+", "_", treatment).strip("_")[:60] or "treatment"
    return f"{slug}-{hashlib.sha256(treatment.encode()).hexdigest()[:6]}.html"


def effects_across_features(rows: pd.DataFrame, ci_level: float) -> plt.Figure:
    """The treatment's standardized effect on every feature (effect / negative-control well SD)
    with its interval; hits in red."""
    rows = rows[np.isfinite(rows["standardized_effect"].to_numpy(float))].iloc[::-1]
    spread = rows["control_well_sd"].to_numpy(float)
    centre = rows["standardized_effect"].to_numpy(float)
    low, high = rows["ci_low"].to_numpy(float) / spread, rows["ci_high"].to_numpy(float) / spread
    figure, axis = plt.subplots(figsize=(6.5, 0.3 * len(rows) + 1.2))
    y = np.arange(len(rows))
    colours = np.where(rows["hit"], "#b8322a", "#33546e")
    axis.errorbar(centre, y, xerr=[centre - low, high - centre], fmt="none", ecolor=colours, elinewidth=1.5)
    axis.scatter(centre, y, c=colours, zorder=3, s=18)
    axis.axvline(0.0, color="grey", linestyle="--", linewidth=1)
    axis.set_yticks(y, rows["feature"], fontsize=8)
    axis.set_xlabel(f"effect in negative-control well SDs ({ci_level:.0%} CI; red = hit)")
    figure.tight_layout()
    return figure


def _wells_html(wells: pd.DataFrame, treatment: str) -> str:
    """The plates and wells of the treatment, each plate linked to its report (excluded wells marked)."""
    mine = wells[wells["treatment"] == treatment].sort_values(["batch", "plate", "well"])
    items = []
    for (batch, plate), group in mine.groupby(["batch", "plate"], sort=False, observed=True):
        listed = ", ".join(
            escape(w) + (f" (excluded: {escape(x)})" if x else "")
            for w, x in zip(group["well"], group["excluded_by"].fillna(""))
        )
        items.append(
            f'<li>{escape(batch)}: <a href="../plates/{escape(plate)}.html">{escape(plate)}</a>: {listed}</li>'
        )
    return "<ul>" + "".join(items) + "</ul>" if items else "<p>In no analysed well.</p>"


def page_feature(rows: pd.DataFrame, per_cell: set[str]) -> str:
    """The feature a treatment page's montage is ordered by: of the per-cell features, the one with
    the largest |standardized effect| among the treatment's hits, else among all its features;
    area_um2 when no effect is on a per-cell feature."""
    candidates = rows[rows["feature"].isin(per_cell) & np.isfinite(rows["standardized_effect"].to_numpy(float))]
    if candidates.empty:
        return "area_um2"
    size = candidates["standardized_effect"].abs()
    ranked = candidates.assign(size=size).sort_values(["hit", "size", "feature"], ascending=[False, False, True])
    return str(ranked["feature"].iloc[0])


def montage_html(wells: pd.DataFrame, treatments: list[str], files: dict | None, order_by: str = "area_um2") -> str:
    """Montages of the given treatments' cells and the negative controls' (one contrast for all),
    sampled across plates and days from the wells kept in the model, ordered by ``order_by`` (a
    per-cell feature)."""
    if not files:
        return "<p>No cell crops (thumbnails are written by the per-well jobs).</p>"
    kept = wells[in_model(wells)]
    groups, pixel, channels = [], None, None
    for label, mine in [("negative controls", kept["role"] == "negative_control")] + [
        (t, kept["treatment"] == t) for t in treatments
    ]:
        sample = sample_crops(kept[mine], files, order_by=order_by)
        if sample is not None:
            crops, _, pixel, channels = sample
            groups.append((f"{label}: {len(crops)} cells by {order_by}, lowest first", crops))
    if not groups:
        return "<p>No cell crops for these wells.</p>"
    return (
        "<p>Nuclei cut from each well's thumbnail frame (its first frame flagged by site QC, else its last "
        "usable frame), up to 3 per well, taken in turn from every plate and day, ordered by "
        f"{escape(order_by)} (the cell's own value); the same contrast per channel in every panel.</p>"
        + figure_tag(montage_figure(groups, pixel, channels), "cell montage")
    )


MAX_TIME_PANELS = 4


def _time_panels(curves: pd.DataFrame, threshold: float) -> pd.DataFrame:
    """The curves of a treatment page: its features with a significant window first (most such
    windows first), then by the largest |estimate / SE| of any window; MAX_TIME_PANELS at most."""
    with np.errstate(divide="ignore", invalid="ignore"):
        size = (curves["estimate"] / curves["std_error"]).abs().to_numpy(float)
    ranks = (
        curves.assign(_s=significant(curves, threshold), _t=np.nan_to_num(size))
        .groupby("feature", sort=True)
        .agg(windows=("_s", "sum"), strongest=("_t", "max"))
        .sort_values(["windows", "strongest"], ascending=False, kind="stable")
    )
    rank = {feature: position for position, feature in enumerate(ranks.index[:MAX_TIME_PANELS])}
    shown = curves[curves["feature"].isin(rank)]
    return shown.assign(_rank=shown["feature"].map(rank)).sort_values(["_rank", "window"]).drop(columns="_rank")


def _time_html(effects_over_time: pd.DataFrame | None, treatment: str, threshold: float) -> str:
    if effects_over_time is None or effects_over_time.empty:
        return "<p>Not run.</p>"
    curves = effects_over_time[effects_over_time["treatment"] == treatment]
    if curves.empty:
        return "<p>No effects over time for this treatment.</p>"
    shown = _time_panels(curves, threshold)
    figure = figure_tag(effect_curves_figure(shown, "", panel="feature"), "effects over time", trim=False)
    return (
        f"<p>Effect per time window with pointwise intervals (bars) and the simultaneous band (shaded), "
        f"as in the screen report, for {shown['feature'].nunique()} of {curves['feature'].nunique()} features: "
        "those with a significant window first, then those with the largest |estimate / SE|. "
        "Every window is in results/effects_over_time.</p>" + figure
    )


def _cells_html(rows: pd.DataFrame, context: dict) -> str:
    files = context.get("crop_files")
    per_cell = context["crop_features"] if "crop_features" in context else crop_feature_names(files or {})
    order_by = page_feature(rows, per_cell) if files else "area_um2"
    treatment = str(rows["treatment"].iloc[0])
    return montage_html(context["wells"], [treatment], files, order_by)


def treatment_page(treatment: str, context: dict, provenance: dict) -> str:
    """The HTML page of one treatment. ``context`` holds effects, wells, settings and, when run,
    dose_html (condition -> its dose-response figures as HTML) and effects_over_time."""
    effects = context["effects"]
    rows = effects[effects["treatment"] == treatment]
    first = rows.iloc[0]
    settings = context["settings"]
    summary = (
        f"<p>Condition {escape(first['condition'])}, dose {escape(first['dose'])} {escape(first['dose_unit'])}, "
        f"role {escape(first['role'])}; {int(rows['hit'].sum())} hit(s) over {len(rows)} features. "
        '<a href="../screen.html">Back to the screen report</a>.</p>'
    )
    doses = context["dose_html"](first["condition"]) if "dose_html" in context else ""
    sections = [
        ("Summary", summary),
        ("Effects on every feature", figure_tag(effects_across_features(rows, settings["ci_level"]), "effects")
         + table_tag(rows[TREATMENT_COLUMNS + ["note"]])),
        ("Dose-response of the compound", doses or "<p>No identifiable dose-response fit for this compound.</p>"),
        ("Effects over time", _time_html(context.get("effects_over_time"), treatment, settings["hit_q_value"])),
        ("Cells", _cells_html(rows, context)),
        ("Plates and wells", _wells_html(context["wells"], treatment)),
    ]  # fmt: skip
    return page(f"plateloom treatment: {treatment}", sections, provenance)


def linked_treatments(table_html: str, treatments: list[str]) -> str:
    """Every treatment-name cell of a table linked to the treatment's page (reports/treatments/)."""
    return linked_cells(table_html, {t: f"treatments/{page_name(t)}" for t in treatments})


def treatment_context(results, settings: dict) -> dict:
    """What every treatment page reads (``results``: a ``ScreenResults``): effects, wells, settings,
    dose_html (a compound's dose-response figures, drawn once per process and shown on each of its
    doses' pages), effects over time, the crop files and the per-cell features they carry."""
    from plateloom.report.screen_page import dose_response_plot  # imported here: screen_page imports this module

    dose_figures: dict[str, list] = {}
    if results.dose_fits is not None and results.dose_points is not None:
        points = results.dose_points
        for _, fit in results.dose_fits[results.dose_fits["identifiable"]].iterrows():
            mine = (points["feature"] == fit["feature"]) & (
                (points["condition"] == fit["condition"]) | (points["role"] == "negative_control")
            )
            dose_figures.setdefault(fit["condition"], []).append(
                (f"dose-response {fit['feature']}", lambda fit=fit, part=points[mine]: dose_response_plot(fit, part))
            )

    @functools.cache
    def dose_html(condition: str) -> str:
        return "".join(figure_tag(build(), alt) for alt, build in dose_figures.get(condition, []))

    return {
        "effects": results.effects,
        "wells": results.wells,
        "settings": settings,
        "dose_html": dose_html,
        "effects_over_time": results.effects_over_time,
        "crop_files": results.crop_files,
        "crop_features": crop_feature_names(results.crop_files or {}),
    }
