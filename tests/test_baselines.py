"""Benchmark forecasters (runner.forecasters.benchmarks) against the published formulas.

Source for point forecasts and interval widths: Hyndman & Athanasopoulos, Forecasting:
Principles and Practice (3rd ed.), sections 5.2 and 5.5 (the table of benchmark forecast
standard deviations; quoted from memory, and checked here by direct computation).
"""

from __future__ import annotations

from statistics import NormalDist

import numpy as np
import pytest

from runner.forecasters.benchmarks import (
    Drift,
    Mean,
    MovingAverage,
    Naive,
    SeasonalNaive,
    SeasonAverage,
)

Z95 = NormalDist().inv_cdf(0.975)


def _one(model, y, h, season=1, levels=()):
    b = model.forecast_many(y, np.array([0]), np.array([len(y)]), h, season=season,
                            levels=levels)
    return b.point[0], b.lower[:, 0], b.upper[:, 0]


@pytest.fixture
def y():
    return np.random.default_rng(3).normal(50, 5, size=37).cumsum()


def test_point_forecasts_follow_the_textbook_definitions(y):
    h, m, T = 9, 4, len(y)
    assert _one(Naive(), y, h)[0] == pytest.approx(np.repeat(y[-1], h))
    assert _one(Mean(), y, h)[0] == pytest.approx(np.repeat(y.mean(), h))
    steps = np.arange(1, h + 1)
    assert _one(Drift(), y, h)[0] == pytest.approx(y[-1] + steps * (y[-1] - y[0]) / (T - 1))
    # seasonal naive: y_{T+h-m(k+1)}, k = floor((h-1)/m)
    k = (steps - 1) // m
    expected = y[T - 1 + steps - m * (k + 1)]
    assert _one(SeasonalNaive(), y, h, season=m)[0] == pytest.approx(expected)
    assert _one(SeasonAverage(), y, h, season=m)[0] == pytest.approx(np.repeat(y[-m:].mean(), h))
    assert _one(MovingAverage(5, "median"), y, h)[0] == pytest.approx(
        np.repeat(np.median(y[-5:]), h))


def test_moving_average_mode_picks_most_frequent_smallest_on_ties():
    y = np.array([9.0, 1.0, 2.0, 2.0, 3.0, 3.0])
    assert _one(MovingAverage(4, "mode"), y, 2)[0] == pytest.approx([2.0, 2.0])
    assert _one(MovingAverage(3, "mode"), np.array([5.0, 7.0, 7.0]), 1)[0] == pytest.approx([7.0])


