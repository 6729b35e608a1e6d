"""Forecast accuracy metrics, each as published, vectorised over (task, step) matrices.

Every metric is a pointwise loss over the test block followed by a reduction, so the same
definition gives the score of a task (reduced over its steps) and the score of a forecast step
(reduced over the tasks), which ``horizon.csv`` reports.

* ``me``, ``mae``, ``mse``, ``rmse``: mean error, mean absolute error, mean squared error and
  its root (Hyndman & Koehler 2006, "Another look at measures of forecast accuracy", IJF 22).
* ``mape``: 100 mean |e / y| (Hyndman & Koehler 2006); undefined at y = 0, explosive near it
  and asymmetric, so castgrid flags it as unreliable.
* ``smape``: the M4 definition, 200/h sum |e| / (|y| + |y_hat|) (Makridakis, Spiliotis &
  Assimakopoulos 2020, "The M4 Competition: 100,000 time series and 61 forecasting methods",
  IJF 36; the M4 competitor's guide).
* ``mase``: MAE scaled by the in-sample MAE of the seasonal naive method on the task's own
  training slice (Hyndman & Koehler 2006; seasonal form as in Hyndman & Athanasopoulos, FPP3
  5.8). With season 1 the scale is the naive one-step MAE.
* ``rmsse``: root of the MSE scaled by the in-sample mean squared one-step naive error of the
  training slice (the M5 competition guide, Makridakis, Spiliotis & Assimakopoulos 2022,
  "M5 accuracy competition", IJF 38).
* ``r2``: 1 - SSE/SST over the test block. Not a forecast accuracy measure (it rewards
  tracking the test block's own variation), so castgrid flags it as unreliable.
* ``coverage_L``: percent of actuals inside the central L% interval.
* ``winkler_L``: the interval score of Winkler (1972, "A decision-theoretic approach to
  interval estimation", JASA 67) in the form of Gneiting & Raftery (2007, "Strictly proper
  scoring rules, prediction, and estimation", JASA 102, eq. 43):
  (u - l) + 2/a (l - y) [y < l] + 2/a (y - u) [y > u], a = 1 - L/100.
* ``pinball_L``: the mean pinball (quantile) loss of the two interval bounds read as the
  a/2 and 1 - a/2 quantiles (Koenker & Bassett 1978).

Undefined values (a zero scale, y = 0 for mape, a constant test block for r2) are NaN, never
inf; :func:`score_tasks` reports which tasks produced them so the caller can warn.

A missing actual (NaN in ``actual``, from a dataset read with ``missing: interpolate``) is not
scored: a task's score is the reduction over its observed steps only, a step's score over the
tasks observed at that step, and a task without any observed actual has no score (NaN, not
counted as undefined).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np

from runner.config import INTERVAL_METRICS

#: Metrics the leaderboard flags as unreliable for comparing forecasts, and why.
UNRELIABLE = {
    "mape": "undefined or explosive near zero actuals and asymmetric",
    "r2": "not a forecast accuracy measure",
}


@dataclass(frozen=True)
class MetricInfo:
    """How a metric column is ordered: ``lower`` is better, ``abs`` (closest to 0) or ``target``."""

    better: str
    target: float = 0.0


def columns(metrics: list[str], levels: tuple[float, ...]) -> list[str]:
    """Metric column names: interval metrics expand to one column per level (coverage_80)."""
    out: list[str] = []
    for m in metrics:
        if m in INTERVAL_METRICS:
            out.extend(f"{m}_{level:g}" for level in levels)
        else:
            out.append(m)
    return out


def info(column: str) -> MetricInfo:
    """Ordering of a metric column."""
    base, _, level = column.partition("_")
    if base == "me":
        return MetricInfo("abs")
    if base == "r2":
        return MetricInfo("higher")
    if base == "coverage":
        return MetricInfo("target", float(level))
    return MetricInfo("lower")


#: Relative change of a leaderboard mean that ``castgrid diff`` reads as numerical noise when
#: the two runs come from different platforms (CPU, BLAS kernel): point-accuracy metrics, and
#: interval scores (winkler, pinball), whose 2/alpha penalty magnifies a small move of a bound.
#: Set from the largest differences measured on the demo between OpenBLAS kernels (README,
#: "Reproducibility": 0.64% and 3.0%, both from ETS(A,A,A), whose likelihood has several
#: optima close together), with a margin; every other demo forecaster agreed within 0.1%.
NOISE_RELATIVE = 0.01
NOISE_RELATIVE_INTERVAL = 0.05


def noise_tolerance(column: str, value: float, tasks: int, horizon: int, folds: int) -> float:
    """The largest change of a leaderboard mean of ``column`` that is cross-platform noise.

    ``value`` is the old mean; ``tasks`` / ``horizon`` / ``folds`` describe what it averages.
    Point metrics allow :data:`NOISE_RELATIVE` of the value, interval scores
    :data:`NOISE_RELATIVE_INTERVAL`. Coverage counts hits, so the smallest change it can make
    is one actual crossing an interval bound; it allows one such crossing per fold:
    ``100 * folds / (horizon * tasks)`` percentage points.
    """
    if not np.isfinite(value):
        return 0.0
    base = column.partition("_")[0]
    if base == "coverage":
        if tasks <= 0 or horizon <= 0:
            return 0.0
        return 100.0 * max(folds, 1) / (horizon * tasks)
    if base in ("winkler", "pinball"):
        return NOISE_RELATIVE_INTERVAL * abs(value)
    return NOISE_RELATIVE * abs(value)


def _safe_div(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        out = num / den
    out[~np.isfinite(out)] = np.nan
    return out


@dataclass
class Scored:
    """Scores of one metric column: per task (n,), per step (H,), and tasks that were NaN."""

    per_task: np.ndarray
    per_step: np.ndarray
    undefined: np.ndarray


def pointwise_loss(
    column: str, actual: np.ndarray, forecast: np.ndarray, mase_scale: np.ndarray,
    rmsse_scale: np.ndarray,
) -> np.ndarray | None:
    """The (n, H) pointwise loss whose mean (or root mean) is the metric; None for r2/interval."""
    e = actual - forecast
    if column == "me":
        return e
    if column == "mae":
        return np.abs(e)
    if column in ("mse", "rmse"):
        return e**2
    if column == "mape":
        return 100.0 * np.abs(_safe_div(e, actual))
    if column == "smape":
        return 200.0 * _safe_div(np.abs(e), np.abs(actual) + np.abs(forecast))
    if column == "mase":
        return _safe_div(np.abs(e), mase_scale[:, None] + 0 * e)
    if column == "rmsse":
        return _safe_div(e**2, rmsse_scale[:, None] + 0 * e)
    return None


def _interval_loss(
    base: str, level: float, actual: np.ndarray, lower: np.ndarray, upper: np.ndarray
) -> np.ndarray:
    alpha = 1.0 - level / 100.0
    if base == "coverage":
        inside = (actual >= lower) & (actual <= upper)
        out = 100.0 * inside.astype(float)
        out[np.isnan(lower) | np.isnan(upper) | np.isnan(actual)] = np.nan
        return out
    if base == "winkler":
        below = np.clip(lower - actual, 0, None)
        above = np.clip(actual - upper, 0, None)
        return (upper - lower) + (2.0 / alpha) * below + (2.0 / alpha) * above
    # pinball at the a/2 and 1 - a/2 quantiles, averaged over the two bounds
    tau_lo, tau_hi = alpha / 2.0, 1.0 - alpha / 2.0
    lo = (actual - lower) * (tau_lo - (actual < lower))
    hi = (actual - upper) * (tau_hi - (actual < upper))
    return (lo + hi) / 2.0


def _reduce(
    column: str, loss: np.ndarray, axis: int, observed: np.ndarray | None = None
) -> np.ndarray:
    # an all-NaN column (a forecaster without intervals) is simply NaN: no warning wanted
    with np.errstate(invalid="ignore", divide="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        if axis == 1:
            # a NaN at an observed step makes the task's score NaN (undefined, not skipped);
            # steps whose actual is missing are not scored
            if observed is None or observed.all():
                mean = loss.mean(axis=1)
            else:
                count = observed.sum(axis=1)
                mean = np.where(observed, loss, 0.0).sum(axis=1) / count
                mean[count == 0] = np.nan
        else:
            mean = np.nanmean(loss, axis=axis)
    if column in ("rmse", "rmsse"):
        return np.sqrt(mean)
    return mean


def scale_mase(summary_seasonal_abs: np.ndarray, length: np.ndarray, season: int) -> np.ndarray:
    """In-sample MAE of the seasonal naive method on each training slice (NaN when zero)."""
    m = max(int(season), 1)
    return _safe_div(summary_seasonal_abs, length - m)


def scale_rmsse(summary_diff_sq: np.ndarray, length: np.ndarray) -> np.ndarray:
    """In-sample mean squared one-step naive error of each training slice (NaN when zero)."""
    return _safe_div(summary_diff_sq, length - 1)


def score_tasks(
    cols: list[str],
    actual: np.ndarray,
    forecast: np.ndarray,
    lower: np.ndarray,
    upper: np.ndarray,
    levels: tuple[float, ...],
    mase_scale: np.ndarray,
    rmsse_scale: np.ndarray,
) -> dict[str, Scored]:
    """Score ``forecast`` (n, H) against ``actual`` (n, H) on every metric column.

    ``lower`` / ``upper`` are (levels, n, H); scales are per task (n,). Rows of ``forecast``
    that are NaN (failed tasks) score NaN and are not counted as undefined.
    """
    out: dict[str, Scored] = {}
    failed = np.isnan(forecast).any(axis=1)
    ok = ~failed
    observed = ~np.isnan(actual)
    scored = observed.any(axis=1)  # a task whose actuals are all missing has no score
    for col in cols:
        base, _, lv = col.partition("_")
        if base in INTERVAL_METRICS:
            i = levels.index(float(lv))
            loss = _interval_loss(base, float(lv), actual, lower[i], upper[i])
        elif col == "r2":
            with np.errstate(invalid="ignore", divide="ignore"):
                a = np.where(observed, actual, 0.0)
                sse = np.where(observed, (actual - forecast) ** 2, 0.0).sum(axis=1)
                mean = a.sum(axis=1) / observed.sum(axis=1)
                sst = np.where(observed, (a - mean[:, None]) ** 2, 0.0).sum(axis=1)
            per_task = 1.0 - _safe_div(sse, sst)
            per_task[failed | ~scored] = np.nan
            undefined = ok & scored & np.isnan(per_task)
            out[col] = Scored(per_task, np.full(actual.shape[1], np.nan), undefined)
            continue
        else:
            loss = pointwise_loss(col, actual, forecast, mase_scale, rmsse_scale)
        per_task = _reduce(col, loss, axis=1, observed=observed)
        per_task[failed] = np.nan
        undefined = ok & scored & np.isnan(per_task)
        if base in INTERVAL_METRICS:
            # a forecaster without intervals has NaN bounds everywhere: not "undefined"
            undefined &= ~np.isnan(lower[i]).all(axis=1)
        per_step = _reduce(col, loss[ok], axis=0) if ok.any() else np.full(loss.shape[1], np.nan)
        out[col] = Scored(per_task, per_step, undefined)
    return out
