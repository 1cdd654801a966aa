"""Condition effects: a mixed-effects model per feature, random intercepts for batch and plate.

well value ~ treatment (reference: the negative control)
             + random intercept per batch (imaging day) + random intercept per plate within batch,
fitted by REML with statsmodels. Strictly positive features are modelled as natural logs, so an
effect reads as a ratio to the negative control.

Degrees of freedom for the t-interval follow the between-within rule: treatments vary within
plates, so their contrasts get the within-plate residual degrees of freedom
N_wells - N_plates - (N_treatments - 1).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import statsmodels.formula.api as smf
from scipy import stats
from statsmodels.tools.sm_exceptions import ConvergenceWarning

REFERENCE = "negative_control"


@dataclass(frozen=True)
class NestedFit:
    """Result of one nested random-intercept fit (natural units of the response)."""

    params: pd.Series           # fixed effects, named by the design columns
    std_errors: pd.Series
    batch_variance: float
    plate_variance: float
    residual_variance: float
    method: str
    boundary: bool              # a variance component was estimated at zero (singular fit)


# Warnings that only say a variance component sits at zero; the fixed effects are still valid.
BOUNDARY_MESSAGES = ("boundary", "Hessian", "singular")
BOUNDARY_SHARE = 1e-4  # a component below this share of the variance counts as estimated at zero


def fit_nested_random_intercepts(data: pd.DataFrame, formula: str, batch: str, plate: str | None,
                                 reml: bool = True) -> NestedFit:
    """REML (or, with ``reml=False``, maximum-likelihood) fit of ``formula`` with a random intercept per ``batch`` and, if given, per ``plate`` within batch.

    ``batch`` and ``plate`` are column names of ``data``. Tries L-BFGS, then Powell and
    Nelder-Mead. A variance component at zero (the boundary) is a valid REML estimate and
    is reported as such; any other convergence warning rejects the fit.
    """
    data = data.reset_index(drop=True)
    vc = {"plate": f"0 + C({plate})"} if plate else None
    model = smf.mixedlm(formula, data, groups=batch, re_formula="1", vc_formula=vc)
    problems: list[str] = []
    for method in ("lbfgs", "powell", "nm"):
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                result = model.fit(reml=reml, method=method)
            except (np.linalg.LinAlgError, ValueError) as error:
                problems.append(f"{method}: {error}")
                continue
        messages = [str(w.message) for w in caught if issubclass(w.category, (ConvergenceWarning, RuntimeWarning))]
        other = [m for m in messages if not any(key in m for key in BOUNDARY_MESSAGES)]
        if not result.converged or other or not np.all(np.isfinite(result.bse_fe)):
            problems.append(f"{method}: {'; '.join(other) or 'not converged'}")
            continue
        vcomp = np.atleast_1d(result.vcomp) if plate else np.array([np.inf])
        batch_variance = float(result.cov_re.iloc[0, 0])
        boundary = min(batch_variance, float(vcomp[0])) < BOUNDARY_SHARE * (batch_variance + float(result.scale))
        return NestedFit(result.fe_params, result.bse_fe, batch_variance, float(vcomp[0]) if plate else 0.0,
                         float(result.scale), method, boundary)
    raise RuntimeError("mixed model did not converge: " + " | ".join(problems))


class _ConstantFeature(Exception):
    """A feature with no spread across wells: nothing to fit."""


def _fixed_plate_fit(data: pd.DataFrame) -> tuple[pd.Series, pd.Series, float]:
    """Fallback: ordinary least squares with a fixed effect per plate (absorbs batch too)."""
    result = smf.ols("y ~ C(code) + C(plate_code)", data).fit()
    return result.params, result.bse, float(result.scale)


def _codes(treatments: pd.Series) -> tuple[pd.Series, dict[str, str]]:
    """Formula-safe codes for treatment names; the reference sorts first (t0000)."""
    names = sorted(set(treatments) - {REFERENCE})
    mapping = {REFERENCE: "t0000", **{name: f"t{i + 1:04d}" for i, name in enumerate(names)}}
    return treatments.map(mapping), mapping


def fit_feature_effects(wells: pd.DataFrame, feature: str, log_scale: bool, ci_level: float) -> pd.DataFrame:
    """Effects of every treatment on one feature against the pooled negative controls.

    ``wells`` holds kept wells with columns batch, plate, role, treatment, condition, dose,
    dose_unit and the feature. Returns one row per non-reference treatment.
    """
    data = wells[["batch", "plate", "role", "treatment", "condition", "dose", "dose_unit", feature]].copy()
    data["treatment"] = np.where(data["role"] == "negative_control", REFERENCE, data["treatment"])
    values = data[feature].to_numpy(float)
    note = ""
    if log_scale and np.any(values[np.isfinite(values)] <= 0):
        log_scale, note = False, "non-positive values: modelled on the linear scale"
    data["y"] = np.log(values) if log_scale else values
    data = data[np.isfinite(data["y"])]
    data["code"], mapping = _codes(data["treatment"])
    data["plate_code"] = pd.factorize(data["plate"], sort=True)[0].astype(str)
    data["batch_code"] = pd.factorize(data["batch"], sort=True)[0].astype(str)
    n_wells, n_plates, n_batches = len(data), data["plate"].nunique(), data["batch"].nunique()
    n_treatments = len(mapping)
    df = max(n_wells - n_plates - (n_treatments - 1), 1)
    formula = "y ~ C(code)"
    params: pd.Series
    try:
        if np.nanstd(data["y"]) == 0:
            raise _ConstantFeature("feature is constant across wells")
        if n_batches >= 2:
            fit = fit_nested_random_intercepts(data, formula, "batch_code", "plate_code" if n_plates > n_batches else None)
        else:
            fit = fit_nested_random_intercepts(data, formula, "plate_code", None)
            fit = NestedFit(fit.params, fit.std_errors, 0.0, fit.batch_variance, fit.residual_variance, fit.method, fit.boundary)
            note = "; ".join(filter(None, [note, "one batch only: random intercept per plate"]))
        params, errors, converged = fit.params, fit.std_errors, True
        components = (fit.batch_variance, fit.plate_variance, fit.residual_variance)
        method = f"REML mixed model ({fit.method})"
        if fit.boundary:
            note = "; ".join(filter(None, [note, "a variance component was estimated at zero (singular fit)"]))
    except _ConstantFeature as error:
        params, errors, converged, components, method = pd.Series(dtype=float), pd.Series(dtype=float), False, (np.nan,) * 3, "not fitted"
        note = "; ".join(filter(None, [note, str(error)]))
    except RuntimeError as error:
        params, errors, residual = _fixed_plate_fit(data)
        converged, components, method = False, (np.nan, np.nan, residual), "fallback: OLS with plate fixed effects"
        note = "; ".join(filter(None, [note, str(error)]))
    t_quantile = stats.t.ppf(0.5 + ci_level / 2, df)
    total = np.nansum(components)
    rows = []
    for name, code in mapping.items():
        if name == REFERENCE:
            continue
        term = f"C(code)[T.{code}]"
        subset = data[data["code"] == code]
        estimate = float(params.get(term, np.nan))
        error = float(errors.get(term, np.nan))
        t_value = estimate / error if error > 0 else np.nan
        first = subset.iloc[0]
        rows.append({
            "feature": feature, "treatment": name, "condition": first["condition"], "dose": first["dose"],
            "dose_unit": first["dose_unit"], "role": first["role"], "scale": "log" if log_scale else "linear",
            "estimate": estimate, "std_error": error, "df": float(df),
            "ci_low": estimate - t_quantile * error, "ci_high": estimate + t_quantile * error,
            "t_value": t_value, "p_value": float(2 * stats.t.sf(abs(t_value), df)) if np.isfinite(t_value) else np.nan,
            "n_wells": len(subset), "n_plates": subset["plate"].nunique(), "n_batches": subset["batch"].nunique(),
            "batch_variance": components[0], "plate_variance": components[1], "residual_variance": components[2],
            "icc_batch_plate": (components[0] + components[1]) / total if total > 0 else np.nan,
            "converged": converged, "method": method, "note": note,
        })
    table = pd.DataFrame(rows)
    if not table.empty:
        ratio = log_scale
        table["ratio"] = np.exp(table["estimate"]) if ratio else np.nan
        table["ratio_ci_low"] = np.exp(table["ci_low"]) if ratio else np.nan
        table["ratio_ci_high"] = np.exp(table["ci_high"]) if ratio else np.nan
    return table


def bh_qvalues(p_values: np.ndarray) -> np.ndarray:
    """Benjamini-Hochberg (1995) adjusted p-values (q-values); NaN p-values stay NaN and are not counted."""
    p = np.asarray(p_values, float)
    q = np.full(p.shape, np.nan)
    finite = np.isfinite(p)
    m = int(finite.sum())
    if m == 0:
        return q
    values = p[finite]
    order = np.argsort(values)
    scaled = values[order] * m / np.arange(1, m + 1)
    adjusted = np.minimum.accumulate(scaled[::-1])[::-1]
    result = np.empty(m)
    result[order] = np.minimum(adjusted, 1.0)
    q[finite] = result
    return q


def screen_effects(wells: pd.DataFrame, features: list[str], log_features: set[str], ci_level: float,
                   hit_q_value: float, hit_min_effect: float) -> pd.DataFrame:
    """Effects of every treatment on every feature, with BH q-values across all pairs and hit calls."""
    plate_kept = wells["plate_excluded_by"] == "" if "plate_excluded_by" in wells else True
    kept = wells[(wells["excluded_by"] == "") & plate_kept & wells["role"].isin(["negative_control", "positive_control", "test"])]
    missing = [f for f in features if f not in kept.columns]
    if missing:
        raise ValueError(f"features {missing} are not columns of the well profiles; check screen.features in config")
    parts = [fit_feature_effects(kept, feature, feature in log_features, ci_level) for feature in features]
    table = pd.concat([p for p in parts if not p.empty], ignore_index=True)
    table["q_value"] = bh_qvalues(table["p_value"].to_numpy())
    table["hit"] = (table["q_value"] < hit_q_value) & (table["estimate"].abs() >= hit_min_effect)
    return table
