"""Collective readouts checked against reference libraries and published properties."""

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm
from statsmodels.tsa.stattools import grangercausalitytests

from plateloom.well.collective import (
    CollectiveSettings,
    analytic_phases,
    corrected_order_squared,
    detrend_rows,
    knox_test,
    kuramoto_order,
    pair_correlations,
    reporter_events,
    well_collective_readouts,
)
from plateloom.well.granger import choose_granger_lag, granger_f_test, granger_tests
from plateloom.well.neighbours import delaunay_edges, pairs_at_distance_two, track_neighbour_pairs
from plateloom.well.track_stats import fill_inner_gaps


def _coupled_pairs(rng, n_pairs, n, strength):
    """x is white noise; y(t) = 0.4 y(t-1) + strength x(t-1) + noise (x Granger-causes y)."""
    x = rng.normal(size=(n_pairs, n))
    y = np.zeros((n_pairs, n))
    noise = rng.normal(size=(n_pairs, n))
    for t in range(1, n):
        y[:, t] = 0.4 * y[:, t - 1] + strength * x[:, t - 1] + noise[:, t]
    return x, y


@pytest.mark.parametrize("strength", [0.0, 0.6])
@pytest.mark.parametrize("lag", [1, 2, 3])
def test_granger_f_test_equals_statsmodels(strength, lag):
    # Reference: statsmodels.tsa.stattools.grangercausalitytests, its "ssr_ftest" (F, p, df_denom, df_num).
    rng = np.random.default_rng(7 + lag)
    x, y = _coupled_pairs(rng, 12, 40, strength)
    f, p, df = granger_f_test(y, x, lag)
    for k in range(len(x)):
        reference = grangercausalitytests(np.column_stack([y[k], x[k]]), [lag])[lag][0]["ssr_ftest"]
        assert f[k] == pytest.approx(reference[0], rel=1e-8, abs=1e-10)
        assert p[k] == pytest.approx(reference[1], rel=1e-8, abs=1e-12)
        assert df == reference[2]


def test_lag_choice_minimises_statsmodels_bic_on_a_common_sample():
    # Reference: statsmodels OLS .bic (= -2 llf + k ln m) of the joint regression, all lags on t >= max_lag.
    rng = np.random.default_rng(3)
    x = rng.normal(size=(8, 60))
    y = np.zeros_like(x)
    for t in range(3, 60):
        y[:, t] = 0.3 * y[:, t - 1] + 0.8 * x[:, t - 3] + rng.normal(size=8)
    chosen = choose_granger_lag(y, x, 4, "bic")
    for k in range(len(x)):
        bics = []
        for lag in range(1, 5):
            design = np.column_stack(
                [y[k, 4 - j : 60 - j] for j in range(1, lag + 1)] + [x[k, 4 - j : 60 - j] for j in range(1, lag + 1)]
            )
            bics.append(sm.OLS(y[k, 4:], sm.add_constant(design)).fit().bic)
        assert chosen[k] == int(np.argmin(bics)) + 1
    assert (chosen >= 3).all()  # the planted lag 3 is needed


def test_planted_direction_is_found_and_the_reverse_is_not():
    rng = np.random.default_rng(11)
    x, y = _coupled_pairs(rng, 200, 40, 0.8)
    _, _, p_forward = granger_tests(y, x, 3)
    _, _, p_reverse = granger_tests(x, y, 3)
    assert (p_forward < 0.01).mean() > 0.95
    # Under the null the test's size is near nominal (common practice: F-test of nested OLS models).
    assert (p_reverse < 0.05).mean() < 0.10


def test_kuramoto_order_is_one_for_identical_and_about_one_over_sqrt_n_for_random_phases():
    # Kuramoto (1975): r = 1 for identical phases; incoherent phases give r = O(1/sqrt(N)). For N uniform
    # phases N r^2 has mean 1 exactly (sum of N unit vectors, a random walk; Rayleigh), checked here.
    assert kuramoto_order(np.full(50, 1.3)) == pytest.approx(1.0)
    rng = np.random.default_rng(5)
    n = 400
    r = kuramoto_order(rng.uniform(0, 2 * np.pi, (n, 2000)), axis=0)
    assert np.mean(n * r**2) == pytest.approx(1.0, abs=0.07)
    # N r^2 is close to Exp(1) (a 2-D Gaussian sum, Rayleigh 1880), so the median of r sqrt(N) is sqrt(ln 2).
    assert np.median(r) * np.sqrt(n) == pytest.approx(np.sqrt(np.log(2)), rel=0.06)
    # The cell-number correction removes that floor: mean 0 for any N, 1 for identical phases.
    for cells in (5, 40):
        corrected = corrected_order_squared(rng.uniform(0, 2 * np.pi, (cells, 4000)), axis=0)
        assert abs(np.mean(corrected)) < 4 * np.std(corrected) / np.sqrt(4000)
    assert corrected_order_squared(np.full((7, 1), 0.4), axis=0)[0] == pytest.approx(1.0)


