"""The nested random-intercept fit of one feature: y ~ treatment + (1 | batch) + (1 | plate in batch).

Two fitters (config screen.fitter): the exact REML of ``plateloom.screen.reml`` (default), or
statsmodels' MixedLM as a cross-check. Whichever finds the variance components, the standard
errors are sqrt(diag(s2 (X'H^-1X)^-1)) at those components and each coefficient gets its
Satterthwaite degrees of freedom (``plateloom.screen.denominator_df``); a statsmodels fit that
stops short of the exact REML optimum says so in its note. A fit that fails falls back to OLS
with a fixed effect per plate.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
import statsmodels.formula.api as smf
from statsmodels.tools.sm_exceptions import ConvergenceWarning

from plateloom.screen.denominator_df import kenward_roger, satterthwaite_df
from plateloom.screen.reml import ExactNestedFit, fit_nested_exact, fixed_covariance, restricted_deviance


@dataclass(frozen=True)
class NestedFit:
    """Result of one nested random-intercept fit (natural units of the response)."""

    params: pd.Series  # fixed effects, named by the design columns
    std_errors: pd.Series
    batch_variance: float
    plate_variance: float
    residual_variance: float
    method: str
    boundary: bool  # a variance component was estimated at zero (singular fit)
    df: pd.Series | None = None  # Satterthwaite degrees of freedom per fixed effect
    note: str = ""  # e.g. an optimiser that stopped short of the REML optimum


# Warnings that only say a variance component sits at zero; the fixed effects are still valid.
BOUNDARY_MESSAGES = ("boundary", "Hessian", "singular")


BOUNDARY_SHARE = 1e-4  # a component below this share of the variance counts as estimated at zero


def fit_nested_random_intercepts(
    data: pd.DataFrame, formula: str, batch: str, plate: str | None, reml: bool = True
) -> NestedFit:
    """REML (or, with ``reml=False``, maximum-likelihood) fit of ``formula`` with a random intercept
    per ``batch`` and, if given, per ``plate`` within batch.

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
        return NestedFit(
            result.fe_params,
            result.bse_fe,
            batch_variance,
            float(vcomp[0]) if plate else 0.0,
            float(result.scale),
            method,
            boundary,
        )
    raise RuntimeError("mixed model did not converge: " + " | ".join(problems))


def fixed_plate_fit(data: pd.DataFrame) -> tuple[pd.Series, pd.Series, float, float]:
    """Fallback: ordinary least squares with a fixed effect per plate (absorbs batch too); params,
    SEs, residual variance and residual df."""
    result = smf.ols("y ~ C(code) + C(plate_code)", data).fit()
    return result.params, result.bse, float(result.scale), float(result.df_resid)


FITTERS = ("exact", "statsmodels")


def treatment_design(codes: pd.Series) -> tuple[np.ndarray, list[str]]:
    """Intercept plus one indicator per non-reference treatment present, named as statsmodels names them."""
    index, levels = pd.factorize(codes, sort=True)
    levels = np.asarray(levels, dtype=str)
    indicators = np.zeros((len(codes), len(levels)))
    indicators[np.arange(len(codes)), index] = 1.0
    keep = levels != "t0000"
    matrix = np.column_stack([np.ones(len(codes)), indicators[:, keep]])
    return matrix, ["Intercept"] + [f"C(code)[T.{code}]" for code in levels[keep]]


OPTIMUM_GAP = 1e-3  # deviance units; a statsmodels fit further than this from the exact optimum is noted


DF_METHODS = ("satterthwaite", "kenward_roger")


def fit_nested(
    data: pd.DataFrame,
    mapping: dict[str, str],
    fitter: str,
    weights: np.ndarray | None = None,
    df_method: str = "satterthwaite",
) -> NestedFit:
    """The nested fit of y on treatment codes; one batch only: a random intercept per plate.

    ``weights``: known precision weights per row (residual variance s2 / w), exact fitter only.
    ``df_method``: Satterthwaite df, or Kenward-Roger (adjusted SEs and df).
    """
    n_batches, n_plates = data["batch"].nunique(), data["plate"].nunique()
    groups, nested = (
        ("batch_code", "plate_code" if n_plates > n_batches else None) if n_batches >= 2 else ("plate_code", None)
    )
    design, names = treatment_design(data["code"])
    exact = fit_nested_exact(
        data["y"].to_numpy(),
        design,
        data[groups].to_numpy(int),
        data[nested].to_numpy(int) if nested else None,
        weights=weights,
    )
    if fitter == "statsmodels" and weights is None:
        fit = _cross_checked(fit_nested_random_intercepts(data, "y ~ C(code)", groups, nested), exact, names)
    else:
        if not exact.converged:
            raise RuntimeError("exact REML optimisation did not converge")
        total = exact.batch_variance + exact.plate_variance + exact.residual_variance
        boundary = min(exact.batch_variance, exact.plate_variance if nested else np.inf) < BOUNDARY_SHARE * total
        fit = NestedFit(
            pd.Series(exact.params, index=names),
            pd.Series(exact.std_errors, index=names),
            exact.batch_variance,
            exact.plate_variance if nested else 0.0,
            exact.residual_variance,
            "exact",
            boundary,
            pd.Series(satterthwaite_df(exact.sums, exact.variance_parameters, np.eye(len(names))), index=names),
        )
    if df_method == "kenward_roger":
        fit = _kenward_roger_adjusted(
            fit, design, data[groups].to_numpy(int), data[nested].to_numpy(int) if nested else None, weights
        )
    if n_batches < 2:
        fit = replace(fit, batch_variance=0.0, plate_variance=fit.batch_variance)
    return fit


def _kenward_roger_adjusted(
    fit: NestedFit, design: np.ndarray, groups: np.ndarray, nested: np.ndarray | None, weights: np.ndarray | None
) -> NestedFit:
    """The fit with Kenward-Roger adjusted standard errors and df (same variance components)."""
    variances = [fit.batch_variance, *([fit.plate_variance] if nested is not None else []), fit.residual_variance]
    adjusted, df = kenward_roger(design, groups, nested, np.array(variances), weights)
    names = fit.params.index
    return replace(fit, std_errors=pd.Series(np.sqrt(np.diag(adjusted)), index=names), df=pd.Series(df, index=names))


def _cross_checked(fit: NestedFit, exact: ExactNestedFit, names: list[str]) -> NestedFit:
    """A statsmodels fit with SEs and df recomputed at its variance components, and a note when its
    REML deviance is above the exact optimum."""
    sigma = np.sqrt(fit.residual_variance)
    thetas = [np.sqrt(fit.batch_variance) / sigma]
    if exact.sums.with_plate:
        thetas.append(np.sqrt(fit.plate_variance) / sigma)
    parameters = np.array([*thetas, sigma])
    covariance = fixed_covariance(exact.sums, parameters)
    gap = restricted_deviance(exact.sums, parameters) - restricted_deviance(exact.sums, exact.variance_parameters)
    note = (
        f"statsmodels stopped {gap:.3g} deviance units short of the REML optimum (the exact fitter reaches it)"
        if gap > OPTIMUM_GAP
        else ""
    )
    params = fit.params.reindex(names)
    return replace(
        fit,
        params=params,
        std_errors=pd.Series(np.sqrt(np.diag(covariance)), index=names),
        df=pd.Series(satterthwaite_df(exact.sums, parameters, np.eye(len(names))), index=names),
        note=note,
    )
