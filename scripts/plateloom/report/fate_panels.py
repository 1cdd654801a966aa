"""The screen report's "Cell fate" section: mode of action in growth terms, rate and hazard ratios,
survival curves and GR curves per compound."""

from __future__ import annotations

from dataclasses import dataclass
from html import escape

import matplotlib.pyplot as plt
import numpy as np
import pandas as pd
from matplotlib.ticker import FuncFormatter, NullFormatter

from plateloom.report.html import figure_tag, folded, table_tag
from plateloom.report.time_panels import fixed_margins
from plateloom.screen.growth_inhibition import gr_curve


@dataclass(frozen=True)
class FateResults:
    """The fate_effects rule's tables (plateloom.screen.fate_effects)."""

    effects: pd.DataFrame
    survival: pd.DataFrame
    growth: pd.DataFrame
    gr_curves: pd.DataFrame


def _compounds(growth: pd.DataFrame) -> list[str]:
    """Compounds tested at two doses or more (the ones with a curve to draw)."""
    doses = growth[growth["dose"] > 0].groupby("condition")["dose"].nunique()
    return sorted(doses[doses >= 2].index.astype(str))


def _plain_log_axis(ax: plt.Axes) -> None:
    """Log-scaled x axis with plain-number tick labels (no mathtext)."""
    ax.set_xscale("log")
    ax.xaxis.set_major_formatter(FuncFormatter(lambda value, _: f"{value:g}"))
    ax.xaxis.set_minor_formatter(NullFormatter())


def _with_interval(values: pd.Series, low: pd.Series, high: pd.Series) -> list[str]:
    return [
        "" if pd.isna(v) else f"{v:.3g} [{lo:.3g}, {hi:.3g}]" if pd.notna(lo) else f"{v:.3g}"
        for v, lo, hi in zip(values, low, high)
    ]


def _gr_table(fits: pd.DataFrame) -> pd.DataFrame:
    """Per compound: GR50, GRmax, GR_inf, Hill slope and GR_AOC, each with its interval, and the mode."""
    table = fits[["condition", "n_doses"]].copy()
    for name in ("gr50", "gr_max", "gr_inf", "hill", "gr_aoc"):
        table[name] = _with_interval(fits[name], fits[f"{name}_ci_low"], fits[f"{name}_ci_high"])
    table["mode"] = fits["mode"]
    return table


def _compound_grid(n_compounds: int) -> tuple[plt.Figure, np.ndarray]:
    """Small multiples, up to 4 a row, one per compound, sharing the y axis."""
    columns = min(4, max(1, n_compounds))
    rows = int(np.ceil(n_compounds / columns)) or 1
    return plt.subplots(rows, columns, figsize=(3.2 * columns, 2.6 * rows), squeeze=False, sharey=True)


def _finished(figure: plt.Figure, axes: np.ndarray, used: int, ylabel: str) -> plt.Figure:
    """Hide the unused panels, label the first, and set fixed margins (``time_panels.fixed_margins``:
    no layout pass that an empty or log-scaled panel can break)."""
    for ax in list(axes.flat)[used:]:
        ax.set_visible(False)
    axes[0, 0].set_ylabel(ylabel)
    fixed_margins(figure, axes.shape[0])
    return figure