def test_interval_widths_match_published_formulas(y):
    h, m, T = 10, 4, len(y)
    steps = np.arange(1, h + 1)
    d = np.diff(y)
    # naive: sigma sqrt(h), sigma from the T-1 one-step residuals
    sigma = np.sqrt(np.sum(d**2) / (T - 1))
    p, lo, hi = _one(Naive(), y, h, levels=(95.0,))
    assert (hi[0] - p) == pytest.approx(Z95 * sigma * np.sqrt(steps))
    # mean: sigma sqrt(1 + 1/T), sigma from residuals about the mean with K = 1
    sigma = np.sqrt(np.sum((y - y.mean()) ** 2) / (T - 1))
    p, lo, hi = _one(Mean(), y, h, levels=(95.0,))
    assert (p - lo[0]) == pytest.approx(np.repeat(Z95 * sigma * np.sqrt(1 + 1 / T), h))
    # seasonal naive: sigma sqrt(k + 1), sigma from the T-m seasonal residuals
    ds = y[m:] - y[:-m]
    sigma = np.sqrt(np.sum(ds**2) / (T - m))
    p, lo, hi = _one(SeasonalNaive(), y, h, season=m, levels=(95.0,))
    assert (hi[0] - p) == pytest.approx(Z95 * sigma * np.sqrt((steps - 1) // m + 1))
    # drift: sigma sqrt(h (1 + h/(T-1))), residuals d - mean(d), K = 1 and M = 1
    sigma = np.sqrt(np.sum((d - d.mean()) ** 2) / (T - 2))
    p, lo, hi = _one(Drift(), y, h, levels=(95.0,))
    assert (hi[0] - p) == pytest.approx(Z95 * sigma * np.sqrt(steps * (1 + steps / (T - 1))))


def test_moving_average_intervals_use_their_own_one_step_errors(y):
    # Constant-level model (module docstring of runner.forecasters.benchmarks): the forecast
    # error has the same distribution at every step, estimated by the root mean square of the
    # method's in-sample one-step errors over the T - k positions with k values before them.
    h, T = 7, len(y)
    for model, k, stat in [
        (MovingAverage(4, "mean"), 4, np.mean),
        (MovingAverage(5, "median"), 5, np.median),
        (SeasonAverage(), 6, np.mean),
    ]:
        errors = [y[t] - stat(y[t - k:t]) for t in range(k, T)]
        sigma = np.sqrt(np.mean(np.square(errors)))
        p, lo, hi = _one(model, y, h, season=6, levels=(95.0,))
        assert (hi[0] - p) == pytest.approx(np.repeat(Z95 * sigma, h)), model
        assert (p - lo[0]) == pytest.approx(np.repeat(Z95 * sigma, h)), model
    # the moving mode (count data) gives no interval
    p, lo, hi = _one(MovingAverage(4, "mode"), np.round(y), h, levels=(95.0,))
    assert np.isnan(lo).all() and np.isnan(hi).all()
    # a slice with no in-sample error (length <= k) has no interval either
    p, lo, hi = _one(MovingAverage(4, "mean"), y[:4], h, levels=(95.0,))
    assert np.isfinite(p).all() and np.isnan(lo).all()


def test_naive_95_intervals_cover_gaussian_random_walks():
    # Common practice: for a Gaussian random walk the naive method is the optimal forecast and
    # its normal intervals are correct, so coverage must be 95% within sampling error.
    rng = np.random.default_rng(7)
    n_series, T, h = 4000, 60, 6
    walks = rng.normal(size=(n_series, T + h)).cumsum(axis=1)
    values = walks.ravel()
    starts = np.arange(n_series) * (T + h)
    ends = starts + T
    b = Naive().forecast_many(values, starts, ends, h, season=1, levels=(95.0,))
    actual = values[ends[:, None] + np.arange(h)[None, :]]
    inside = (actual >= b.lower[0]) & (actual <= b.upper[0])
    coverage = inside.mean()
    se = np.sqrt(0.95 * 0.05 / inside.size)
    # slightly conservative bound: sigma is estimated, and steps within a walk are correlated
    assert abs(coverage - 0.95) < 6 * se


def test_vectorised_equals_one_at_a_time(y):
    values = np.concatenate([y, y[::-1] * 2.0])
    starts = np.array([0, 5, 37, 40])
    ends = np.array([20, 37, 60, 74])
    for model, season in [(Naive(), 1), (SeasonalNaive(), 4), (Drift(), 1), (Mean(), 1),
                          (SeasonAverage(), 4), (MovingAverage(3, "mean"), 1)]:
        batch = model.forecast_many(values, starts, ends, 5, season=season, levels=(80.0,))
        for i in range(len(starts)):
            single = _one(model, values[starts[i]:ends[i]], 5, season, (80.0,))
            np.testing.assert_allclose(batch.point[i], single[0])
            np.testing.assert_allclose(batch.lower[0, i], single[1][0], equal_nan=True)


def test_too_short_slices_are_marked_not_forecast():
    b = SeasonalNaive().forecast_many(np.arange(10.0), np.array([0, 0]), np.array([3, 10]), 2,
                                      season=4)
    assert list(b.ok) == [False, True]
    assert np.isnan(b.point[0]).all()
    with pytest.raises(ValueError, match="needs at least 4"):
        SeasonalNaive().fit(np.arange(3.0), season=4)


def test_bad_moving_average_params():
    with pytest.raises(ValueError, match="size"):
        MovingAverage(size=0)
    with pytest.raises(ValueError, match="stat"):
        MovingAverage(stat="max")
