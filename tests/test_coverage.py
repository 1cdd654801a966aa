"""Coverage of the condition-effect intervals over simulated screens with planted batch and plate effects.

Planted truth: 3 batches (days) x 2 plates, random intercepts per batch (SD 0.2) and plate (SD 0.1),
residual SD 0.1 on the log scale, every treatment with log effect 0.2. Two treatments are on every
plate; one treatment per day is imaged on that day only, as screens often do. The effects model
should cover the truth in about 95% of cases (nominal level); a naive model that pools wells and
ignores batch and plate (ordinary least squares) treats day-to-day variation as if it averaged out.
"""

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

from plateloom.screen.design_check import (
    VarianceComponents,
    simulate_design,
    simulate_values,
)

EFFECT = 0.2
COMPONENTS = VarianceComponents(batch=0.04, plate=0.01, residual=0.01)


def _design() -> pd.DataFrame:
    rows = []
    for b in range(3):
        for p in range(2):
            plate = f"d{b}p{p}"
            rows += [(f"d{b}", plate, "negative_control", "vehicle", "vehicle", np.nan, "")] * 8
            for name in ("A", "B", f"C{b}"):
                rows += [(f"d{b}", plate, "test", f"{name} 1 uM", name, 1.0, "uM")] * 3
    return pd.DataFrame(rows, columns=["batch", "plate", "role", "treatment", "condition", "dose", "dose_unit"])


def _naive_coverage(design: pd.DataFrame, n_screens: int, seed: int) -> float:
    rng = np.random.default_rng(seed)
    covered = []
    for _ in range(n_screens):
        data = design.assign(
            y=simulate_values(design, COMPONENTS, EFFECT, rng),
            code=np.where(design["role"] == "negative_control", "a_control", design["condition"]),
        )
        fit = smf.ols("y ~ C(code)", data).fit()
        intervals = fit.conf_int(0.05).drop(index="Intercept")
        covered += list((intervals[0] <= EFFECT) & (EFFECT <= intervals[1]))
    return float(np.mean(covered))


@pytest.mark.slow
def test_mixed_model_intervals_cover_the_planted_effect_at_the_nominal_rate():
    design = _design()
    table = simulate_design(design, COMPONENTS, EFFECT, n_screens=500, seed=20261202)
    assert table["converged"].all()
    coverage = table["covered"].mean()
    assert 0.93 <= coverage <= 0.97, coverage
    day_only = table[table["treatment"].str.startswith("C")]["covered"].mean()
    assert 0.93 <= day_only <= 0.97, day_only
    naive = _naive_coverage(design, n_screens=500, seed=20261202)
    assert naive < 0.85, naive


def test_simulated_components_have_the_planted_variances():
    # Planted-truth check of the simulator itself: sample variances of batch, plate and residual parts.
    design = pd.concat([_design()] * 1, ignore_index=True)
    rng = np.random.default_rng(1)
    residual = np.concatenate(
        [simulate_values(design, VarianceComponents(0.0, 0.0, 0.01), 0.0, rng) for _ in range(200)]
    )
    assert residual.var() == pytest.approx(0.01, rel=0.05)
    batch_only = np.array(
        [simulate_values(design, VarianceComponents(0.04, 0.0, 0.0), 0.0, rng)[0] for _ in range(4000)]
    )
    assert batch_only.var() == pytest.approx(0.04, rel=0.08)