def survival_plot(survival: pd.DataFrame, growth: pd.DataFrame) -> plt.Figure:
    """Small multiples, one per compound: the negative controls' survival (grey, pooled band) and
    each dose's (darker for higher doses), with well-bootstrap bands."""
    compounds = _compounds(growth)
    figure, axes = _compound_grid(len(compounds))
    controls = survival[survival["role"] == "negative_control"].astype({"survival": float})
    controls = controls.groupby("time_min")[["survival"]].mean()
    for ax, compound in zip(axes.flat, compounds):
        ax.step(controls.index, controls["survival"], where="post", color="0.5", label="negative controls")
        doses = growth[(growth["condition"] == compound) & (growth["dose"] > 0)].sort_values("dose")
        shades = plt.cm.Reds(np.linspace(0.45, 0.95, max(len(doses), 1)))
        for colour, (_, dose) in zip(shades, doses.iterrows()):
            curve = survival[survival["treatment"] == dose["treatment"]]
            if curve.empty:
                continue
            curve = curve.astype({c: float for c in ("time_min", "survival", "ci_low", "ci_high")})
            ax.step(curve["time_min"], curve["survival"], where="post", color=colour, label=f"{dose['dose']:g}")
            ax.fill_between(curve["time_min"], curve["ci_low"], curve["ci_high"], step="post", color=colour, alpha=0.15)
        ax.set_title(compound, fontsize=9)
        ax.set_xlabel("time since first frame (min)", fontsize=8)
        ax.legend(fontsize=6, frameon=False, loc="lower left")
    return _finished(figure, axes, len(compounds), "share of cells alive")


def rates_plot(effects: pd.DataFrame, growth: pd.DataFrame) -> plt.Figure:
    """Division and death rate ratios to the negative controls against dose, with intervals, one
    panel per compound (log-log; 1 = the controls' rate)."""
    compounds = _compounds(growth)
    figure, axes = _compound_grid(len(compounds))
    for ax, compound in zip(axes.flat, compounds):
        for measure, colour, shift in (("division_rate", "tab:blue", 0.94), ("death_rate", "tab:red", 1.06)):
            mine = effects[(effects["condition"] == compound) & (effects["measure"] == measure)]
            mine = mine[(mine["ratio"] > 0) & (mine["ci_low"] > 0) & (mine["dose"] > 0)].sort_values("dose")
            if mine.empty:
                continue
            ax.errorbar(
                mine["dose"] * shift,
                mine["ratio"],
                yerr=[mine["ratio"] - mine["ci_low"], mine["ci_high"] - mine["ratio"]],
                fmt="o-",
                color=colour,
                ms=3,
                lw=0.8,
                label=measure.replace("_", " "),
            )
        ax.axhline(1.0, color="0.6", lw=0.8, ls="--")
        if ax.has_data() and len(ax.lines) > 1:
            ax.set_yscale("log")
            _plain_log_axis(ax)
            ax.yaxis.set_major_formatter(FuncFormatter(lambda value, _: f"{value:g}"))
            ax.yaxis.set_minor_formatter(NullFormatter())
            ax.legend(fontsize=6, frameon=False)
        else:
            ax.text(0.5, 0.5, "no events", transform=ax.transAxes, ha="center", fontsize=8)
        ax.set_title(compound, fontsize=9)
        ax.set_xlabel("dose", fontsize=8)
    return _finished(figure, axes, len(compounds), "rate ratio to controls")


def gr_plot(growth: pd.DataFrame, fits: pd.DataFrame) -> plt.Figure:
    """GR value per dose with its interval and the fitted GR sigmoid, one panel per compound."""
    compounds = _compounds(growth)
    figure, axes = _compound_grid(len(compounds))
    fitted = fits.set_index("condition") if len(fits) else pd.DataFrame()
    for ax, compound in zip(axes.flat, compounds):
        doses = growth[(growth["condition"] == compound) & (growth["dose"] > 0) & growth["gr"].notna()]
        ax.errorbar(
            doses["dose"],
            doses["gr"],
            yerr=[doses["gr"] - doses["gr_ci_low"], doses["gr_ci_high"] - doses["gr"]],
            fmt="o",
            color="black",
            ms=3,
        )
        if compound in fitted.index and fitted.loc[compound, "fitted"]:
            fit = fitted.loc[compound]
            grid = np.geomspace(doses["dose"].min(), doses["dose"].max(), 60)
            ax.plot(grid, gr_curve(grid, fit["gr_inf"], fit["gec50"], fit["hill"]), color="tab:red")
        for level in (0.0, 1.0):
            ax.axhline(level, color="0.6", lw=0.8, ls="--")
        ax.set_ylim(-1.1, 2.0)
        if len(doses):
            _plain_log_axis(ax)
        ax.set_title(compound, fontsize=9)
        ax.set_xlabel("dose", fontsize=8)
    return _finished(figure, axes, len(compounds), "GR value")