def test_hilbert_phase_of_a_cosine_is_its_argument():
    # The analytic signal of cos(w t) is exp(i w t) (common practice; checked away from the ends).
    t = np.arange(96)
    trace = 100 + 0.5 * t + 20 * np.cos(2 * np.pi * t / 12)
    phase = analytic_phases(detrend_rows(trace[None, :]))[0]
    expected = np.angle(np.exp(1j * 2 * np.pi * t / 12))
    error = np.angle(np.exp(1j * (phase - expected)))[12:-12]
    assert np.abs(error).max() < 0.1


def test_delaunay_of_a_square_lattice_keeps_lattice_edges_under_the_length_limit():
    # A square lattice's Delaunay triangulation has the 2 n (n - 1) lattice edges plus one diagonal per cell.
    n, spacing = 6, 10.0
    yy, xx = np.mgrid[0:n, 0:n] * spacing
    xy = np.column_stack([xx.ravel(), yy.ravel()]) + np.random.default_rng(0).normal(0, 0.01, (n * n, 2))
    assert len(delaunay_edges(xy, 1.2 * spacing)) == 2 * n * (n - 1)
    assert len(delaunay_edges(xy, 1.5 * spacing)) == 2 * n * (n - 1) + (n - 1) ** 2
    assert len(delaunay_edges(np.array([[0.0, 0.0], [1.0, 0.0], [2.0, 0.0]]), 1.5)) == 2  # collinear


def test_graph_distance_two_and_neighbours_kept_along_tracks():
    assert pairs_at_distance_two(np.array([[0, 1], [1, 2], [2, 3]])).tolist() == [[0, 2], [1, 3]]
    # Three tracks in a row over 4 frames: 0-1 and 1-2 neighbours throughout, 0-2 too far apart.
    frame = np.repeat(np.arange(4), 3)
    track = np.tile([10, 11, 12], 4)
    x = np.tile([0.0, 20.0, 40.0], 4)
    y = np.tile([0.0, 1.0, 0.0], 4)
    pairs = track_neighbour_pairs(frame, track, x, y, 25.0, 0.5)
    assert pairs.tolist() == [[10, 11], [11, 12]]


def test_gap_filling_and_detrending():
    filled = fill_inner_gaps(np.array([[np.nan, 1.0, np.nan, 3.0, np.nan]]))
    np.testing.assert_allclose(filled, [[np.nan, 1.0, 2.0, 3.0, np.nan]])
    line = np.array([[2.0, 4.0, np.nan, 8.0, 10.0]])
    np.testing.assert_allclose(detrend_rows(line)[0, [0, 1, 3, 4]], 0, atol=1e-12)
    traces = np.array([[1.0, 2, 3, 4, 5], [2.0, 4, 6, 8, 10], [5.0, 4, 3, 2, 1]])
    np.testing.assert_allclose(pair_correlations(traces, np.array([[0, 1], [0, 2]]), 3), [1.0, -1.0])


def test_knox_false_positive_rate_on_shuffled_events_is_within_nominal():
    # Under independence of space and time the permutation test is exact: P(p <= a) <= a (Knox 1964; Monte
    # Carlo p-values, Besag & Diggle 1977). 300 data sets of shuffled events, 199 permutations each.
    rng = np.random.default_rng(9)
    p_values = []
    for _ in range(300):
        n = 30
        x, y = rng.uniform(0, 200, n), rng.uniform(0, 200, n)
        frame = rng.integers(0, 24, n).astype(float)
        p_values.append(knox_test(x, y, frame, np.zeros(n), 30.0, 2, 199, rng)[2])
    p_values = np.array(p_values)
    # Binomial(300, 0.05): mean 15, SD 3.8; 3 SD above nominal is 26.
    assert (p_values <= 0.05).sum() <= 26
    assert (p_values <= 0.05).sum() >= 3  # not degenerate


