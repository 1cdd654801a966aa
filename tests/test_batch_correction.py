"""Batch correction against a reference ComBat implementation and against its defining properties."""

import numpy as np
import pandas as pd
import pytest

from plateloom.screen.batch_correction import (
    align_to_controls,
    combat,
    correct_batches,
    principal_components,
    variance_shares,
)

pycombat_module = pytest.importorskip("combat.pycombat")


def _screen_matrix(seed=0):
    # Planted-truth matrix: 3 batches x 12 wells, 12 features, batch shifts and one batch with 1.7x scale,
    # a protected treatment with effect 0.8 on every feature.
    rng = np.random.default_rng(seed)
    batch = np.repeat([0, 1, 2], 12)
    treatment = np.tile(np.arange(3), 12)
    x = (
        rng.normal(size=(36, 12))
        + np.array([0, 1.0, -0.5])[batch][:, None] * rng.uniform(0.5, 1.5, 12)
        + 0.8 * (treatment == 1)[:, None]
    )
    x[batch == 2] *= 1.7
    covariates = np.column_stack([treatment == 1, treatment == 2]).astype(float)
    return x, batch, treatment, covariates


def _reference(x, batch, treatment=None, **options):
    frame = pd.DataFrame(x.T)
    kwargs = {"mod": list(treatment)} if treatment is not None else {}
    return pycombat_module.pycombat(frame, list(batch), **kwargs, **options).to_numpy().T


def test_combat_location_only_equals_pycombat():
    # Reference: pycombat 0.3.3 (PyPI package "combat"), mean_only=True; Johnson, Li & Rabinovic 2007.
    x, batch, _, _ = _screen_matrix()
    np.testing.assert_allclose(
        combat(x, batch, None, mean_only=True, ddof=0), _reference(x, batch, mean_only=True), rtol=0, atol=1e-10
    )


def test_combat_location_scale_equals_pycombat_with_published_scale_update(monkeypatch):
    # Reference: pycombat 0.3.3 with its protected treatment covariate. Its iterative solver updates
    # every feature's scale (delta*) from the FIRST feature's location (g_new[0][0]); the published update
    # (Johnson et al. 2007, supplementary eq. for delta*) uses each feature's own location. The patch below
    # restores the published update inside the reference; everything else (standardisation, priors,
    # adjustment) is the reference's own code. pycombat uses population variances, hence ddof=0.
    def published_it_sol(sdat, g_hat, d_hat, g_bar, t2, a, b, conv=0.0001, exit_iteration=10e5):
        sdat = np.asarray(sdat)
        n = sdat.shape[1]
        g_old, d_old = np.ravel(g_hat).copy(), np.ravel(d_hat).copy()
        g_hat = np.ravel(g_hat)
        change = 1.0
        while change > conv:
            g_new = (t2 * n * g_hat + d_old * g_bar) / (t2 * n + d_old)
            d_new = (0.5 * ((sdat - g_new[:, None]) ** 2).sum(axis=1) + b) / (0.5 * n + a - 1)
            change = max(np.max(np.abs(g_new - g_old) / np.abs(g_old)), np.max(np.abs(d_new - d_old) / d_old))
            g_old, d_old = g_new, d_new
        return np.asarray([g_new, d_new], dtype=object)

    monkeypatch.setattr(pycombat_module, "it_sol", published_it_sol)
    x, batch, treatment, covariates = _screen_matrix()
    np.testing.assert_allclose(combat(x, batch, covariates, ddof=0), _reference(x, batch, treatment), rtol=0, atol=1e-8)


def test_combat_protects_the_treatment_effect_and_removes_batch_shifts():
    x, batch, treatment, covariates = _screen_matrix(seed=4)
    corrected = combat(x, batch, covariates)
    batch_means = np.array([corrected[(batch == k) & (treatment == 0)].mean() for k in range(3)])
    assert np.ptp(batch_means) < 0.35 < np.ptp([x[(batch == k) & (treatment == 0)].mean() for k in range(3)])
    effect = corrected[treatment == 1].mean() - corrected[treatment == 0].mean()
    assert effect == pytest.approx(0.8, abs=0.25)


def test_control_alignment_matches_pooled_control_median_and_ignores_batch_constants():
    rng = np.random.default_rng(2)
    batch = np.repeat(["d1", "d2", "d3"], 20)
    control = np.tile([True, False], 30)
    values = pd.DataFrame({"f": rng.normal(size=60) + np.repeat([0.0, 2.0, -1.0], 20)})
    aligned = align_to_controls(values, batch, control, scale=False)
    pooled = values["f"][control].median()
    for name in ("d1", "d2", "d3"):
        assert aligned["f"][(batch == name) & control].median() == pytest.approx(pooled, abs=1e-12)
    shifted = values.copy()
    shifted.loc[batch == "d2", "f"] += 5.0
    shifted_aligned = align_to_controls(shifted, batch, control, scale=False)
    d2 = batch == "d2"
    np.testing.assert_allclose(shifted_aligned["f"][~d2], aligned["f"][~d2] + (shifted["f"][control].median() - pooled))
    np.testing.assert_allclose(np.diff(shifted_aligned["f"][d2]), np.diff(aligned["f"][d2]), atol=1e-12)


def test_control_location_scale_equalises_control_mad():
    rng = np.random.default_rng(5)
    batch = np.repeat(["d1", "d2"], 40)
    control = np.tile([True, True, False, False], 20)
    values = pd.DataFrame({"f": rng.normal(size=80) * np.repeat([1.0, 3.0], 40)})
    aligned = correct_batches(values, batch, control, np.where(control, "ctrl", "x"), "control_location_scale")
    mads = [
        (aligned["f"][(batch == b) & control] - aligned["f"][(batch == b) & control].median()).abs().median()
        for b in ("d1", "d2")
    ]
    assert mads[0] == pytest.approx(mads[1], rel=1e-9)


def test_variance_shares_sum_to_one_and_find_a_planted_batch_effect():
    rng = np.random.default_rng(7)
    batch = np.repeat(["d1", "d2", "d3"], 40)
    plate = np.repeat([f"p{i}" for i in range(6)], 20)
    treatment = np.tile(["a", "b"], 60)
    values = pd.DataFrame(
        {"batchy": np.repeat([0.0, 3.0, -3.0], 40) + rng.normal(size=120), "noise": rng.normal(size=120)}
    )
    shares = variance_shares(values, batch, plate, treatment).set_index("feature")
    np.testing.assert_allclose(shares.sum(axis=1), 1.0)
    assert shares.loc["batchy", "batch_share"] > 0.8
    assert shares.loc["noise", "batch_share"] < 0.1


def test_principal_components_agree_with_the_correlation_eigenvalues():
    # Reference: eigenvalues of the correlation matrix (numpy.linalg.eigvalsh) are the PC variances.
    rng = np.random.default_rng(9)
    values = pd.DataFrame(rng.normal(size=(50, 4)) @ rng.normal(size=(4, 4)), columns=list("abcd"))
    scores, explained = principal_components(values, 2)
    eigen = np.sort(np.linalg.eigvalsh(np.corrcoef(values.to_numpy().T)))[::-1]
    np.testing.assert_allclose(explained, eigen[:2] / eigen.sum(), rtol=1e-10)
    np.testing.assert_allclose(scores.var(axis=0, ddof=1), eigen[:2], rtol=1e-10)
