"""Plate QC and normalization against their published definitions."""

import numpy as np
import pandas as pd
import pytest

from plateloom.plate.exclusions import ExclusionRules, well_exclusions
from plateloom.plate.qc import (
    robust_ssmd,
    robust_z,
    robust_z_prime,
    signal_window,
    ssmd,
    z_prime,
    z_prime_verdict,
)
from plateloom.stats import MAD_TO_SD


def test_z_prime_worked_example():
    # Zhang, Chung & Oldenburg 1999: Z' = 1 - 3 (sd_pos + sd_neg) / |mean_pos - mean_neg|.
    # pos mean 12, sd 2; neg mean 2, sd 1  ->  1 - 3 * 3 / 10 = 0.1
    assert z_prime([10, 12, 14], [1, 2, 3]) == pytest.approx(0.1)
    # perfectly separated, no spread -> 1
    assert z_prime([5, 5], [1, 1]) == pytest.approx(1.0)


def test_z_prime_verdict_bands_follow_zhang_1999():
    assert z_prime_verdict(0.7).startswith("excellent")
    assert z_prime_verdict(0.5).startswith("excellent")
    assert z_prime_verdict(0.2).startswith("marginal")
    assert z_prime_verdict(0.0).startswith("unusable")
    assert z_prime_verdict(float("nan")) == "not computable"


def test_robust_z_prime_equals_z_prime_for_normal_controls():
    # 1.4826 x MAD is consistent with the SD for normal data (Rousseeuw & Croux 1993), so the two
    # agree on large samples.
    rng = np.random.default_rng(0)
    pos, neg = rng.normal(10, 1, 20000), rng.normal(0, 1, 20000)
    assert robust_z_prime(pos, neg) == pytest.approx(z_prime(pos, neg), abs=0.01)


def test_robust_z_worked_example_and_consistency_constant():
    # (x - median) / (1.4826 * MAD): controls 1,2,3,4,100 have median 3 and MAD 1.
    assert MAD_TO_SD == 1.4826
    assert robust_z(np.array([6.0]), np.array([1, 2, 3, 4, 100.0]))[0] == pytest.approx(3 / 1.4826)
    # For normal controls the robust z is close to the ordinary z (common practice; Rousseeuw & Croux 1993).
    rng = np.random.default_rng(1)
    controls = rng.normal(50, 4, 50000)
    assert robust_z(np.array([58.0]), controls)[0] == pytest.approx(2.0, abs=0.05)


def test_robust_z_is_nan_when_controls_have_no_spread():
    assert np.isnan(robust_z(np.array([1.0]), np.array([2.0, 2.0, 2.0]))[0])


def test_exclusion_rule_marks_low_count_wells_in_table_and_ledger():
    profile = pd.DataFrame(
        {
            "plate": "P1",
            "well": ["A01", "A02", "A03", "A04"],
            "role": ["negative_control"] * 4,
            "cell_count": [20.0, 22.0, 2.0, 21.0],
        }
    )
    marked, ledger = well_exclusions(profile, ExclusionRules.defaults(min_cells_per_well=5))
    assert list(marked["excluded_by"] != "") == [False, False, True, False]
    assert "min_cells_per_well" in marked.loc[2, "excluded_by"]
    assert ledger[["level", "well", "rule", "value", "threshold"]].values.tolist() == [
        ["well", "A03", "min_cells_per_well", 2.0, 5.0]
    ]


def test_ssmd_worked_example():
    # Zhang 2007: SSMD = (mean1 - mean2) / sqrt(var1 + var2); means 12 and 2, variances 4 and 1 -> 10 / sqrt(5).
    assert ssmd([10, 12, 14], [1, 2, 3]) == pytest.approx(10 / np.sqrt(5))
    # robust form: medians 12 and 2, MADs 2 and 1 -> 10 / (1.4826 sqrt(5))
    assert robust_ssmd([10, 12, 14], [1, 2, 3]) == pytest.approx(10 / (1.4826 * np.sqrt(5)))


def test_signal_window_worked_example():
    # (|12 - 2| - 3 (2 + 1)) / 2 = 0.5 (definition recalled from memory, Iversen et al. 2006)
    assert signal_window([10, 12, 14], [1, 2, 3]) == pytest.approx(0.5)


def test_qc_verdict_says_why_z_prime_does_not_apply():
    from plateloom.plate.qc import qc_verdict

    assert qc_verdict(0.6, 8.0, 4, 12).startswith("excellent")
    assert qc_verdict(-370.0, 0.05, 4, 12).startswith("no Z': the positive control does not move")
    assert qc_verdict(-0.4, -3.5, 4, 12).startswith("unusable")  # moved, but too noisy to separate
    assert qc_verdict(float("nan"), float("nan"), 0, 12).startswith("no Z': fewer than 2 positive-control")
    assert qc_verdict(float("nan"), float("nan"), 4, 1).startswith("no Z': fewer than 2 negative-control")
