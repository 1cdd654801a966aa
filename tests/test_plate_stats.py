"""Plate QC and normalization against their published definitions."""

import numpy as np
import pandas as pd
import pytest

from plateloom.plate_stats import (MAD_TO_SD, add_robust_z, apply_well_exclusions, robust_z, robust_z_prime, z_prime,
                                   z_prime_verdict)


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
    # 1.4826 x MAD is consistent with the SD for normal data (Rousseeuw & Croux 1993), so the two agree on large samples.
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


def test_exclusion_rule_marks_low_count_wells_and_robust_z_ignores_them():
    profile = pd.DataFrame({"well": ["A01", "A02", "A03", "A04"], "role": ["negative_control"] * 4,
                            "cell_count": [20.0, 22.0, 2.0, 21.0], "x": [1.0, 2.0, 1000.0, 3.0]})
    marked = apply_well_exclusions(profile, min_cells_per_well=5)
    assert list(marked["excluded_by"] != "") == [False, False, True, False]
    assert "min_cells_per_well" in marked.loc[2, "excluded_by"]
    scored = add_robust_z(marked, ["x"])
    assert scored.loc[1, "x_robust_z"] == pytest.approx(0.0)  # the excluded outlier does not move the median
