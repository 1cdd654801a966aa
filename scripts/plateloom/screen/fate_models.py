"""Condition effects on cell fate: event-rate ratios, survival curves and death hazard ratios.

- Rate ratios: a negative-binomial (NB2) regression of each well's events (divisions or deaths)
  with its cell-hours as exposure (log offset), plate fixed effects (which absorb the batch and
  the plate within it) and one indicator per treatment against the negative controls. Wells vary
  more than Poisson counts (var = mu + alpha mu^2); alpha is the moment estimate from the Poisson
  fit's residuals, sum(((y - mu)^2 - mu) / mu^2) / residual df (common practice), and the Pearson
  scale of the NB fit takes up what remains (quasi-likelihood; McCullagh & Nelder 1989,
  Generalized Linear Models, 2nd ed., sec. 9.2). Intervals use t on the residual df.
- Survival: Kaplan-Meier (1958) with delayed entry (a cell enters the risk set when its track
  starts: daughters are born during the film), intervals from a bootstrap of wells (the well,
  not the cell, is the unit that was treated).
- Hazard ratios: Cox proportional hazards with delayed entry, stratified by plate, with
  well-clustered (sandwich) standard errors (Lin & Wei 1989, JASA 84:1074), via statsmodels' PHReg.

A treatment that shares no plate with negative controls is not estimable under plate fixed effects
or strata: its row says so instead of borrowing another plate's controls.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import statsmodels.api as sm
from scipy import stats
from statsmodels.duration.hazard_regression import PHReg

from plateloom.columns import REFERENCE_ROLE


def _comparable(rows: pd.DataFrame) -> tuple[pd.DataFrame, dict[str, str]]:
    """The rows (wells or cells) on plates that have negative controls, and a note for each
    treatment none of whose rows is on such a plate."""
    control_plates = set(rows.loc[rows["role"] == REFERENCE_ROLE, "plate"])
    on_control_plates = rows["plate"].isin(control_plates)
    tested = rows.loc[rows["role"] != REFERENCE_ROLE, "treatment"].astype(str)
    reachable = set(tested[on_control_plates])
    note = "no plate with negative controls: not estimable with plate effects"
    return rows[on_control_plates], {t: note for t in sorted(set(tested) - reachable)}


def _design(wells: pd.DataFrame) -> tuple[np.ndarray, list[str]]:
    """Columns: one per plate (intercepts) and one indicator per non-control treatment."""
    plates = pd.get_dummies(wells["plate"].astype(str), dtype=float)
    tested = sorted(wells.loc[wells["role"] != REFERENCE_ROLE, "treatment"].astype(str).unique())
    indicators = [(wells["treatment"].astype(str) == t).to_numpy(float)[:, None] for t in tested]
    return np.hstack([plates.to_numpy(), *indicators]), tested


RATE_COLUMNS = [
    "treatment",
    "n_wells",
    "n_events",
    "cell_hours",
    "rate_per_cell_h",
    "rate_ratio",
    "ci_low",
    "ci_high",
    "p_value",
    "df",
    "alpha",
    "scale",
    "note",
]


def rate_ratios(wells: pd.DataFrame, events: str, exposure: str = "cell_hours", level: float = 0.95) -> pd.DataFrame:
    """Per non-control treatment: the ratio of its event rate to the negative controls' (see the
    module docstring), with a ``level`` t interval and p-value; alpha (NB2 overdispersion) and
    scale (Pearson) of the fit. ``wells``: plate, role, treatment, ``events`` (counts) and
    ``exposure`` (cell-hours; wells without exposure are left out) per well."""
    usable = wells[wells[exposure] > 0]
    comparable, notes = _comparable(usable)
    totals = comparable.groupby(comparable["treatment"].astype(str))[events].sum()
    silent = comparable["treatment"].astype(str).map(totals).eq(0) & (comparable["role"] != REFERENCE_ROLE)
    for treatment in sorted(set(comparable.loc[silent, "treatment"].astype(str))):
        notes[treatment] = "no events under this treatment"
    comparable = comparable[~silent]
    x, tested = _design(comparable)
    y, offset = comparable[events].to_numpy(float), np.log(comparable[exposure].to_numpy(float))
    rows = []
    fit = _negative_binomial_fit(y, x, offset) if len(tested) and y.sum() > 0 and len(y) > x.shape[1] else None
    for i, treatment in enumerate(tested):
        mine = comparable[comparable["treatment"].astype(str) == treatment]
        row = _rate_row(treatment, mine, events, exposure)
        column = x.shape[1] - len(tested) + i
        if fit is None:
            row["note"] = "no events, or no residual df"
        else:
            row.update(_ratio_interval(fit, column, level))
        rows.append(row)
    for treatment, note in notes.items():
        rows.append(_rate_row(treatment, usable[usable["treatment"] == treatment], events, exposure) | {"note": note})
    return pd.DataFrame(rows, columns=RATE_COLUMNS)


def _negative_binomial_fit(y: np.ndarray, x: np.ndarray, offset: np.ndarray):
    """NB2 GLM with the moment estimate of alpha from a Poisson fit, Pearson scale (see the module docstring)."""
    poisson = sm.GLM(y, x, family=sm.families.Poisson(), offset=offset).fit()
    mu = poisson.mu
    alpha = max(float(np.sum(((y - mu) ** 2 - mu) / mu**2) / poisson.df_resid), 1e-8)
    fit = sm.GLM(y, x, family=sm.families.NegativeBinomial(alpha=alpha), offset=offset).fit(scale="X2")
    fit.alpha = alpha
    return fit


def _rate_row(treatment: str, wells: pd.DataFrame, events: str, exposure: str) -> dict:
    hours = float(wells[exposure].sum())
    total = int(wells[events].sum())
    return {
        "treatment": treatment,
        "n_wells": len(wells),
        "n_events": total,
        "cell_hours": hours,
        "rate_per_cell_h": total / hours if hours > 0 else np.nan,
        "note": "",
    }


def _ratio_interval(fit, column: int, level: float) -> dict:
    estimate, se = float(fit.params[column]), float(fit.bse[column])
    df = float(fit.df_resid)
    quantile = stats.t.ppf(0.5 + level / 2.0, df)
    return {
        "rate_ratio": np.exp(estimate),
        "ci_low": np.exp(estimate - quantile * se),
        "ci_high": np.exp(estimate + quantile * se),
        "p_value": float(2.0 * stats.t.sf(abs(estimate / se), df)),
        "df": df,
        "alpha": float(fit.alpha),
        "scale": float(fit.scale),
    }


def kaplan_meier(entry: np.ndarray, exit: np.ndarray, event: np.ndarray) -> pd.DataFrame:
    """Kaplan-Meier survival with delayed entry: at each distinct event time t, S is multiplied by
    1 - d / n, d the events at t and n the subjects with entry < t <= exit. Columns time, at_risk,
    events, survival (one row per distinct event time)."""
    entry, exit, event = (np.asarray(a) for a in (entry, exit, event))
    times = np.unique(exit[event.astype(bool)])
    entered = np.searchsorted(np.sort(entry), times, side="left")  # entry < t
    left = np.searchsorted(np.sort(exit), times, side="left")  # exit < t
    at_risk = entered - left
    deaths = np.bincount(np.searchsorted(times, exit[event.astype(bool)]), minlength=len(times))
    with np.errstate(invalid="ignore", divide="ignore"):
        survival = np.cumprod(1.0 - deaths / at_risk)
    return pd.DataFrame({"time": times, "at_risk": at_risk, "events": deaths, "survival": survival})


def survival_at(curve: pd.DataFrame, times: np.ndarray) -> np.ndarray:
    """The step function S(t) of a ``kaplan_meier`` curve at ``times`` (1 before the first event)."""
    position = np.searchsorted(curve["time"].to_numpy(), times, side="right")
    return np.concatenate([[1.0], curve["survival"].to_numpy()])[position]


def survival_band(
    cells: pd.DataFrame, times: np.ndarray, n_boot: int = 200, level: float = 0.95, seed: int = 0
) -> pd.DataFrame:
    """S(t) at ``times`` with a well-bootstrap interval: wells resampled with replacement (their
    cells kept together), percentile limits. ``cells``: well, entry_min, exit_min, died."""
    estimate = survival_at(kaplan_meier(cells["entry_min"], cells["exit_min"], cells["died"]), times)
    groups = [part for _, part in cells.groupby("well", sort=True)]
    rng = np.random.default_rng(seed)
    draws = np.empty((n_boot, len(times)))
    for b in range(n_boot):
        sample = pd.concat([groups[i] for i in rng.integers(0, len(groups), len(groups))], ignore_index=True)
        draws[b] = survival_at(kaplan_meier(sample["entry_min"], sample["exit_min"], sample["died"]), times)
    tail = (1.0 - level) / 2.0
    low, high = np.quantile(draws, [tail, 1.0 - tail], axis=0)
    return pd.DataFrame({"time_min": times, "survival": estimate, "ci_low": low, "ci_high": high})


HAZARD_COLUMNS = ["treatment", "n_cells", "n_deaths", "hazard_ratio", "ci_low", "ci_high", "p_value", "note"]


def _cox_clustered(model: PHReg, groups: np.ndarray) -> tuple[float, float]:
    """The Cox fit's log hazard ratio and its cluster-robust SE: inverse information x (sum over
    clusters of the summed score residuals' outer products) x inverse information (Lin & Wei 1989;
    what R's coxph reports with cluster()). A subject at risk at no event time in its stratum has
    a score residual of 0 (statsmodels gives NaN there, so its own robust option is not used)."""
    fit = model.fit()
    residuals = np.nan_to_num(model.score_residuals(fit.params))
    per_cluster = pd.DataFrame(residuals).groupby(groups, sort=False).sum().to_numpy()
    naive = np.asarray(fit.cov_params())
    robust = naive @ (per_cluster.T @ per_cluster) @ naive
    return float(fit.params[0]), float(np.sqrt(robust[0, 0]))


def hazard_ratios(cells: pd.DataFrame, level: float = 0.95) -> pd.DataFrame:
    """Per non-control treatment: the hazard ratio of death against the negative controls (Cox, delayed
    entry, strata = plate, well-clustered standard errors; normal interval), fitted on the
    treatment's cells and the negative controls' on its plates. ``cells`` (one row per track):
    plate, well, role, treatment, entry_min, exit_min, died (bool); a track seen in one frame only
    (exit = entry) is never at risk and is left out."""
    comparable, notes = _comparable(cells[cells["exit_min"] > cells["entry_min"]])
    treatments = comparable["treatment"].astype(str)
    controls = comparable[comparable["role"] == REFERENCE_ROLE]
    quantile = stats.norm.ppf(0.5 + level / 2.0)
    rows = []
    for treatment in sorted(treatments[comparable["role"] != REFERENCE_ROLE].unique()):
        mine = comparable[treatments == treatment]
        row = {"treatment": treatment, "n_cells": len(mine), "n_deaths": int(mine["died"].sum()), "note": ""}
        if row["n_deaths"] == 0:
            rows.append(row | {"note": "no deaths under this treatment"})
            continue
        data = pd.concat([mine, controls[controls["plate"].isin(set(mine["plate"]))]], ignore_index=True)
        model = PHReg(
            data["exit_min"].to_numpy(float),
            (data["treatment"].astype(str) == treatment).to_numpy(float)[:, None],
            status=data["died"].to_numpy(float),
            entry=data["entry_min"].to_numpy(float),
            strata=data["plate"].astype(str).to_numpy(),
        )
        estimate, se = _cox_clustered(model, data["well"].astype(str).to_numpy())
        rows.append(
            row
            | {
                "hazard_ratio": np.exp(estimate),
                "ci_low": np.exp(estimate - quantile * se),
                "ci_high": np.exp(estimate + quantile * se),
                "p_value": float(2.0 * stats.norm.sf(abs(estimate / se))),
            }
        )
    for treatment, note in notes.items():
        mine = cells[cells["treatment"] == treatment]
        rows.append({"treatment": treatment, "n_cells": len(mine), "n_deaths": int(mine["died"].sum()), "note": note})
    return pd.DataFrame(rows, columns=HAZARD_COLUMNS)
