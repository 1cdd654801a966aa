"""The screen's fate tables: division and death rate ratios, death hazard ratios, survival curves,
and growth-rate inhibition (GR) per treatment and compound, from the kept wells and their tracks."""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from plateloom.columns import REFERENCE_ROLE
from plateloom.screen.fate_models import hazard_ratios, rate_ratios, survival_band
from plateloom.screen.growth_inhibition import fit_gr_curve, growth_mode
from plateloom.screen.model_wells import in_model
from plateloom.stats import bh_qvalues

FATE_EFFECT_COLUMNS = [
    "measure",
    "treatment",
    "condition",
    "dose",
    "n_wells",
    "n_events",
    "ratio",
    "ci_low",
    "ci_high",
    "p_value",
    "q_value",
    "note",
]


def kept_wells(wells: pd.DataFrame) -> pd.DataFrame:
    """The wells the screen model uses (``model_wells.in_model``)."""
    return wells[in_model(wells)]


def _with_design(table: pd.DataFrame, wells: pd.DataFrame) -> pd.DataFrame:
    """``table`` (a treatment column) with each treatment's condition and dose from ``wells``."""
    first = wells.drop_duplicates("treatment")
    design = first.set_index(first["treatment"].astype(str))
    return table.assign(
        condition=table["treatment"].map(design["condition"]), dose=table["treatment"].map(design["dose"])
    )


def track_lives(tracks: pd.DataFrame, wells: pd.DataFrame) -> pd.DataFrame:
    """One row per track of a kept well: plate, well, role, treatment, entry_min (its first frame),
    exit_min (its last), died (it ended in a death; otherwise censored there)."""
    design = wells[["plate", "well", "role", "treatment"]].astype({"plate": str, "well": str})
    lives = tracks.assign(plate=tracks["plate"].astype(str), well=tracks["well"].astype(str)).merge(
        design, on=["plate", "well"], how="inner"
    )
    return pd.DataFrame(
        {
            "plate": lives["plate"],
            "well": lives["plate"] + "/" + lives["well"],
            "role": lives["role"],
            "treatment": lives["treatment"].astype(str),
            "entry_min": lives["start_min"].to_numpy(float),
            "exit_min": lives["end_min"].to_numpy(float),
            "died": (lives["end_event"] == "death").to_numpy(bool),
        }
    )


def fate_effects(wells: pd.DataFrame, lives: pd.DataFrame, level: float) -> pd.DataFrame:
    """Rows per (measure, test or positive-control treatment): division_rate and death_rate (rate
    ratios), death_hazard (Cox hazard ratio); BH q-values within each measure."""
    parts = []
    for measure, events in (("division_rate", "n_divisions"), ("death_rate", "n_deaths")):
        table = rate_ratios(wells, events, "cell_hours", level)
        parts.append(table.rename(columns={"rate_ratio": "ratio"}).assign(measure=measure))
    hazards = hazard_ratios(lives, level).rename(columns={"hazard_ratio": "ratio", "n_deaths": "n_events"})
    wells_per_treatment = wells.groupby(wells["treatment"].astype(str)).size()
    parts.append(hazards.assign(measure="death_hazard", n_wells=hazards["treatment"].map(wells_per_treatment)))
    table = pd.concat(parts, ignore_index=True)
    table["q_value"] = table.groupby("measure")["p_value"].transform(lambda p: bh_qvalues(p.to_numpy(float)))
    return _with_design(table, wells)[FATE_EFFECT_COLUMNS]


def survival_curves(lives: pd.DataFrame, times: np.ndarray, level: float, n_boot: int = 200) -> pd.DataFrame:
    """Kaplan-Meier S(t) at ``times`` per treatment (the negative controls pooled under their
    treatment names), with well-bootstrap intervals; seeded by the treatment's position."""
    parts = []
    for number, (treatment, cells) in enumerate(lives.groupby("treatment", sort=True)):
        band = survival_band(cells, times, n_boot, level, seed=number)
        parts.append(band.assign(treatment=treatment, role=cells["role"].iloc[0]))
    columns = ["treatment", "role", "time_min", "survival", "ci_low", "ci_high"]
    return pd.concat(parts, ignore_index=True)[columns] if parts else pd.DataFrame(columns=columns)


