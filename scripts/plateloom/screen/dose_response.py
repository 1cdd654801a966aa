"""Dose-response: the four-parameter logistic (Hill equation) fitted to well values.

    response(d) = bottom + (top - bottom) / (1 + (EC50 / d) ** hill),    response(0) = bottom

Responses are well values relative to their plate's negative-control median: a ratio for
log-scale features, a difference in the feature's unit otherwise. Negative-control wells enter
at dose 0 and anchor the bottom. The fit is least squares in log10(EC50); the EC50 interval is
the t interval on log10(EC50) from the asymptotic covariance (delta method), with n - 4 degrees
of freedom, mapped back to dose units. A fit is called identifiable only if its parameters have
finite, moderate SEs, the EC50 interval is finite, a response is detected, and the curve passes a
lack-of-fit F test against the per-dose means. Wells are treated as independent given the plate
centring, which the report states.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import optimize, stats

HILL_BOUNDS = (0.1, 10.0)


def hill_curve(dose: np.ndarray, bottom: float, top: float, log10_ec50: float, hill: float) -> np.ndarray:
    """The four-parameter logistic at ``dose`` (same unit as the EC50); dose 0 gives ``bottom``."""
    dose = np.asarray(dose, float)
    with np.errstate(divide="ignore", over="ignore"):
        ratio = np.where(dose > 0, 10.0 ** ((log10_ec50 - np.log10(np.where(dose > 0, dose, 1.0))) * hill), np.inf)
    return bottom + (top - bottom) / (1.0 + ratio)


def _least_squares_4pl(dose: np.ndarray, response: np.ndarray, tested: np.ndarray):
    """The best of least-squares 4PL fits started at every tested dose (EC50 within 2 log10 units
    of the tested range, Hill slope within ``HILL_BOUNDS``)."""
    low, high = np.log10(tested[0]), np.log10(tested[-1])
    bounds = ([-np.inf, -np.inf, low - 2.0, HILL_BOUNDS[0]], [np.inf, np.inf, high + 2.0, HILL_BOUNDS[1]])
    lowest = dose == 0 if np.any(dose == 0) else dose == tested[0]
    bottom0, top0 = float(np.median(response[lowest])), float(np.median(response[dose == tested[-1]]))

    def residuals(p: np.ndarray) -> np.ndarray:
        return hill_curve(dose, *p) - response

    fits = [
        optimize.least_squares(
            residuals, [bottom0, top0, start, 1.0], bounds=bounds, x_scale="jac", ftol=1e-12, xtol=1e-12, gtol=1e-12
        )
        for start in np.log10(tested)
    ]
    return min(fits, key=lambda f: f.cost)


def _standard_errors(jacobian: np.ndarray, rss: float, dof: int) -> np.ndarray:
    """Asymptotic SEs from (J'J)^-1 x residual variance; NaN when J'J is singular."""
    with np.errstate(all="ignore"):
        try:
            return np.sqrt(np.diag(np.linalg.inv(jacobian.T @ jacobian) * rss / dof))
        except np.linalg.LinAlgError:
            return np.full(jacobian.shape[1], np.nan)


LACK_OF_FIT_P = 0.01  # a 4PL whose lack-of-fit F test against the per-dose means has p below this is rejected
MAX_LOG10_EC50_SE = 1.0  # decades; beyond this the EC50 is not determined by the data


def lack_of_fit_p(dose: np.ndarray, response: np.ndarray, rss: float, n_parameters: int) -> float:
    """p-value of the lack-of-fit F test of a curve with residual sum of squares ``rss`` against
    the per-dose means (pure error from replicate wells; Draper & Smith, Applied Regression
    Analysis, ch. 2); NaN without replicates or with no spare dose levels."""
    groups = pd.Series(response).groupby(dose)
    pure_error = float(((pd.Series(response) - groups.transform("mean")) ** 2).sum())
    df_pure, df_lack = len(response) - groups.ngroups, groups.ngroups - n_parameters
    if df_pure <= 0 or df_lack <= 0 or pure_error <= 0:
        return float("nan")
    f_stat = ((rss - pure_error) / df_lack) / (pure_error / df_pure)
    return float(stats.f.sf(f_stat, df_lack, df_pure))


def _fit_flags(
    errors: np.ndarray, p_values: tuple[float, float], estimates: tuple[float, float], tested: np.ndarray
) -> list[str]:
    """Why a fit is not identifiable: singular or undetermined parameters, no response, lack of fit,
    EC50 outside the doses, slope at a bound. ``p_values``: (response, lack of fit);
    ``estimates``: (log10 EC50, Hill slope)."""
    (p_response, p_lack), (log10_ec50, hill) = p_values, estimates
    flags = []
    if not np.all(np.isfinite(errors)) or np.any(errors <= 0):
        flags.append("singular fit: parameters not identifiable from these doses")
    elif errors[2] > MAX_LOG10_EC50_SE or errors[3] > hill:
        flags.append(
            f"EC50 or Hill slope not determined (SE of log10 EC50 {errors[2]:.2g} decades, of Hill {errors[3]:.2g})"
        )
    if p_response >= 0.05:
        flags.append(f"no dose-response detected (F test against a flat line, p = {p_response:.2g})")
    if p_lack < LACK_OF_FIT_P:
        flags.append(f"lack of fit: the per-dose means depart from the 4PL (F test, p = {p_lack:.2g})")
    if not np.log10(tested[0]) <= log10_ec50 <= np.log10(tested[-1]):
        flags.append("EC50 outside the tested dose range")
    if np.isclose(hill, HILL_BOUNDS[0]) or np.isclose(hill, HILL_BOUNDS[1]):
        flags.append(f"Hill slope at its bound {HILL_BOUNDS}")
    return flags


def fit_hill(dose: np.ndarray, response: np.ndarray, ci_level: float = 0.95) -> dict:
    """Least-squares 4PL fit; returns estimates, standard errors, the EC50 interval and identifiability flags."""
    dose, response = np.asarray(dose, float), np.asarray(response, float)
    ok = np.isfinite(dose) & np.isfinite(response) & (dose >= 0)
    dose, response = dose[ok], response[ok]
    tested = np.unique(dose[dose > 0])
    result = {"n_wells": int(len(dose)), "n_doses": int(len(tested))}
    if len(tested) < 4 or len(dose) < 6:
        return {**result, "identifiable": False, "flag": "fewer than 4 doses or 6 wells: not fitted"}
    best = _least_squares_4pl(dose, response, tested)
    k = 4
    rss, dof = 2.0 * best.cost, len(dose) - k
    errors = _standard_errors(best.jac, rss, dof)
    rss_flat = float(np.sum((response - response.mean()) ** 2))
    f_stat = ((rss_flat - rss) / (k - 1)) / (rss / dof) if rss > 0 else np.inf
    p_response = float(stats.f.sf(f_stat, k - 1, dof))
    bottom, top, log10_ec50, hill = best.x
    p_lack = lack_of_fit_p(dose, response, rss, k)
    flags = _fit_flags(errors, (p_response, p_lack), (log10_ec50, hill), tested)
    t = stats.t.ppf(0.5 + ci_level / 2, dof)
    with np.errstate(over="ignore"):
        ci_low, ci_high = 10.0 ** (log10_ec50 - t * errors[2]), 10.0 ** (log10_ec50 + t * errors[2])
    if not (0 < ci_low < ci_high < np.inf):
        flags.append("EC50 interval not finite")
    estimates = {"bottom": bottom, "bottom_se": errors[0], "top": top, "top_se": errors[1], "ec50": 10.0**log10_ec50}
    ec50 = {"log10_ec50": log10_ec50, "log10_ec50_se": errors[2], "ec50_ci_low": ci_low, "ec50_ci_high": ci_high}
    fit = {"hill": hill, "hill_se": errors[3], "df": float(dof), "residual_sd": float(np.sqrt(rss / dof))}
    verdict = {"p_response": p_response, "p_lack_of_fit": p_lack, "identifiable": not flags, "flag": "; ".join(flags)}
    return result | estimates | ec50 | fit | verdict


def plate_relative_responses(model_wells: pd.DataFrame, feature: str, scale: str) -> pd.Series:
    """Well values relative to the plate's negative-control median: ratio (log scale) or difference."""
    controls = model_wells[model_wells["role"] == "negative_control"].groupby("plate")[feature].median()
    centred = model_wells[feature] - model_wells["plate"].map(controls)
    return np.exp(centred) if scale == "log" else centred


FIT_COLUMNS = [
    "feature",
    "condition",
    "dose_unit",
    "response_scale",
    "n_wells",
    "n_doses",
    "bottom",
    "bottom_se",
    "top",
    "top_se",
    "ec50",
    "log10_ec50",
    "log10_ec50_se",
    "ec50_ci_low",
    "ec50_ci_high",
    "hill",
    "hill_se",
    "df",
    "residual_sd",
    "p_response",
    "p_lack_of_fit",
    "identifiable",
    "flag",
]


def dose_response_table(
    model_wells: pd.DataFrame, features: list[str], scales: dict[str, str], min_doses: int, ci_level: float
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """4PL fits for every compound with >= ``min_doses`` doses (one unit) and every feature.

    Returns the fits (one row per compound and feature) and the points used (for plots).
    """
    treated = model_wells[model_wells["role"] == "test"]
    doses = treated.groupby("condition")["dose"].nunique()
    units = treated.groupby("condition")["dose_unit"].nunique()
    compounds = sorted(c for c in doses.index if doses[c] >= min_doses and units[c] == 1)
    fits, points = [], []
    for feature in features:
        response = plate_relative_responses(model_wells, feature, scales[feature])
        frame = model_wells[["plate", "well", "role", "condition", "dose", "dose_unit"]].assign(response=response)
        controls = frame[frame["role"] == "negative_control"].assign(dose=0.0)
        for compound in compounds:
            series = frame[(frame["condition"] == compound) & (frame["role"] == "test")]
            data = pd.concat([controls, series], ignore_index=True)
            fit = fit_hill(data["dose"].to_numpy(), data["response"].to_numpy(), ci_level)
            fits.append(
                {
                    "feature": feature,
                    "condition": compound,
                    "dose_unit": series["dose_unit"].iloc[0],
                    "response_scale": "ratio to plate control"
                    if scales[feature] == "log"
                    else "difference from plate control",
                    **fit,
                }
            )
            points.append(series.assign(feature=feature))
        points.append(controls.assign(feature=feature))
    table = pd.DataFrame(fits).reindex(columns=FIT_COLUMNS)
    point_table = pd.concat(points, ignore_index=True) if points else pd.DataFrame()
    return table, point_table
