"""Median polish and B-score (Tukey 1977; Brideau et al. 2003) on planted plates."""

import numpy as np
import pandas as pd
import pytest

from plateloom.plate.positional import (
    b_scores,
    edge_effect,
    median_polish,
    positional_correction,
)


def test_median_polish_recovers_planted_row_and_column_effects_exactly():
    # Noise-free additive plate: Tukey's median polish returns the planted effects (centred on their medians).
    rng = np.random.default_rng(2)
    rows, columns = rng.normal(0, 1, 16), rng.normal(0, 1, 24)
    rows -= np.median(rows)
    columns -= np.median(columns)
    plate = 10 + rows[:, None] + columns[None, :]
    fit = median_polish(plate)
    assert fit.overall == pytest.approx(10)
    np.testing.assert_allclose(fit.row, rows, atol=1e-9)
    np.testing.assert_allclose(fit.column, columns, atol=1e-9)
    np.testing.assert_allclose(fit.residual, 0, atol=1e-9)


def test_b_score_leaves_no_row_or_column_trend():
    # Brideau et al. 2003: B-scores are median-polish residuals over their MAD; a planted gradient disappears.
    rng = np.random.default_rng(3)
    r, c = np.meshgrid(np.arange(8), np.arange(12), indexing="ij")
    plate = 100 + 3.0 * r + 2.0 * c + rng.normal(0, 1, (8, 12))
    scores = b_scores(plate)
    for axis, coordinate in ((1, np.arange(8)), (0, np.arange(12))):
        line_medians = np.median(scores, axis=axis)
        slope = np.polyfit(coordinate, line_medians, 1)[0]
        assert abs(slope) < 0.1
    assert np.median(np.abs(scores - np.median(scores))) * 1.4826 == pytest.approx(1.0, abs=1e-9)


def test_positional_correction_guards_control_only_columns():
    plate = np.ones((8, 12))
    plate[:, 5] += 0.5  # a column effect in the fitted wells
    fit = plate.copy()
    fit[:, [0, 11]] = np.nan  # controls in the edge columns, left out of the fit
    corrected, notes = positional_correction(plate, fit)
    assert notes == ["columns 1, 12: fewer than 3 wells, effect not estimated"]
    np.testing.assert_allclose(corrected, 1.0)


def test_edge_effect_found_when_planted_and_absent_otherwise():
    rng = np.random.default_rng(5)
    wells = [(r, c) for r in range(8) for c in range(12)]
    is_edge = np.array([r in (0, 7) or c in (0, 11) for r, c in wells])
    treatment = np.array([f"t{i % 12}" for i in range(96)])
    base = np.exp(rng.normal(0, 0.05, 96)) * 100
    profile = pd.DataFrame(
        {
            "is_edge": is_edge,
            "treatment": treatment,
            "excluded_by": "",
            "flat": base,
            "drift": base * np.where(is_edge, 1.15, 1.0),
        }
    )
    planted = edge_effect(profile, "drift", log_scale=True)
    assert planted["p_value"] < 1e-6
    assert planted["edge_shift"] == pytest.approx(np.log(1.15), abs=0.04)
    assert edge_effect(profile, "flat", log_scale=True)["p_value"] > 0.01