def test_knox_detects_planted_spreading():
    rng = np.random.default_rng(4)
    seeds_x, seeds_y, seeds_t = rng.uniform(0, 200, 6), rng.uniform(0, 200, 6), rng.integers(0, 20, 6)
    x = np.concatenate([seeds_x, seeds_x + rng.normal(0, 8, 6), seeds_x + rng.normal(0, 8, 6)])
    y = np.concatenate([seeds_y, seeds_y + rng.normal(0, 8, 6), seeds_y + rng.normal(0, 8, 6)])
    t = np.concatenate([seeds_t, seeds_t + 1, seeds_t + 2]).astype(float)
    observed, expected, p = knox_test(x, y, t, np.zeros(18), 30.0, 2, 499, rng)
    assert observed > 2 * expected and p < 0.01


def test_reporter_events_are_track_ends_with_a_jump():
    frame = np.array([0, 1, 2, 3, 0, 1, 2, 3, 4, 0, 1, 2])
    track = np.array([1, 1, 1, 1, 2, 2, 2, 2, 2, 3, 3, 3])
    values = np.array([10, 11, 10, 30, 10, 10, 10, 10, 40, 10, 10, 11.0])
    border = np.zeros(12, bool)
    # track 1 ends at frame 3 with a 3x jump: event; track 2 ends at the last frame: not; track 3 no jump.
    assert reporter_events(frame, track, values, border, 4, 2.0).tolist() == [3]


def _lattice_well(coupling, rng, side=5, frames=30, spacing=20.0):
    """Static cells on a lattice whose reporter is a noisy AR(1) driven by the neighbours' previous values."""
    n = side * side
    yy, xx = np.mgrid[0:side, 0:side] * spacing
    x, y = xx.ravel().astype(float), yy.ravel().astype(float)
    near = (np.hypot(x[:, None] - x[None], y[:, None] - y[None]) < 1.2 * spacing) & ~np.eye(n, dtype=bool)
    weights = near / near.sum(1, keepdims=True)
    u = np.zeros((frames, n))
    for t in range(1, frames):
        u[t] = 0.3 * u[t - 1] + coupling * weights @ u[t - 1] + rng.normal(size=n)
    return pd.DataFrame(
        {
            "site": 1,
            "frame": np.repeat(np.arange(frames), n),
            "track": np.tile(np.arange(n), frames),
            "centroid_x_um": np.tile(x, frames),
            "centroid_y_um": np.tile(y, frames),
            "touches_border": False,
            "mean_intensity_rep": (100 + 10 * u).ravel(),
        }
    )


def test_planted_neighbour_coupling_raises_coupled_fraction_and_correlation():
    rng = np.random.default_rng(1)
    settings = CollectiveSettings.defaults(max_edge_um=25.0, min_overlap_frames=12)
    coupled = well_collective_readouts(_lattice_well(0.9, rng), ["rep"], settings, 5.0, "B02")
    independent = well_collective_readouts(_lattice_well(0.0, rng), ["rep"], settings, 5.0, "B03")
    assert coupled["n_neighbour_links"] == independent["n_neighbour_links"] == 40
    assert coupled["coupled_link_fraction_rep"] > 0.3
    assert independent["coupled_link_fraction_rep"] < 0.05
    assert coupled["neighbour_correlation_rep"] > independent["neighbour_correlation_rep"] + 0.1
    assert abs(independent["neighbour_correlation_rep"]) < 0.1


def test_collective_table_has_no_readouts_without_a_reporter_or_when_switched_off():
    from plateloom.well.chunk import collective_table
    from plateloom.well.stage import WellSettings

    cells = _lattice_well(0.5, np.random.default_rng(0))
    plain = WellSettings.of_demo(channels=("dna", "rep"), nuclei_channel="dna", reporter_channels=(), max_gap_frames=0)
    assert collective_table(cells, plain, CollectiveSettings.defaults(), "A01").columns.empty
    with_reporter = WellSettings.of_demo(
        channels=("dna", "rep"), nuclei_channel="dna", reporter_channels=("rep",), max_gap_frames=0
    )
    assert collective_table(cells, with_reporter, CollectiveSettings.defaults(enabled=False), "A01").columns.empty
    table = collective_table(cells, with_reporter, CollectiveSettings.defaults(max_edge_um=25.0), "A01")
    assert len(table) == 1 and {"phase_order_rep", "coupled_link_fraction_d2_rep", "spreading_index"} <= set(
        table.columns
    )
    # deterministic: the same inputs give the same row (permutations seeded by config seed and well)
    pd.testing.assert_frame_equal(
        table, collective_table(cells, with_reporter, CollectiveSettings.defaults(max_edge_um=25.0), "A01")
    )
