"""Interval coverage of every built-in forecaster on series simulated from its own model.

Shared by ``tests/test_coverage.py`` (CI-sized and ``slow`` checks) and
``tests/perf/coverage_table.py`` (the table printed for a release note). It uses only the
forecasters' public entry points (``forecast_many`` for the vectorised benchmarks, ``fit`` /
``predict`` for the models), so the same code measures any version of castgrid.

Each case names the model the method is optimal for (common practice: a method's prediction
interval is derived from that model, e.g. Hyndman & Athanasopoulos, FPP3 sections 5.5, 8.7,
9.8): a Gaussian random walk for naive, a random walk with drift for drift, iid values for
mean and the moving averages, a seasonal random walk for seasonal naive, an ARMA process for
the ARIMA models, ETS(A,N,N) and ETS(A,N,A) processes for ets (Hyndman, Koehler, Ord & Snyder
2008, ch. 2) and simple exponential smoothing (no drift; the theta method's drift estimate is
half the trend slope, Hyndman & Billah 2003, so a drifting process would bias its points) with
and without a multiplicative season for theta. Every series is simulated with unit innovation
variance, fitted on its first ``train`` values and forecast ``horizon`` steps; coverage is the
share of the ``horizon`` future values inside the interval, pooled over series and steps.

Sampling error: the steps of one series are correlated, but the mean of ``horizon`` indicators
with coverage p has variance at most p (1 - p), so ``sqrt(p (1 - p) / series)`` bounds the
standard error of the pooled coverage from above (:func:`standard_error`); the series are
independent, so the standard deviation of the per-series coverage over sqrt(series) estimates
it directly (:meth:`Measured.cluster_error`, the usual cluster-robust estimate).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.signal import lfilter

LEVELS = (80.0, 95.0)


# ---------------------------------------------------------------- the simulated processes


def random_walk(rng: np.random.Generator, n: int, length: int, drift: float = 0.0) -> np.ndarray:
    """``n`` Gaussian random walks y_t = y_{t-1} + drift + e_t, e_t ~ N(0, 1), from 10."""
    return 10.0 + np.cumsum(drift + rng.standard_normal((n, length)), axis=1)


def iid(rng: np.random.Generator, n: int, length: int) -> np.ndarray:
    """``n`` series of independent N(10, 1) values."""
    return 10.0 + rng.standard_normal((n, length))


def seasonal_random_walk(rng: np.random.Generator, n: int, length: int, m: int) -> np.ndarray:
    """y_t = y_{t-m} + e_t: ``m`` interleaved random walks, the first season N(10, 3^2)."""
    cycles = -(-length // m)
    start = 10.0 + 3.0 * rng.standard_normal((n, 1, m))
    walk = start + np.cumsum(rng.standard_normal((n, cycles, m)), axis=1)
    return walk.reshape(n, cycles * m)[:, :length]


def arma(
    rng: np.random.Generator, n: int, length: int, ar: float, ma: float, mean: float = 0.0,
    integrate: bool = False, burn: int = 200,
) -> np.ndarray:
    """ARMA(1,1) (1 - ar B) x_t = (1 + ma B) e_t around ``mean``, or its integral."""
    e = rng.standard_normal((n, length + burn))
    x = lfilter([1.0, ma], [1.0, -ar], e, axis=1)[:, burn:]
    if integrate:
        return 10.0 + np.cumsum(x, axis=1)
    return mean + x


def ets_ana(
    rng: np.random.Generator, n: int, length: int, alpha: float, gamma: float, m: int
) -> np.ndarray:
    """ETS(A,N,A) in the state-space form of Hyndman et al. (2008): y_t = l_{t-1} + s_{t-m} +
    e_t, l_t = l_{t-1} + alpha e_t, s_t = s_{t-m} + gamma e_t; ``m = 1`` gives ETS(A,N,N)."""
    e = rng.standard_normal((n, length))
    past = np.cumsum(e, axis=1) - e  # sum of the errors before t
    y = 10.0 + alpha * past + e
    if m > 1:
        cycles = -(-length // m)
        ep = np.zeros((n, cycles * m))
        ep[:, :length] = e
        by_season = ep.reshape(n, cycles, m)
        seasonal_past = (np.cumsum(by_season, axis=1) - by_season).reshape(n, cycles * m)
        pattern = 3.0 * np.sin(2.0 * np.pi * (np.arange(m) + 0.5) / m)
        pattern -= pattern.mean()
        y += (np.tile(pattern, cycles) + gamma * seasonal_past)[:, :length]
    return y


def ses_with_drift(
    rng: np.random.Generator, n: int, length: int, alpha: float, drift: float = 0.0,
    m: int = 1, amplitude: float = 0.0, level: float = 100.0,
) -> np.ndarray:
    """Simple exponential smoothing with drift (Hyndman & Billah 2003): y_t = l_{t-1} + b + e_t,
    l_t = l_{t-1} + b + alpha e_t; multiplied by seasonal factors 1 + amplitude sin(...) when
    ``m > 1`` (the theta method's model for a deseasonalised series, reseasonalised)."""
    e = rng.standard_normal((n, length))
    t = np.arange(length)
    y = level + drift * (t + 1) + alpha * (np.cumsum(e, axis=1) - e) + e
    if m > 1:
        y *= 1.0 + amplitude * np.sin(2.0 * np.pi * (t % m + 0.5) / m)
    return y


# ---------------------------------------------------------------- one case, measured


@dataclass
class Case:
    """A forecaster, the process it is checked on, and the sizes of a check."""

    name: str
    kind: str
    params: dict[str, Any]
    simulate: Callable[[np.random.Generator, int, int], np.ndarray]
    season: int
    train: int
    horizon: int
    series: dict[str, int] = field(default_factory=dict)  # size name -> number of series
    process: str = ""


@dataclass
class Measured:
    """Pooled coverage (percent) at each level, how many series, and sampling errors."""

    coverage: dict[float, float]
    series: int
    failed: int
    per_series: dict[float, np.ndarray] = field(default_factory=dict)

    def standard_error(self, level: float) -> float:
        """Upper bound of the standard error of the pooled coverage at ``level`` (points)."""
        return standard_error(level, self.series)

    def cluster_error(self, level: float) -> float:
        """Estimated standard error of the pooled coverage at ``level`` (points): the standard
        deviation of the per-series coverage over sqrt(series); NaN without intervals."""
        cov = self.per_series.get(level)
        if cov is None or cov.shape[0] < 2:
            return math.nan
        return 100.0 * float(np.std(cov, ddof=1)) / math.sqrt(cov.shape[0])


def standard_error(level: float, series: int) -> float:
    """``100 sqrt(p (1 - p) / series)`` with p the nominal level: an upper bound of the standard
    error of coverage pooled over the correlated steps of ``series`` independent series."""
    p = level / 100.0
    return 100.0 * math.sqrt(p * (1.0 - p) / max(series, 1))


def build(case: Case) -> Any:
    """A fresh forecaster of ``case`` (benchmarks and models by their classes)."""
    from runner.forecasters import benchmarks
    from runner.forecasters.models.arima import Arima
    from runner.forecasters.models.arima_search import ArimaSearch
    from runner.forecasters.models.ets import ETS
    from runner.forecasters.models.theta import Theta

    classes = {
        "naive": benchmarks.Naive,
        "moving_average": benchmarks.MovingAverage,
        "seasonal_naive": benchmarks.SeasonalNaive,
        "season_average": benchmarks.SeasonAverage,
        "drift": benchmarks.Drift,
        "mean": benchmarks.Mean,
        "arima": Arima,
        "ets": ETS,
        "theta": Theta,
        "arima_search": ArimaSearch,
    }
    return classes[case.kind](**case.params)


def measure(
    case: Case, series: int, seed: int = 0, factory: Callable[[], Any] | None = None
) -> Measured:
    """Simulate ``series`` series of ``case``'s process and pool the interval coverage.

    ``factory`` builds the forecaster instead of ``case``'s kind (to measure another one on the
    same series).
    """
    rng = np.random.default_rng(seed)
    y = case.simulate(rng, series, case.train + case.horizon)
    train, h = case.train, case.horizon
    make = factory if factory is not None else (lambda: build(case))
    model = make()
    actual = y[:, train:]
    lower = np.full((len(LEVELS), series, h), np.nan)
    upper = lower.copy()
    failed = 0
    if getattr(model, "vectorised", False):
        flat = y.ravel()
        starts = np.arange(series) * y.shape[1]
        b = model.forecast_many(
            flat, starts, starts + train, h, season=case.season, levels=LEVELS
        )
        lower, upper = b.lower, b.upper
    else:
        for i in range(series):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                try:
                    fc = make().fit(y[i, :train], season=case.season).predict(
                        h, levels=LEVELS
                    )
                except Exception:  # a failed fit is counted, not hidden
                    failed += 1
                    continue
            for j, level in enumerate(LEVELS):
                if hasattr(fc, "lower") and level in fc.lower:
                    lower[j, i] = fc.lower[level]
                    upper[j, i] = fc.upper[level]
    coverage, per_series = {}, {}
    for j, level in enumerate(LEVELS):
        ok = np.isfinite(lower[j]).all(axis=1)
        if not ok.any():
            coverage[level] = math.nan
            continue
        inside = (actual[ok] >= lower[j][ok]) & (actual[ok] <= upper[j][ok])
        coverage[level] = 100.0 * float(inside.mean())
        per_series[level] = inside.mean(axis=1)
    return Measured(coverage, series - failed, failed, per_series)


# ---------------------------------------------------------------- every built-in

CASES: list[Case] = [
    Case("naive", "naive", {}, lambda r, n, t: random_walk(r, n, t), 1, 100, 12,
         {"ci": 20000, "slow": 200000, "table": 100000}, "random walk"),
    Case("drift", "drift", {}, lambda r, n, t: random_walk(r, n, t, drift=0.5), 1, 100, 12,
         {"ci": 20000, "slow": 200000, "table": 100000}, "random walk with drift 0.5"),
    Case("mean", "mean", {}, iid, 1, 100, 12,
         {"ci": 20000, "slow": 200000, "table": 100000}, "iid N(10, 1)"),
    Case("seasonal_naive", "seasonal_naive", {},
         lambda r, n, t: seasonal_random_walk(r, n, t, 12), 12, 120, 24,
         {"ci": 20000, "slow": 200000, "table": 100000}, "seasonal random walk, m = 12"),
    Case("moving_average", "moving_average", {"size": 6, "stat": "mean"}, iid, 1, 100, 12,
         {"ci": 20000, "slow": 200000, "table": 100000}, "iid N(10, 1), size 6"),
    Case("moving_average_median", "moving_average", {"size": 5, "stat": "median"}, iid, 1,
         100, 12, {"ci": 20000, "slow": 200000, "table": 100000}, "iid N(10, 1), size 5"),
    Case("season_average", "season_average", {}, iid, 12, 120, 24,
         {"ci": 20000, "slow": 200000, "table": 100000}, "iid N(10, 1), m = 12"),
    Case("arima", "arima", {"order": [1, 1, 1]},
         lambda r, n, t: arma(r, n, t, ar=0.5, ma=0.3, integrate=True), 1, 200, 12,
         {"ci": 24, "slow": 1000, "table": 300}, "ARIMA(1,1,1), ar 0.5, ma 0.3"),
    Case("arima_search", "arima_search", {"seasonal": False, "p_up_to": 2, "q_up_to": 2},
         lambda r, n, t: arma(r, n, t, ar=0.6, ma=0.3, mean=5.0), 1, 200, 12,
         {"slow": 300, "table": 100}, "ARMA(1,1) + mean, ar 0.6, ma 0.3"),
    Case("arima_search_small", "arima_search", {"seasonal": False, "p_up_to": 1, "q_up_to": 1},
         lambda r, n, t: arma(r, n, t, ar=0.6, ma=0.3, mean=5.0), 1, 100, 12,
         {"ci": 6}, "same, orders up to 1, 100 observations"),
    Case("ets_ANN", "ets", {}, lambda r, n, t: ets_ana(r, n, t, 0.3, 0.0, 1), 1, 200, 12,
         {"ci": 60, "slow": 2000, "table": 600}, "ETS(A,N,N), alpha 0.3"),
    Case("ets_ANA_m4", "ets", {"seasonal": "add"},
         lambda r, n, t: ets_ana(r, n, t, 0.3, 0.1, 4), 4, 120, 8,
         {"ci": 16, "slow": 800, "table": 300}, "ETS(A,N,A), alpha 0.3, gamma 0.1, m = 4"),
    Case("ets_ANA_m12", "ets", {"seasonal": "add"},
         lambda r, n, t: ets_ana(r, n, t, 0.3, 0.1, 12), 12, 300, 12,
         {"slow": 400, "table": 200}, "ETS(A,N,A), alpha 0.3, gamma 0.1, m = 12"),
    Case("ets_ANA_m12_short", "ets", {"seasonal": "add"},
         lambda r, n, t: ets_ana(r, n, t, 0.3, 0.1, 12), 12, 100, 12,
         {"table": 200}, "same, 100 observations"),
    Case("theta", "theta", {}, lambda r, n, t: ses_with_drift(r, n, t, 0.5), 1, 200, 12,
         {"ci": 80, "slow": 2000, "table": 400}, "SES, alpha 0.5"),
    Case("theta_seasonal", "theta", {},
         lambda r, n, t: ses_with_drift(r, n, t, 0.5, m=12, amplitude=0.1), 12, 200, 12,
         {"ci": 60, "slow": 2000, "table": 400},
         "SES, alpha 0.5, times a 10% season, m = 12"),
]

#: Cases with no interval in a given castgrid version show as NaN coverage.
BY_NAME = {c.name: c for c in CASES}