GR_COLUMNS = [
    "treatment",
    "condition",
    "dose",
    "n_wells",
    "growth_rate_per_h",
    "control_growth_rate_per_h",
    "gr",
    "gr_ci_low",
    "gr_ci_high",
    "growth_ratio",
    "growth_ratio_se",
    "mode",
    "note",
]


def _growth_fit(data: pd.DataFrame, treatment: str) -> tuple[np.ndarray, np.ndarray, float]:
    """One treatment's wells and the negative controls on its plates: growth rates on plate
    intercepts (the controls' level per plate) and the treatment's difference, weighted least
    squares with one variance for the controls and one for the treatment (a toxic treatment's
    wells scatter far more than the controls'), Welch-Satterthwaite df (Welch 1947). Returns
    coefficients (plates, then the difference), their covariance and the df."""
    treated = (data["treatment"].astype(str) == treatment).to_numpy()
    x = np.column_stack([pd.get_dummies(data["plate"].astype(str), dtype=float).to_numpy(), treated.astype(float)])
    y = data["growth_rate_per_h"].to_numpy(float)
    residual = y - x @ np.linalg.lstsq(x, y, rcond=None)[0]
    n_t, n_c, n_plates = int(treated.sum()), int((~treated).sum()), x.shape[1] - 1
    var_t = max(float(np.sum(residual[treated] ** 2)) / (n_t - 1), 1e-12)
    var_c = max(float(np.sum(residual[~treated] ** 2)) / (n_c - n_plates), 1e-12)
    weight = np.where(treated, 1.0 / var_t, 1.0 / var_c)
    cov = np.linalg.pinv(x.T @ (x * weight[:, None]))
    beta = cov @ (x.T @ (weight * y))
    a, b = var_t / n_t, var_c / n_c
    return beta, cov, (a + b) ** 2 / (a**2 / (n_t - 1) + b**2 / (n_c - n_plates))


def _gr_interval(beta: np.ndarray, cov: np.ndarray, n_plates: int, column: int, quantile: float) -> dict:
    """GR = 2 ** (k / k0) - 1 with k0 the mean of the plates' control levels and k = k0 + the
    treatment's difference (coefficient ``column``); the interval of k / k0 by the delta method (both estimated, their
    covariance kept), mapped through the monotone 2 ** r - 1."""
    c0 = np.zeros(len(beta))
    c0[:n_plates] = 1.0 / n_plates
    ct = c0.copy()
    ct[column] = 1.0
    k0, k = float(c0 @ beta), float(ct @ beta)
    ratio = k / k0
    variance = ct @ cov @ ct - 2 * ratio * (ct @ cov @ c0) + ratio**2 * (c0 @ cov @ c0)
    se = float(np.sqrt(max(variance, 0.0)) / abs(k0))
    return {
        "control_growth_rate_per_h": k0,
        "growth_ratio": ratio,
        "growth_ratio_se": se,
        "gr": 2.0**ratio - 1.0,
        "gr_ci_low": 2.0 ** (ratio - quantile * se) - 1.0,
        "gr_ci_high": 2.0 ** (ratio + quantile * se) - 1.0,
    }


def gr_values_per_treatment(wells: pd.DataFrame, level: float) -> pd.DataFrame:
    """GR per test or positive-control treatment (Hafner et al. 2016) against the negative controls
    on its plates: growth rates fitted with plate intercepts and the treatment's difference
    (``_growth_fit``), GR and its interval by ``_gr_interval`` (t quantile on the Welch df), the
    mode (``growth_mode``) from the GR interval. No GR where those controls did not grow (k0 <= 0:
    GR compares growth, and there is none to compare) or with fewer than 2 wells of the treatment."""
    usable = wells[np.isfinite(wells["growth_rate_per_h"])]
    controls = usable[usable["role"] == REFERENCE_ROLE]
    treatments = usable["treatment"].astype(str)
    rows = []
    for treatment in sorted(treatments[usable["role"] != REFERENCE_ROLE].unique()):
        mine = usable[(treatments == treatment) & usable["plate"].isin(set(controls["plate"]))]
        row = {"treatment": treatment, "n_wells": len(mine), "note": ""}
        row["growth_rate_per_h"] = float(mine["growth_rate_per_h"].mean()) if len(mine) else np.nan
        mine_controls = controls[controls["plate"].isin(set(mine["plate"]))]
        if len(mine) < 2 or len(mine_controls) <= mine_controls["plate"].nunique():
            rows.append(row | {"note": "too few wells, or no negative controls on its plates"})
            continue
        beta, cov, df = _growth_fit(pd.concat([mine_controls, mine]), treatment)
        n_plates = len(beta) - 1
        k0 = float(beta[:n_plates].mean())
        if not k0 > 0:
            row.update(control_growth_rate_per_h=k0, note="the negative controls did not grow: GR is not defined")
        else:
            row.update(_gr_interval(beta, cov, n_plates, n_plates, stats.t.ppf(0.5 + level / 2.0, df)))
            row["mode"] = growth_mode(row["gr_ci_low"], row["gr_ci_high"])
        rows.append(row)
    return _with_design(pd.DataFrame(rows, columns=GR_COLUMNS), wells)