def _modes_line(fits: pd.DataFrame) -> str:
    """Compounds listed by mode of action (at their highest dose)."""
    parts = []
    for mode in ("cytotoxic", "cytostatic", "no growth effect"):
        names = sorted(fits.loc[fits["mode"] == mode, "condition"].astype(str))
        parts.append(f"<b>{mode}</b>: {escape(', '.join(names)) if names else 'none'}")
    return "<p>" + "; ".join(parts) + ".</p>"


def _ratio_table(effects: pd.DataFrame) -> pd.DataFrame:
    """One row per treatment: each measure's ratio with its interval, as text, and its q-value."""
    wide = effects.assign(
        text=[
            "" if pd.isna(r) else f"{r:.3g} [{low:.3g}, {high:.3g}]"
            for r, low, high in zip(effects["ratio"], effects["ci_low"], effects["ci_high"])
        ]
    )
    text = wide.pivot(index="treatment", columns="measure", values="text")
    q = wide.pivot(index="treatment", columns="measure", values="q_value").add_suffix(" q")
    events = wide.pivot(index="treatment", columns="measure", values="n_events").add_suffix(" events")
    order = [c for m in ("division_rate", "death_rate", "death_hazard") for c in (f"{m} events", m, f"{m} q")]
    table = text.join([q, events])
    return table[[c for c in order if c in table.columns]].rename_axis(columns=None).reset_index()


def fate_html(fate: FateResults | None) -> str:
    """The section's HTML: compounds by mode of action, the GR table and curves, the rate and hazard
    ratios per treatment, and the survival curves."""
    if fate is None:
        return "<p>Not computed.</p>"
    growth = fate.growth
    undefined = growth["note"].str.contains("did not grow", regex=False).any() if len(growth) else False
    modes = (
        "<p>The negative controls did not grow over the film, so GR values (which compare growth with "
        "theirs) are not defined.</p>"
        if undefined
        else _modes_line(fate.gr_curves)
        + folded(
            "GR50, GRmax, GR_inf, Hill slope and GR_AOC per compound, and the GR curves",
            table_tag(_gr_table(fate.gr_curves)) + figure_tag(gr_plot(growth, fate.gr_curves), "GR curves", trim=False),
        )
    )
    notes = fate.effects[fate.effects["note"] != ""][["measure", "treatment", "note"]]
    return (
        "<p>Growth-rate inhibition (GR; Hafner et al. 2016): GR = 2^(k/k0) - 1 from each treatment's "
        "nuclei-count growth rate k against the negative controls' k0. Mode of action at the highest dose: "
        "cytotoxic (GR interval below 0: fewer cells than at the start), cytostatic (growth slowed), "
        "no growth effect (interval reaches 1). Intervals [low, high]: GR values by the delta method, curve "
        "parameters by a parametric bootstrap.</p>"
        + modes
        + "<p>Division and death rates (events per cell-hour) and the hazard of death, each as a ratio to "
        "the negative controls with its interval [low, high] and BH q-value within the measure:</p>"
        + folded(
            "Division and death rate ratios against dose, per compound",
            figure_tag(rates_plot(fate.effects, growth), "division and death rate ratios against dose", trim=False),
        )
        + folded("The rate and hazard ratios of every treatment", table_tag(_ratio_table(fate.effects)))
        + ("" if notes.empty else folded(f"{len(notes)} rows with a note", table_tag(notes)))
        + folded(
            "Survival curves per compound (Kaplan-Meier, well-bootstrap bands)",
            figure_tag(survival_plot(fate.survival, growth), "survival curves", trim=False),
        )
        + "<p>Event calls rest on the rules in config fate; check them on your own images.</p>"
    )
