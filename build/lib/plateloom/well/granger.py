"""Granger (1969) causality F-tests between pairs of traces, vectorised over pairs (batched QR);
statsmodels' grangercausalitytests is the reference a test compares with."""

from __future__ import annotations

import numpy as np
from scipy import stats


def _lag_design(series: np.ndarray, lag: int, start: int) -> np.ndarray:
    """(pairs, n - start, lag) matrix of series values at t-1 .. t-lag for t = start .. n-1."""
    n = series.shape[1]
    return np.stack([series[:, start - k : n - k] for k in range(1, lag + 1)], axis=2)


def _residual_ss(design: np.ndarray, response: np.ndarray) -> np.ndarray:
    """Residual sum of squares of the least-squares fit of ``response`` (pairs, m) on ``design`` (pairs, m, k).

    From the QR factorisation of [design | response]: the last diagonal element of R is the
    residual norm (stable, batched over pairs).
    """
    augmented = np.concatenate([design, response[:, :, None]], axis=2)
    r = np.linalg.qr(augmented, mode="r")
    return r[:, -1, -1] ** 2


def _ssr_pair(effect: np.ndarray, cause: np.ndarray, lag: int, start: int) -> tuple[np.ndarray, np.ndarray]:
    """Residual sums of squares (own lags only, own and cause lags), constant included, for t >= start."""
    response = effect[:, start:]
    const = np.ones(response.shape + (1,))
    own = np.concatenate([_lag_design(effect, lag, start), const], axis=2)
    joint = np.concatenate([_lag_design(effect, lag, start), _lag_design(cause, lag, start), const], axis=2)
    return _residual_ss(own, response), _residual_ss(joint, response)


def granger_f_test(effect: np.ndarray, cause: np.ndarray, lag: int) -> tuple[np.ndarray, np.ndarray, int]:
    """Granger F-test that ``cause`` helps predict ``effect`` at lag order ``lag``, for each row pair.

    ``effect``, ``cause``: (pairs, n) complete series. As in the SSR F-test of Granger (1969)
    with a constant: the sample is t = lag .. n-1, F = ((SSR_own - SSR_joint) / lag) /
    (SSR_joint / (n - lag - 2 lag - 1)). Returns (F, p-value, denominator degrees of freedom);
    NaN where the joint model fits perfectly.
    """
    effect, cause = np.atleast_2d(np.asarray(effect, float)), np.atleast_2d(np.asarray(cause, float))
    n = effect.shape[1]
    df_denom = n - lag - (2 * lag + 1)
    if df_denom < 1:
        raise ValueError(f"series of {n} points are too short for a Granger test at lag {lag}")
    ssr_own, ssr_joint = _ssr_pair(effect, cause, lag, lag)
    centred = effect[:, lag:] - effect[:, lag:].mean(axis=1, keepdims=True)
    tss = (centred**2).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        f = (ssr_own - ssr_joint) / ssr_joint / lag * df_denom
    f = np.where((ssr_joint > np.finfo(float).eps * tss) & (tss > 0), f, np.nan)
    return f, stats.f.sf(f, lag, df_denom), df_denom


def choose_granger_lag(effect: np.ndarray, cause: np.ndarray, max_lag: int, criterion: str = "bic") -> np.ndarray:
    """Lag order 1..max_lag minimising the information criterion of the joint regression, per row pair.

    All orders are compared on the same sample (t = max_lag .. n-1), as in VAR order
    selection: AIC = m ln(SSR/m) + 2k (Akaike 1974), BIC = m ln(SSR/m) + k ln m (Schwarz 1978),
    k = 2 lag + 1 coefficients, m sample size.
    """
    if criterion not in ("aic", "bic"):
        raise ValueError(f"unknown lag criterion {criterion!r}; use aic or bic")
    effect, cause = np.atleast_2d(np.asarray(effect, float)), np.atleast_2d(np.asarray(cause, float))
    m = effect.shape[1] - max_lag
    scores = []
    for lag in range(1, max_lag + 1):
        _, ssr = _ssr_pair(effect, cause, lag, max_lag)
        k = 2 * lag + 1
        with np.errstate(divide="ignore"):
            scores.append(m * np.log(ssr / m) + (2 * k if criterion == "aic" else k * np.log(m)))
    return np.nanargmin(np.where(np.isfinite(scores), scores, np.inf), axis=0) + 1


def granger_tests(
    effect: np.ndarray, cause: np.ndarray, max_lag: int, criterion: str = "bic"
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Per row pair: (chosen lag, F, p-value) of the Granger test that ``cause`` helps predict ``effect``."""
    lag = choose_granger_lag(effect, cause, max_lag, criterion)
    f, p = np.full(len(lag), np.nan), np.full(len(lag), np.nan)
    for order in np.unique(lag):
        rows = lag == order
        f[rows], p[rows], _ = granger_f_test(effect[rows], cause[rows], int(order))
    return lag, f, p
