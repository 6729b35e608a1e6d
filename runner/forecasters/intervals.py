"""Normal prediction intervals and the one residual-variance convention of every built-in.

Every built-in forecaster, benchmark or model, estimates its innovation variance as

    sigma^2 = (sum of squared one-step residuals) / (T - K)

with T the number of residuals the method produces on its training slice and K the number of
parameters it estimated from that slice (smoothing weights, coefficients, constants, drifts,
initial states, seasonal indices; never the variance itself). It is the convention of
Hyndman & Athanasopoulos, *Forecasting: Principles and Practice* (FPP3, 2021, section 5.5)
for the benchmarks, and the one behind that book's ETS and ARIMA outputs, so that castgrid's
intervals can be checked against its tables (e.g. FPP2 section 7.1, ``ses(oildata)``).
Models that statsmodels fits by maximum likelihood report sigma^2 over T; they are rescaled
here by ``T / (T - K)`` (:func:`dof_factor`). When ``T - K <= 0`` the variance cannot be
estimated and the forecaster gives no interval. The full table of forecast standard
deviations is in :mod:`runner.forecasters.benchmarks`.
"""

from __future__ import annotations

from statistics import NormalDist

import numpy as np


def z_values(levels: tuple[float, ...]) -> np.ndarray:
    """Standard normal quantiles of central intervals at ``levels`` percent (80 -> 1.2816)."""
    return np.array([NormalDist().inv_cdf(0.5 + lv / 200.0) for lv in levels])


def dof_factor(residuals: int, params: int) -> float:
    """``T / (T - K)``: turns a maximum-likelihood variance (over T) into castgrid's (over T - K).

    NaN when ``T - K <= 0`` (no degree of freedom left to estimate the variance).

    >>> dof_factor(18, 2)
    1.125
    """
    dof = int(residuals) - int(params)
    if dof <= 0:
        return float("nan")
    return float(residuals) / dof


def normal_bounds(
    point: np.ndarray, sd: np.ndarray, levels: tuple[float, ...]
) -> dict[float, np.ndarray]:
    """``point -+ z sd`` per level, as ``level -> (h, 2)`` arrays; empty when ``sd`` is not finite.

    >>> b = normal_bounds(np.array([10.0]), np.array([1.0]), (95.0,))
    >>> np.round(b[95.0], 2).tolist()
    [[8.04, 11.96]]
    """
    point = np.asarray(point, dtype=float)
    sd = np.asarray(sd, dtype=float)
    if not np.all(np.isfinite(sd)):
        return {}
    return {
        lv: np.column_stack([point - z * sd, point + z * sd])
        for lv, z in zip(levels, z_values(levels), strict=True)
    }
