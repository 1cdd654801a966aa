"""The nested random-intercept fit of one feature: y ~ treatment + (1 | batch) + (1 | plate in batch).

Two fitters (config screen.fitter): statsmodels' MixedLM, or the exact REML of
``plateloom.screen.reml``; a fit that fails falls back to OLS with a fixed effect per plate.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import statsmodels.formula.api as smf
from statsmodels.tools.sm_exceptions import ConvergenceWarning

from plateloom.screen.reml import fit_nested_exact


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


def fixed_plate_fit(data: pd.DataFrame) -> tuple[pd.Series, pd.Series, float]:
    """Fallback: ordinary least squares with a fixed effect per plate (absorbs batch too)."""
    result = smf.ols("y ~ C(code) + C(plate_code)", data).fit()
    return result.params, result.bse, float(result.scale)


FITTERS = ("statsmodels", "exact")


def _design(codes: pd.Series) -> tuple[np.ndarray, list[str]]:
    """Intercept plus one indicator per non-reference treatment present, named as statsmodels names them."""
    index, levels = pd.factorize(codes, sort=True)
    levels = np.asarray(levels, dtype=str)
    indicators = np.zeros((len(codes), len(levels)))
    indicators[np.arange(len(codes)), index] = 1.0
    keep = levels != "t0000"
    matrix = np.column_stack([np.ones(len(codes)), indicators[:, keep]])
    return matrix, ["Intercept"] + [f"C(code)[T.{code}]" for code in levels[keep]]


def fit_nested(data: pd.DataFrame, mapping: dict[str, str], fitter: str) -> NestedFit:
    """The nested fit of y on treatment codes; one batch only: a random intercept per plate."""
    n_batches, n_plates = data["batch"].nunique(), data["plate"].nunique()
    groups, nested = (
        ("batch_code", "plate_code" if n_plates > n_batches else None) if n_batches >= 2 else ("plate_code", None)
    )
    if fitter == "statsmodels":
        fit = fit_nested_random_intercepts(data, "y ~ C(code)", groups, nested)
    else:
        design, names = _design(data["code"])
        exact = fit_nested_exact(
            data["y"].to_numpy(), design, data[groups].to_numpy(int), data[nested].to_numpy(int) if nested else None
        )
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
        )
    if n_batches < 2:
        fit = NestedFit(
            fit.params, fit.std_errors, 0.0, fit.batch_variance, fit.residual_variance, fit.method, fit.boundary
        )
    return fit
