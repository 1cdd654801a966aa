"""Effects over time against the endpoint effects on a 40-plate x 384-well screen, as a ratio within one run.

The screen of ``effects_fit.py`` (5 days x 8 plates, 40 treatments) is given 12 time windows per
well (each window: the endpoint value plus window noise). Times, on one process:
  1. the endpoint effects of every feature (``fit_feature_effects``);
  2. the effects over time of the same features (``effects_over_time``: the model in each of the
     12 windows, the simultaneous band, the q-values) and the areas under the curves.
The last line is the ratio (2) / (1) (goal <= 5).

    python benchmarks/kinetic_fit.py [n_features]
"""

from __future__ import annotations

import os

for variable in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(variable, "1")

import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
from effects_fit import simulate_screen  # noqa: E402

from plateloom.screen.effects import fit_feature_effects  # noqa: E402
from plateloom.screen.kinetics import ModelChoices, area_effects, effects_over_time  # noqa: E402

WINDOWS = 12


def window_rows(wells: pd.DataFrame, features: list[str], seed: int = 2) -> pd.DataFrame:
    """The wells repeated per window, each feature plus independent window noise (SD 0.05)."""
    rng = np.random.default_rng(seed)
    parts = []
    for window in range(WINDOWS):
        noise = pd.DataFrame(rng.normal(0, 0.05, (len(wells), len(features))), columns=features, index=wells.index)
        part = pd.concat([wells.drop(columns=features), wells[features] + noise], axis=1)
        parts.append(
            part.assign(
                well=np.arange(len(part)).astype(str),
                n_sites=1,
                count_only=False,
                window=window,
                window_start_min=30.0 * window,
                window_end_min=30.0 * (window + 1),
                time_origin="first_frame",
            )
        )
    return pd.concat(parts, ignore_index=True)


def main() -> None:
    n_features = int(sys.argv[1]) if len(sys.argv) > 1 else 20
    wells = simulate_screen(n_features)
    features = [c for c in wells.columns if c.startswith("f")]
    rows = window_rows(wells, features)
    warnings.simplefilter("ignore")
    start = time.perf_counter()
    for feature in features:
        fit_feature_effects(wells, feature, "linear", 0.95, "exact")
    endpoint = time.perf_counter() - start
    start = time.perf_counter()
    scales = dict.fromkeys(features, "linear")
    effects_over_time(rows, features, scales, ModelChoices())
    area_effects(rows, features, ModelChoices(), None)
    kinetic = time.perf_counter() - start
    print(f"{len(wells)} wells, {n_features} features, {WINDOWS} windows")
    print(f"endpoint effects:  {endpoint:7.1f} s ({endpoint / n_features:.3f} s per feature)")
    print(f"effects over time: {kinetic:7.1f} s ({kinetic / n_features:.3f} s per feature)")
    print(f"effects over time / endpoint: {kinetic / endpoint:.2f} (goal <= 5)")


if __name__ == "__main__":
    main()