GR_FIT_COLUMNS = [
    "condition",
    "n_doses",
    "gr_inf",
    "gr_inf_ci_low",
    "gr_inf_ci_high",
    "gec50",
    "hill",
    "hill_ci_low",
    "hill_ci_high",
    "gr50",
    "gr50_ci_low",
    "gr50_ci_high",
    "gr_max",
    "gr_max_ci_low",
    "gr_max_ci_high",
    "gr_aoc",
    "gr_aoc_ci_low",
    "gr_aoc_ci_high",
    "mode",
    "fitted",
]
WITH_INTERVALS = ("gr_inf", "hill", "gr50", "gr_max", "gr_aoc")


def _fit_values(doses: np.ndarray, gr: np.ndarray) -> dict[str, float]:
    fit = fit_gr_curve(doses, gr)
    return {"gr_inf": fit.gr_inf, "gec50": fit.gec50, "hill": fit.hill, "gr50": fit.gr50, "gr_max": fit.gr_max} | {
        "gr_aoc": fit.gr_aoc,
        "fitted": fit.fitted,
    }


def _bootstrap_intervals(doses: pd.DataFrame, level: float, n_boot: int, rng: np.random.Generator) -> dict[str, float]:
    """Percentile intervals of the GR metrics: each dose's k/k0 drawn from a normal with its estimate
    and SE (parametric bootstrap; doses drawn independently, their shared controls ignored), GR
    values recomputed and the curve refitted. A GR50 that is not reached counts as infinite."""
    ratio, se = doses["growth_ratio"].to_numpy(float), doses["growth_ratio_se"].to_numpy(float)
    draws = {name: [] for name in WITH_INTERVALS}
    for _ in range(n_boot):
        values = _fit_values(doses["dose"].to_numpy(float), 2.0 ** rng.normal(ratio, se) - 1.0)
        for name in WITH_INTERVALS:
            draws[name].append(values[name])
    tail = (1.0 - level) / 2.0
    out = {}
    for name, values in draws.items():
        # order statistics, not interpolation: a draw whose GR50 is never reached is infinite
        low, high = np.quantile(np.asarray(values, float), [tail, 1.0 - tail], method="inverted_cdf")
        out[f"{name}_ci_low"], out[f"{name}_ci_high"] = float(low), float(high)
    return out


def gr_fits(per_treatment: pd.DataFrame, level: float = 0.95, n_boot: int = 200, seed: int = 0) -> pd.DataFrame:
    """Per compound with a GR value at 2 or more positive doses: the GR sigmoid (``fit_gr_curve``:
    GR_inf, GEC50, Hill slope, GR50, GRmax, GR_AOC) with parametric-bootstrap intervals (when the
    sigmoid can be fitted: 3 doses or more) and the mode at its highest dose."""
    rows = []
    scored = per_treatment[per_treatment["gr"].notna() & (per_treatment["dose"] > 0)]
    rng = np.random.default_rng(seed)
    for condition, doses in scored.groupby("condition", sort=True):
        if doses["dose"].nunique() < 2:
            continue
        row = {"condition": condition, "n_doses": int(doses["dose"].nunique())}
        row |= _fit_values(doses["dose"].to_numpy(float), doses["gr"].to_numpy(float))
        if row["n_doses"] >= 3:
            row |= _bootstrap_intervals(doses, level, n_boot, rng)
        row["mode"] = doses.sort_values("dose").iloc[-1]["mode"]
        rows.append(row)
    return pd.DataFrame(rows, columns=GR_FIT_COLUMNS)
