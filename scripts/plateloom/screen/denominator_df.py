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

RELATIVE_STEP = 1e-3  # of each variance parameter; smaller steps drown in rounding (checked against lmerTest)
THETA_FLOOR = 1e-2  # a theta (a ratio of SDs) below this is stepped as if it were this
EIGEN_TOLERANCE = 1e-8  # eigenvalues of the deviance Hessian below this (relative) are treated as zero


def _steps(parameters: np.ndarray) -> np.ndarray:
    floors = np.full(len(parameters), THETA_FLOOR)
    floors[-1] = 0.0  # sigma > 0 at any optimum
    return RELATIVE_STEP * np.maximum(np.abs(parameters), floors)


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


def _blocks(design: np.ndarray, batch: np.ndarray, plate: np.ndarray | None, weights: np.ndarray):
    """Per batch: its rows of X and dV/d(variance) for batch, [plate,] residual (dense, batch-sized)."""
    batch_index = np.unique(np.asarray(batch), return_inverse=True)[1]
    for k in range(batch_index.max() + 1):
        rows = np.flatnonzero(batch_index == k)
        derivatives = [np.ones((len(rows), len(rows)))]
        if plate is not None:
            plates = np.asarray(plate)[rows]
            derivatives.append((plates[:, None] == plates[None, :]).astype(float))
        derivatives.append(np.diag(1.0 / weights[rows]))
        yield design[rows], derivatives


def kenward_roger(
    design: np.ndarray,
    batch: np.ndarray,
    plate: np.ndarray | None,
    variances: np.ndarray,
    weights: np.ndarray | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Kenward-Roger adjusted covariance of the fixed effects and df of each coefficient.

    ``variances``: (batch, [plate,] residual) variance components at the REML optimum; V is linear
    in them, so the second-derivative term vanishes (Kenward & Roger 1997, Biometrics 53:983; the
    computations of pbkrtest, Halekoh & Hojsgaard 2014, J Stat Softw 59(9)). V is block diagonal
    by batch, so every trace is a sum over batches of batch-sized matrices.
    """
    design = np.asarray(design, float)
    weights = np.ones(len(design)) if weights is None else np.asarray(weights, float)
    k, q = len(variances), design.shape[1]
    information = np.zeros((q, q))
    p_terms = np.zeros((k, q, q))  # X' V^-1 G_r V^-1 X
    q_terms = np.zeros((k, k, q, q))  # X' V^-1 G_r V^-1 G_s V^-1 X
    trace_terms = np.zeros((k, k))  # tr(V^-1 G_r V^-1 G_s)
    for x, derivatives in _blocks(design, batch, plate, weights):
        inverse = np.linalg.inv(sum(v * g for v, g in zip(variances, derivatives)))
        scaled = [inverse @ g @ inverse for g in derivatives]  # V^-1 G_r V^-1
        information += x.T @ inverse @ x
        for r in range(k):
            p_terms[r] += x.T @ scaled[r] @ x
            for s in range(k):
                q_terms[r, s] += x.T @ scaled[r] @ derivatives[s] @ inverse @ x
                trace_terms[r, s] += np.sum((inverse @ derivatives[r]) * (inverse @ derivatives[s]).T)
    phi = np.linalg.inv(information)
    expected = np.array(
        [
            [
                0.5
                * (
                    trace_terms[r, s]
                    - 2.0 * np.trace(phi @ q_terms[r, s])
                    + np.trace(phi @ p_terms[r] @ phi @ p_terms[s])
                )
                for s in range(k)
            ]
            for r in range(k)
        ]
    )
    w = np.linalg.pinv(expected)
    correction = sum(w[r, s] * (q_terms[r, s] - p_terms[r] @ phi @ p_terms[s]) for r in range(k) for s in range(k))
    adjusted = phi + 2.0 * phi @ correction @ phi
    df = np.array([_kenward_roger_df(np.eye(q)[[j]], phi, p_terms, w) for j in range(q)])
    return adjusted, df


def _kenward_roger_df(contrast: np.ndarray, phi: np.ndarray, p_terms: np.ndarray, w: np.ndarray) -> float:
    """Denominator df m of the Kenward-Roger F approximation for the rows of ``contrast`` (l x q)."""
    rank = contrast.shape[0]
    theta = contrast.T @ np.linalg.inv(contrast @ phi @ contrast.T) @ contrast
    terms = [theta @ phi @ p @ phi for p in p_terms]
    k = len(terms)
    a1 = sum(w[r, s] * np.trace(terms[r]) * np.trace(terms[s]) for r in range(k) for s in range(k))
    a2 = sum(w[r, s] * np.trace(terms[r] @ terms[s]) for r in range(k) for s in range(k))
    b = (a1 + 6.0 * a2) / (2.0 * rank)
    g = ((rank + 1.0) * a1 - (rank + 4.0) * a2) / ((rank + 2.0) * a2)
    denominator = 3.0 * rank + 2.0 * (1.0 - g)
    c1, c2, c3 = g / denominator, (rank - g) / denominator, (rank + 2.0 - g) / denominator
    v_star = (2.0 / rank) * (1.0 + c1 * b) / ((1.0 - c2 * b) ** 2 * (1.0 - c3 * b))
    e_star = 1.0 / (1.0 - a2 / rank)
    rho = v_star / (2.0 * e_star**2)
    return float(4.0 + (rank + 2.0) / (rank * rho - 1.0))
