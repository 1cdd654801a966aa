"""Exact (RE)ML for the nested random-intercept model, from group sums.

    y = X beta + u_batch + u_plate(batch) + e,   u_batch ~ N(0, s2_b), u_plate ~ N(0, s2_p), e ~ N(0, s2)

With H = V / s2, plates nested in batches make H block diagonal per batch, and its inverse has a
closed form (Woodbury, twice): for plate p with n_p rows, c_p = g_p / (1 + g_p n_p) and
a_p = 1 / (1 + g_p n_p); for batch k, s_k = sum_p a_p n_p and d_k = g_b / (1 + g_b s_k), where
g_b = s2_b / s2 and g_p = s2_p / s2. For any columns U, W:

    U' H^-1 W = U'W - sum_p c_p S_p(U)' S_p(W) - sum_k d_k T_k(U)' T_k(W)
    log |H|   = sum_p log(1 + g_p n_p) + sum_k log(1 + g_b s_k)

with S_p the plate column sums and T_k = sum_{p in k} a_p S_p. So once the plate sums of
[X y] are formed, each likelihood evaluation costs O(plates x columns^2), independent of the
number of wells. The variance ratios are optimised as g = theta^2 (unconstrained theta, so the
boundary g = 0 is reachable), the scale s2 is profiled out, as in Bates et al. (2015, J Stat
Softw 67(1)) for lme4. Fixed-effect standard errors are sqrt(diag(s2 (X' H^-1 X)^-1)).

Known precision weights w (residual variance s2 / w_i, as lme4's ``weights``) enter by scaling
each row by sqrt(w_i): the cross products become [X y]' W [X y], the plate sums weighted sums and
the plate sizes n_p the sums of weights; log |H| gains -sum log w_i.

Each contrast's degrees of freedom come from ``plateloom.screen.denominator_df`` (Satterthwaite),
which differentiates ``restricted_deviance`` and ``fixed_covariance`` in the variance parameters
(theta_batch, theta_plate, sigma) with theta = component SD / sigma, lme4's parameters.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
import pandas as pd
from scipy import optimize, sparse


@dataclass(frozen=True)
class ExactNestedFit:
    """Fixed effects, their standard errors and the variance components (squared units of y)."""

    params: np.ndarray
    std_errors: np.ndarray
    batch_variance: float
    plate_variance: float
    residual_variance: float
    objective: float  # -2 x (restricted) log-likelihood, constants dropped
    converged: bool
    sums: GroupSums  # what the derivatives for the degrees of freedom need
    variance_parameters: np.ndarray  # theta_batch, [theta_plate,] sigma at the optimum


@dataclass(frozen=True)
class GroupSums:
    """Sufficient statistics of the nested model: cross products and plate sums of [X y]."""

    cross: np.ndarray  # [X y]'[X y]
    plate_sums: np.ndarray  # plates x (q + 1)
    plate_sizes: np.ndarray  # plates
    plate_batch: np.ndarray  # batch index of each plate
    membership: np.ndarray  # batches x plates, 1 where the plate belongs to the batch
    n_batches: int
    n_rows: int
    n_fixed: int
    log_weights: float  # sum of log w_i (0 without weights)
    with_plate: bool


def group_sums(
    y: np.ndarray, design: np.ndarray, batch: np.ndarray, plate: np.ndarray | None, weights: np.ndarray | None = None
) -> GroupSums:
    """The sums of the nested model ``y ~ design + (1 | batch) + (1 | plate in batch)``, with
    precision ``weights`` (residual variance s2 / w) if given; ``plate=None``: batch intercept only."""
    with_plate = plate is not None
    y, design = np.asarray(y, float), np.asarray(design, float)
    weights = np.ones(len(y)) if weights is None else np.asarray(weights, float)
    batch = np.asarray(batch)
    plate = np.asarray(plate) if with_plate else batch
    batch_index = pd.factorize(batch, sort=True)[0]
    plate_codes = pd.factorize(plate, sort=True)[0]
    plate_index, keys = pd.factorize(
        batch_index.astype(np.int64) * (int(plate_codes.max()) + 1) + plate_codes, sort=True
    )
    pairs = np.column_stack(
        [np.asarray(keys) // (int(plate_codes.max()) + 1), np.asarray(keys) % (int(plate_codes.max()) + 1)]
    )
    columns = np.column_stack([design, y])
    n_plates = len(pairs)
    membership_rows = sparse.csr_matrix((weights, (plate_index, np.arange(len(y)))), shape=(n_plates, len(y)))
    plate_sums = np.asarray(membership_rows @ columns)
    n_batches = int(batch_index.max()) + 1
    membership = (np.arange(n_batches)[:, None] == pairs[:, 0][None, :]).astype(float)
    return GroupSums(
        columns.T @ (weights[:, None] * columns),
        plate_sums,
        np.bincount(plate_index, weights=weights, minlength=n_plates),
        pairs[:, 0],
        membership,
        n_batches,
        len(y),
        design.shape[1],
        float(np.sum(np.log(weights))),
        with_plate,
    )


def window_sums(shared: GroupSums, column: int) -> GroupSums:
    """The group sums of one response out of sums formed for several at once (``group_sums`` with
    ``y`` of shape (rows, responses): the design's columns, then one per response)."""
    keep = np.r_[np.arange(shared.n_fixed), shared.n_fixed + column]
    return replace(shared, cross=shared.cross[np.ix_(keep, keep)], plate_sums=shared.plate_sums[:, keep])


def _weighted_cross(sums: GroupSums, g_batch: float, g_plate: float) -> tuple[np.ndarray, float]:
    """[X y]' H^-1 [X y] and log |H| for the variance ratios g_batch, g_plate."""
    n_p = sums.plate_sizes
    c = g_plate / (1.0 + g_plate * n_p)
    a = 1.0 / (1.0 + g_plate * n_p)
    batch_totals = sums.membership @ (a[:, None] * sums.plate_sums)
    s = sums.membership @ (a * n_p)
    d = g_batch / (1.0 + g_batch * s)
    cross = (
        sums.cross - (sums.plate_sums * c[:, None]).T @ sums.plate_sums - (batch_totals * d[:, None]).T @ batch_totals
    )
    log_det = float(np.sum(np.log1p(g_plate * n_p)) + np.sum(np.log1p(g_batch * s))) - sums.log_weights
    return cross, log_det


def _objective(sums: GroupSums, g_batch: float, g_plate: float, reml: bool) -> float:
    """-2 log L (restricted if ``reml``), profiled over beta and s2; constants dropped."""
    cross, log_det = _weighted_cross(sums, g_batch, g_plate)
    # The Cholesky factor of [X y]' H^-1 [X y] holds both log |X'H^-1X| and the residual sum of squares.
    chol = np.linalg.cholesky(cross)
    q = sums.n_fixed
    rss = max(chol[q, q] ** 2, 1e-300)
    dof = sums.n_rows - q if reml else sums.n_rows
    value = dof * np.log(rss / dof) + log_det
    if reml:
        value += 2.0 * np.sum(np.log(np.diag(chol)[:q]))
    return float(value)


def _solution(sums: GroupSums, g_batch: float, g_plate: float, reml: bool) -> tuple[np.ndarray, np.ndarray, float]:
    """beta, (X'H^-1X)^-1 and s2 at the given variance ratios."""
    cross, _ = _weighted_cross(sums, g_batch, g_plate)
    q = sums.n_fixed
    xtx, xty, yty = cross[:q, :q], cross[:q, q], cross[q, q]
    beta = np.linalg.solve(xtx, xty)
    rss = max(float(yty - xty @ beta), 1e-300)
    return beta, np.linalg.inv(xtx), rss / (sums.n_rows - q if reml else sums.n_rows)


def restricted_deviance(sums: GroupSums, parameters: np.ndarray) -> float:
    """-2 log restricted likelihood (constants dropped) at variance parameters
    (theta_batch, [theta_plate,] sigma), not profiled: the function whose curvature gives the
    covariance of the variance parameters (lmerTest's ``devfun_vp``)."""
    g_batch, g_plate, variance = _ratios(sums, parameters)
    cross, log_det = _weighted_cross(sums, g_batch, g_plate)
    chol = np.linalg.cholesky(cross)
    q = sums.n_fixed
    rss = chol[q, q] ** 2
    value = (sums.n_rows - q) * np.log(variance) + log_det + rss / variance
    return float(value + 2.0 * np.sum(np.log(np.diag(chol)[:q])))


def fixed_covariance(sums: GroupSums, parameters: np.ndarray) -> np.ndarray:
    """Covariance of the fixed effects, s2 (X' H^-1 X)^-1, at the variance parameters
    (theta_batch, [theta_plate,] sigma)."""
    g_batch, g_plate, variance = _ratios(sums, parameters)
    cross, _ = _weighted_cross(sums, g_batch, g_plate)
    q = sums.n_fixed
    return variance * np.linalg.inv(cross[:q, :q])


def _ratios(sums: GroupSums, parameters: np.ndarray) -> tuple[float, float, float]:
    theta_plate = parameters[1] if sums.with_plate else 0.0
    return float(parameters[0] ** 2), float(theta_plate**2), float(parameters[-1] ** 2)


def _newton_polish(
    objective, theta: np.ndarray, value: float, step: float = 1e-4, iterations: int = 4
) -> tuple[np.ndarray, float]:
    """Newton steps on ``objective`` with central-difference gradient and Hessian; a step is kept
    only if it lowers the value."""
    k = len(theta)
    offsets = step * np.eye(k)
    for _ in range(iterations):
        f_plus = np.array([objective(theta + e) for e in offsets])
        f_minus = np.array([objective(theta - e) for e in offsets])
        gradient = (f_plus - f_minus) / (2 * step)
        hessian = np.diag((f_plus - 2 * value + f_minus) / step**2)
        for i in range(k):
            for j in range(i + 1, k):
                mixed = (
                    objective(theta + offsets[i] + offsets[j])
                    - objective(theta + offsets[i] - offsets[j])
                    - objective(theta - offsets[i] + offsets[j])
                    + objective(theta - offsets[i] - offsets[j])
                )
                hessian[i, j] = hessian[j, i] = mixed / (4 * step**2)
        try:
            if np.any(np.linalg.eigvalsh(hessian) <= 0):
                break
            candidate = theta - np.linalg.solve(hessian, gradient)
        except np.linalg.LinAlgError:
            break
        candidate_value = objective(candidate)
        if not candidate_value < value:
            break
        theta, value = np.abs(candidate), candidate_value
    return theta, value


def fit_nested_exact(
    y: np.ndarray,
    design: np.ndarray,
    batch: np.ndarray,
    plate: np.ndarray | None,
    reml: bool = True,
    weights: np.ndarray | None = None,
    sums: GroupSums | None = None,
    start: np.ndarray | None = None,
) -> ExactNestedFit:
    """REML (or ML) fit of ``y ~ design`` with random intercepts per batch and per plate within batch.

    ``batch`` and ``plate`` are labels per row (plate labels may repeat across batches; a plate
    is the pair batch, plate). With ``plate=None`` the model has the batch intercept only.
    ``weights``: known precision weights (residual variance s2 / w), or None for equal weights.
    ``sums``: the group sums if already formed (``window_sums``); ``start``: theta to start from
    (a fit of a similar response, e.g. the previous time window), which skips the coarse search.
    """
    with_plate = plate is not None
    sums = group_sums(y, design, batch, plate, weights) if sums is None else sums

    def objective(theta: np.ndarray) -> float:
        return _objective(sums, theta[0] ** 2, theta[1] ** 2 if with_plate else 0.0, reml)

    # Coarse start by Nelder-Mead, a quasi-Newton polish, then Newton steps with central-difference
    # derivatives: finite-difference BFGS stalls near 1e-6 in theta, Newton reaches ~1e-10.
    if start is None:
        initial = np.full(2 if with_plate else 1, 0.5)
        coarse = optimize.minimize(objective, initial, method="Nelder-Mead", options={"xatol": 1e-3, "fatol": 1e-6})
        begin, begin_value = coarse.x, float(coarse.fun)
    else:
        begin = np.maximum(np.abs(np.asarray(start, float)), 1e-3)  # off the boundary, where theta's sign flips
        begin_value = objective(begin)
    polished = optimize.minimize(objective, begin, method="BFGS", options={"gtol": 1e-6})
    best, best_value = (polished.x, float(polished.fun)) if polished.fun <= begin_value else (begin, begin_value)
    theta, value = _newton_polish(objective, np.abs(best), best_value)
    g_batch, g_plate = theta[0] ** 2, (theta[1] ** 2 if with_plate else 0.0)
    beta, inverse, scale = _solution(sums, g_batch, g_plate, reml)
    return ExactNestedFit(
        beta,
        np.sqrt(np.diag(inverse) * scale),
        g_batch * scale,
        g_plate * scale,
        scale,
        value,
        bool(np.isfinite(value)),
        sums,
        np.array([*np.abs(theta), np.sqrt(scale)]),
    )
