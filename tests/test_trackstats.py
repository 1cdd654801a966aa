"""Track statistics against published formulas: Brownian MSD, persistent random walk, periodogram."""

import numpy as np
import pytest

from plateloom.well.track_stats import (
    fit_persistent_walk,
    growth_rate_per_h,
    mean_squared_displacement,
    persistent_walk_msd,
    reporter_dynamics,
    track_matrix,
)


def test_msd_of_brownian_tracks_is_4_d_t():
    # Einstein 1905 (Berg 1983, Random Walks in Biology): 2-D Brownian motion has MSD(t) = 4 D t.
    rng = np.random.default_rng(11)
    d, dt, frames, tracks = 0.3, 2.0, 60, 400  # um^2/min, min
    steps = rng.normal(0, np.sqrt(2 * d * dt), (2, tracks, frames - 1))
    x, y = (np.concatenate([np.zeros((tracks, 1)), np.cumsum(s, axis=1)], axis=1) for s in steps)
    msd, pairs = mean_squared_displacement(x, y, max_lag=15)
    ensemble = (msd * pairs).sum(axis=0) / pairs.sum(axis=0)
    lags = np.arange(1, 16) * dt
    np.testing.assert_allclose(ensemble, 4 * d * lags, rtol=0.10)
    assert pairs[0, 0] == frames - 1 and pairs[0, 14] == frames - 15


def _persistent_walks(rng, tracks, frames, dt, speed, persistence, substeps=50):
    # Ornstein-Uhlenbeck velocity (the persistent random walk of Fürth 1920, Dunn 1983), integrated
    # finely and sampled every dt: its MSD is 2 S^2 P [t - P (1 - exp(-t/P))].
    h = dt / substeps
    decay = np.exp(-h / persistence)
    velocity = rng.normal(0, speed / np.sqrt(2), (tracks, 2))
    position = np.zeros((tracks, 2))
    samples = np.empty((tracks, frames, 2))
    for frame in range(frames):
        samples[:, frame] = position
        for _ in range(substeps):
            position += velocity * h
            velocity = decay * velocity + np.sqrt(1 - decay**2) * rng.normal(0, speed / np.sqrt(2), (tracks, 2))
    return samples[..., 0], samples[..., 1]


def test_persistent_walk_speed_and_persistence_are_recovered_within_20_percent():
    rng = np.random.default_rng(5)
    speed, persistence, dt = 0.5, 30.0, 5.0
    x, y = _persistent_walks(rng, tracks=60, frames=150, dt=dt, speed=speed, persistence=persistence)
    msd, pairs = mean_squared_displacement(x, y, max_lag=30)
    fitted_speed, fitted_persistence = fit_persistent_walk(msd, pairs, dt)
    assert np.isfinite(fitted_persistence).mean() > 0.8
    assert np.nanmedian(fitted_persistence) == pytest.approx(persistence, rel=0.20)
    assert np.nanmedian(fitted_speed) == pytest.approx(speed, rel=0.20)


def test_walk_fit_recovers_noise_free_curves_exactly_and_flags_pure_diffusion():
    lags = np.arange(1, 21) * 5.0
    msd = np.vstack([persistent_walk_msd(lags, 0.8, 40.0), 4 * 0.2 * lags])
    speed, persistence = fit_persistent_walk(msd, np.full(msd.shape, 10), 5.0)
    assert speed[0] == pytest.approx(0.8, rel=0.01) and persistence[0] == pytest.approx(40.0, rel=0.02)
    assert np.isnan(persistence[1])  # best fit at the grid edge: not identifiable


def test_periodogram_recovers_a_planted_period_within_one_frame_interval():
    rng = np.random.default_rng(2)
    dt, frames = 5.0, 40
    time = np.arange(frames) * dt
    for period in (35.0, 60.0, 90.0):
        traces = (
            500
            + 100 * np.sin(2 * np.pi * time / period + rng.uniform(0, 2 * np.pi, (20, 1)))
            + rng.normal(0, 10, (20, frames))
        )
        result = reporter_dynamics(traces, dt, min_frames=3)
        assert np.all(np.abs(result["period_min"] - period) <= dt), (period, result["period_min"])
        expected_peaks = (frames - 1) * dt / period * 60 / ((frames - 1) * dt)  # one peak per period, per hour
        assert np.median(result["peaks_per_h"]) == pytest.approx(expected_peaks, rel=0.35)
    assert result["mean"] == pytest.approx(np.full(20, 500.0), abs=25)
    # max rate of a sine A sin(2 pi t / T) sampled every dt is about A 2 pi / T (per min) at most
    assert np.all(result["max_rate_per_min"] < 100 * 2 * np.pi / 90.0 + 4 * 10 / dt)


def test_track_matrix_and_gaps():
    frame = np.array([0, 1, 3, 1, 2])
    track = np.array([7, 7, 7, 9, 9])
    ids, matrix = track_matrix(frame, track, np.array([1.0, 2.0, 4.0, 5.0, 6.0]))
    np.testing.assert_array_equal(ids, [7, 9])
    np.testing.assert_array_equal(matrix[0], [1.0, 2.0, np.nan, 4.0])
    result = reporter_dynamics(matrix, 1.0, min_frames=2)
    assert result["mean"][0] == pytest.approx(2.5)  # 1, 2, 3 (interpolated), 4
    assert result["mean"][1] == pytest.approx(5.5)


def test_growth_rate_of_exponential_counts():
    time = np.arange(10) * 30.0
    count = 100 * np.exp(0.05 * time / 60)
    assert growth_rate_per_h(time, count) == pytest.approx(0.05)
    assert np.isnan(growth_rate_per_h(time[:1], count[:1]))
