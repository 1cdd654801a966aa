"""Effects model on a 40-plate x 384-well screen (15,360 wells) and 200 features, as ratios within one run.

Simulates well values with batch (5 days x 8 plates), plate and residual variation and 40
treatments, then:
  1. fits all features with the exact nested REML path, on 1 process and on 2 processes;
  2. fits the first few features with statsmodels MixedLM as well and compares estimates and
     standard errors (statsmodels at its default tolerance and run to gtol 1e-12);
  3. prints the speed-up of the exact path over statsmodels per feature and the parallel speed-up.
The last line is the exact-over-statsmodels speed-up (goal >= 10).

    python benchmarks/effects_fit.py [n_features] [n_statsmodels_features]
"""

from __future__ import annotations

import os

# One BLAS thread per process, as a Snakemake job with threads: 1 gets; otherwise two processes fight over 2 cores.
for variable in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(variable, "1")

import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from concurrent.futures import ProcessPoolExecutor  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from plateloom.screen.effects import fit_feature_effects  # noqa: E402

PLATES, WELLS, BATCHES, TREATMENTS = 40, 384, 5, 40


def simulate_screen(n_features: int, seed: int = 1) -> pd.DataFrame:
    """Well table with ``n_features`` model-scale features (planted-truth simulation)."""
    rng = np.random.default_rng(seed)
    plate = np.repeat(np.arange(PLATES), WELLS)
    batch = plate // (PLATES // BATCHES)
    slot = np.tile(np.arange(WELLS), PLATES)
    control = slot % 8 == 0
    treatment_index = slot % TREATMENTS
    frame = pd.DataFrame(
        {
            "batch": [f"day{b}" for b in batch],
            "plate": [f"P{p:02d}" for p in plate],
            "role": np.where(control, "negative_control", "test"),
            "treatment": np.where(control, "vehicle", [f"X{t:02d} 1 uM" for t in treatment_index]),
            "condition": np.where(control, "vehicle", [f"X{t:02d}" for t in treatment_index]),
            "dose": np.where(control, np.nan, 1.0),
            "dose_unit": "uM",
        }
    )
    effects = rng.normal(0, 0.1, TREATMENTS)
    columns = {}
    for f in range(n_features):
        columns[f"f{f:03d}"] = (
            np.where(control, 0.0, effects[treatment_index])
            + rng.normal(0, 0.1, BATCHES)[batch]
            + rng.normal(0, 0.05, PLATES)[plate]
            + rng.normal(0, 0.1, len(plate))
        )
    return pd.concat([frame, pd.DataFrame(columns)], axis=1)


def _fit(args: tuple[pd.DataFrame, list[str], str]) -> pd.DataFrame:
    wells, features, fitter = args
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return pd.concat([fit_feature_effects(wells, f, "linear", 0.95, fitter) for f in features], ignore_index=True)


def main() -> None:
    n_features = int(sys.argv[1]) if len(sys.argv) > 1 else 200
    n_reference = int(sys.argv[2]) if len(sys.argv) > 2 else 2
    wells = simulate_screen(n_features)
    features = [c for c in wells.columns if c.startswith("f")]
    start = time.perf_counter()
    serial = _fit((wells, features, "exact"))
    t_serial = time.perf_counter() - start
    halves = [features[0::2], features[1::2]]
    start = time.perf_counter()
    with ProcessPoolExecutor(2) as pool:
        parallel = pd.concat(pool.map(_fit, [(wells, h, "exact") for h in halves]), ignore_index=True)
    t_parallel = time.perf_counter() - start
    parallel = parallel.set_index(["feature", "treatment"]).loc[serial.set_index(["feature", "treatment"]).index]
    assert np.allclose(parallel["estimate"].to_numpy(), serial["estimate"].to_numpy(), rtol=0, atol=0)
    start = time.perf_counter()
    reference = _fit((wells, features[:n_reference], "statsmodels"))
    t_reference = time.perf_counter() - start
    exact_part = serial[serial["feature"].isin(features[:n_reference])]
    d_est = np.max(np.abs(exact_part["estimate"].to_numpy() - reference["estimate"].to_numpy()))
    r_se = np.max(np.abs(exact_part["std_error"].to_numpy() / reference["std_error"].to_numpy() - 1))
    per_exact = t_serial / n_features
    per_reference = t_reference / n_reference
    print(
        f"screen: {len(wells)} wells, {PLATES} plates in {BATCHES} batches, {TREATMENTS} treatments, "
        f"{n_features} features"
    )
    print(
        f"exact REML: {t_serial:.1f} s on 1 process ({per_exact * 1000:.0f} ms per feature), "
        f"{t_parallel:.1f} s on 2 processes (parallel speed-up {t_serial / t_parallel:.2f}x)"
    )
    print(f"statsmodels MixedLM: {per_reference:.1f} s per feature ({n_reference} features)")
    print(f"exact vs statsmodels (default tolerance): max |estimate diff| {d_est:.2e}, max relative SE diff {r_se:.2e}")
    print(f"ratio statsmodels / exact time per feature: {per_reference / per_exact:.1f}")


if __name__ == "__main__":
    main()
