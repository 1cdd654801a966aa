"""Per-contrast denominator degrees of freedom for the nested random-intercept model (Satterthwaite).

For a contrast L beta with variance v(phi) = L C(phi) L', C the fixed-effect covariance at the
variance parameters phi = (theta_batch, [theta_plate,] sigma),

    df = 2 v^2 / (g' A g),    g = dv/dphi,    A = 2 H^-1,

with H the Hessian of the restricted deviance in phi (Satterthwaite 1946, Biometrics Bulletin
2:110; Giesbrecht & Burns 1985, Biometrics 41:477). These are the parameters and the recipe of
lmerTest (Kuznetsova, Brockhoff & Christensen 2017, J Stat Softw 82(13)): a component estimated at
zero has theta = 0, where C is flat in theta, so it adds no uncertainty; eigenvalues of H that are
not clearly positive are left out of its inverse (Moore-Penrose), as lmerTest does.

A treatment whose wells share plates with the negative controls gets the df of the within-plate
residual (hundreds in a screen); a treatment applied to whole plates gets df close to the number
of plates that carry it, which is what makes its interval honest.
"""

from __future__ import annotations

import numpy as np

from plateloom.screen.reml import GroupSums, fixed_covariance, restricted_deviance

RELATIVE_STEP = 1e-4  # of each variance parameter (absolute for a parameter at zero)
EIGEN_TOLERANCE = 1e-8  # eigenvalues of the deviance Hessian below this (relative) are treated as zero


def _steps(parameters: np.ndarray) -> np.ndarray:
    return RELATIVE_STEP * np.maximum(np.abs(parameters), 1e-2 * np.abs(parameters[-1]))


def deviance_hessian(sums: GroupSums, parameters: np.ndarray) -> np.ndarray:
    """Hessian of the restricted deviance in (theta_batch, [theta_plate,] sigma), by central differences."""
    k = len(parameters)
    steps = _steps(parameters)
    shifts = np.diag(steps)
    centre = restricted_deviance(sums, parameters)
    hessian = np.empty((k, k))
    for i in range(k):
        plus = restricted_deviance(sums, parameters + shifts[i])
        minus = restricted_deviance(sums, parameters - shifts[i])
        hessian[i, i] = (plus - 2.0 * centre + minus) / steps[i] ** 2
        for j in range(i):
            corners = [
                restricted_deviance(sums, parameters + a * shifts[i] + b * shifts[j])
                for a, b in ((1, 1), (1, -1), (-1, 1), (-1, -1))
            ]
            hessian[i, j] = hessian[j, i] = (corners[0] - corners[1] - corners[2] + corners[3]) / (
                4.0 * steps[i] * steps[j]
            )
    return hessian


def variance_parameter_covariance(sums: GroupSums, parameters: np.ndarray) -> np.ndarray:
    """Asymptotic covariance of the variance parameters: 2 x the pseudo-inverse of the deviance Hessian."""
    values, vectors = np.linalg.eigh(deviance_hessian(sums, parameters))
    keep = values > EIGEN_TOLERANCE * max(float(np.max(np.abs(values))), 1e-300)
    return 2.0 * (vectors[:, keep] / values[keep]) @ vectors[:, keep].T


def covariance_jacobian(sums: GroupSums, parameters: np.ndarray) -> np.ndarray:
    """d C / d phi_i for every variance parameter (k x q x q), by central differences."""
    steps = _steps(parameters)
    shifts = np.diag(steps)
    return np.stack(
        [
            (fixed_covariance(sums, parameters + shifts[i]) - fixed_covariance(sums, parameters - shifts[i]))
            / (2.0 * steps[i])
            for i in range(len(parameters))
        ]
    )


def satterthwaite_df(sums: GroupSums, parameters: np.ndarray, contrasts: np.ndarray) -> np.ndarray:
    """Satterthwaite df of each contrast (rows of ``contrasts``, m x q) at the REML variance parameters.

    A contrast whose variance does not depend on the variance parameters (the formula divides by
    zero) gets the residual df of the fixed-effects fit, n - q.
    """
    contrasts = np.atleast_2d(np.asarray(contrasts, float))
    covariance = fixed_covariance(sums, parameters)
    variance = np.einsum("mq,qr,mr->m", contrasts, covariance, contrasts)
    gradient = np.einsum("mq,kqr,mr->mk", contrasts, covariance_jacobian(sums, parameters), contrasts)
    spread = np.einsum("mk,kl,ml->m", gradient, variance_parameter_covariance(sums, parameters), gradient)
    with np.errstate(divide="ignore", invalid="ignore"):
        df = 2.0 * variance**2 / spread
    residual_df = float(sums.n_rows - sums.n_fixed)
    return np.where(np.isfinite(df) & (df > 0), df, residual_df)
