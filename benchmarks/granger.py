"""Granger tests of 2,000 neighbour pairs: the vectorised tests against statsmodels per pair, one run.

Pairs of 30-frame traces (half coupled at lag 1, half independent). The reference calls
statsmodels' grangercausalitytests(maxlag=3) once per pair, which fits lags 1..3; the
vectorised path computes the same F-tests for lags 1..3 over all pairs at once, and also
the full readout path (lag chosen by BIC, test at that lag). Prints both times, checks the
F statistics agree, and, last, statsmodels / vectorised time (goal >= 20).

    python benchmarks/granger.py [pairs]
"""

from __future__ import annotations

import sys
import time
import warnings

import numpy as np
from statsmodels.tsa.stattools import grangercausalitytests

from plateloom.well.granger import granger_f_test, granger_tests


def main() -> None:
    n_pairs = int(sys.argv[1]) if len(sys.argv) > 1 else 2000
    rng = np.random.default_rng(1)
    n, max_lag = 30, 3
    cause = rng.normal(size=(n_pairs, n))
    effect = np.zeros((n_pairs, n))
    strength = np.where(np.arange(n_pairs) % 2 == 0, 0.6, 0.0)
    for t in range(1, n):
        effect[:, t] = 0.3 * effect[:, t - 1] + strength * cause[:, t - 1] + rng.normal(size=n_pairs)

    start = time.perf_counter()
    vectorised = np.column_stack([granger_f_test(effect, cause, lag)[0] for lag in range(1, max_lag + 1)])
    t_vectorised = time.perf_counter() - start
    start = time.perf_counter()
    granger_tests(effect, cause, max_lag, "bic")
    t_readout = time.perf_counter() - start

    reference = np.empty((n_pairs, max_lag))
    start = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        for k in range(n_pairs):
            result = grangercausalitytests(np.column_stack([effect[k], cause[k]]), max_lag)
            reference[k] = [result[lag][0]["ssr_ftest"][0] for lag in range(1, max_lag + 1)]
    t_reference = time.perf_counter() - start

    print(f"{n_pairs} pairs of {n} frames, lags 1..{max_lag}")
    print(f"statsmodels, one call per pair: {t_reference:.2f} s")
    print(
        f"vectorised F-tests, lags 1..{max_lag}: {t_vectorised * 1000:.1f} ms "
        f"(largest relative difference in F {np.max(np.abs(vectorised / reference - 1)):.1e})"
    )
    print(
        f"vectorised readout path (BIC lag choice + test): {t_readout * 1000:.1f} ms "
        f"(statsmodels / readout path {t_reference / t_readout:.0f}x)"
    )
    print(f"statsmodels / vectorised: {t_reference / t_vectorised:.0f}")


if __name__ == "__main__":
    main()
