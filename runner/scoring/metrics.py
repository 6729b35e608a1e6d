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

Each metric is one entry of :data:`METRICS` (name, pointwise loss or per-task score,
reduction, direction, flags); config checks, scoring, the leaderboard, diff and the report all
read that table, so adding a metric is one entry plus its test.

Undefined values (a zero scale, y = 0 for mape, a constant test block for r2) are NaN, never
inf; :func:`score_tasks` reports which tasks produced them so the caller can warn.

A missing actual (NaN in ``actual``, from a dataset read with ``missing: interpolate``) is not
scored: a task's score is the reduction over its observed steps only, a step's score over the
tasks observed at that step, and a task without any observed actual has no score (NaN, not
counted as undefined).
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class LossInput:
    """What a pointwise loss may look at: (n, H) matrices and per-task (n,) scales.

    ``lower`` / ``upper`` are the bounds of one interval level (``level`` percent) for interval
    metrics, else None.
    """

    actual: np.ndarray
    forecast: np.ndarray
    mase_scale: np.ndarray
    rmsse_scale: np.ndarray
    lower: np.ndarray | None = None
    upper: np.ndarray | None = None
    level: float = float("nan")


@dataclass(frozen=True)
class Metric:
    """One metric: how it is computed, pooled and read.

    ``loss`` gives the (n, H) pointwise loss; ``reduction`` turns it into a score: ``mean``, or
    ``root_mean`` (the root of the mean, for RMSE-like metrics). A metric that is no mean of a
    pointwise loss gives ``task_score`` instead (one value per task, none per step). ``better``
    says how scores are ordered: ``lower``, ``higher``, ``abs`` (closest to zero) or ``target``
    (closest to the interval level, for coverage). ``unreliable`` says why a metric is flagged
    as unfit to compare forecasts (None when it is fine); ``per_level`` metrics need interval
    levels and give one column per level (``coverage_80``); ``default`` metrics are scored when
    the config lists none; ``can_rank`` says whether a leaderboard may be ordered by it.
    """

    name: str
    summary: str
    better: str
    loss: Callable[[LossInput], np.ndarray] | None = None
    task_score: Callable[[np.ndarray, np.ndarray], np.ndarray] | None = None
    reduction: str = "mean"
    unreliable: str | None = None
    per_level: bool = False
    default: bool = False
    can_rank: bool = True


#: Relative change of a leaderboard mean that ``castgrid diff`` reads as numerical noise when
#: the two runs come from different platforms (CPU, BLAS kernel): point-accuracy metrics, and
#: interval scores (winkler, pinball), whose 2/alpha penalty magnifies a small move of a bound.
#: Set from the largest differences measured on the demo under five OpenBLAS kernels
#: (SkylakeX, Haswell, Sandybridge, Prescott, Nehalem; README, "Reproducibility"): the
#: benchmarks and theta are identical, ETS(A,N,A) and the seasonal ARIMA move by at most
#: 0.07%, ETS(A,A,A) by up to 1.35% (mae, mase) and 3.0% (winkler), because its fits end in
#: different local optima of the likelihood on different kernels. On one platform a rerun
#: gives the same bits and ``diff`` compares exactly.
NOISE_RELATIVE = 0.02
NOISE_RELATIVE_INTERVAL = 0.05
#: Coverage's cross-platform noise floor, in percentage points: bounds that move within
#: :data:`NOISE_RELATIVE_INTERVAL` let a few actuals cross them (0.69 points measured on the
#: demo, ETS(A,A,A) under the Nehalem kernel, where one crossing per fold was 0.40).
NOISE_COVERAGE_POINTS = 1.0


def noise_tolerance(column: str, value: float, tasks: int, horizon: int, folds: int) -> float:
    """The largest change of a leaderboard mean of ``column`` that is cross-platform noise.

    ``value`` is the old mean; ``tasks`` / ``horizon`` / ``folds`` describe what it averages.
    Point metrics allow :data:`NOISE_RELATIVE` of the value, interval scores
    :data:`NOISE_RELATIVE_INTERVAL`. Coverage counts hits, so the smallest change it can make
    is one actual crossing an interval bound; it allows one such crossing per fold,
    ``100 * folds / (horizon * tasks)`` percentage points, and at least
    :data:`NOISE_COVERAGE_POINTS`.
    """
    if not np.isfinite(value):
        return 0.0
    base = column.partition("_")[0]
    if base == "coverage":
        if tasks <= 0 or horizon <= 0:
            return 0.0
        return max(100.0 * max(folds, 1) / (horizon * tasks), NOISE_COVERAGE_POINTS)
    if base in ("winkler", "pinball"):
        return NOISE_RELATIVE_INTERVAL * abs(value)
    return NOISE_RELATIVE * abs(value)


def _safe_div(num: np.ndarray, den: np.ndarray) -> np.ndarray:
    with np.errstate(divide="ignore", invalid="ignore"):
        out = num / den
    out[~np.isfinite(out)] = np.nan
    return out


def _error(x: LossInput) -> np.ndarray:
    return x.actual - x.forecast


def _coverage(x: LossInput) -> np.ndarray:
    inside = (x.actual >= x.lower) & (x.actual <= x.upper)
    out = 100.0 * inside.astype(float)
    out[np.isnan(x.lower) | np.isnan(x.upper) | np.isnan(x.actual)] = np.nan
    return out


def _winkler(x: LossInput) -> np.ndarray:
    alpha = 1.0 - x.level / 100.0
    below = np.clip(x.lower - x.actual, 0, None)
    above = np.clip(x.actual - x.upper, 0, None)
    return (x.upper - x.lower) + (2.0 / alpha) * below + (2.0 / alpha) * above


def _pinball(x: LossInput) -> np.ndarray:
    # the two bounds read as the a/2 and 1 - a/2 quantiles, their losses averaged
    alpha = 1.0 - x.level / 100.0
    tau_lo, tau_hi = alpha / 2.0, 1.0 - alpha / 2.0
    lo = (x.actual - x.lower) * (tau_lo - (x.actual < x.lower))
    hi = (x.actual - x.upper) * (tau_hi - (x.actual < x.upper))
    return (lo + hi) / 2.0


def _r2(actual: np.ndarray, forecast: np.ndarray) -> np.ndarray:
    # over the observed steps only: a missing actual is not scored
    observed = ~np.isnan(actual)
    with np.errstate(invalid="ignore", divide="ignore"):
        a = np.where(observed, actual, 0.0)
        sse = np.where(observed, (actual - forecast) ** 2, 0.0).sum(axis=1)
        mean = a.sum(axis=1) / observed.sum(axis=1)
        sst = np.where(observed, (a - mean[:, None]) ** 2, 0.0).sum(axis=1)
    out = 1.0 - _safe_div(sse, sst)
    out[~observed.any(axis=1)] = np.nan
    return out


#: Every metric castgrid knows, in the order the documentation lists them.
METRICS: tuple[Metric, ...] = (
    Metric("me", "mean error (bias)", "abs", loss=_error),
    Metric("mae", "mean absolute error", "lower", loss=lambda x: np.abs(_error(x)), default=True),
    Metric("mse", "mean squared error", "lower", loss=lambda x: _error(x) ** 2),
    Metric("rmse", "root mean squared error", "lower", loss=lambda x: _error(x) ** 2,
           reduction="root_mean", default=True),
    Metric("mape", "mean absolute percentage error", "lower",
           loss=lambda x: 100.0 * np.abs(_safe_div(_error(x), x.actual)),
           unreliable="undefined or explosive near zero actuals and asymmetric"),
    Metric("mase", "mean absolute scaled error", "lower",
           loss=lambda x: _safe_div(np.abs(_error(x)), x.mase_scale[:, None] + 0 * x.actual),
           default=True),
    Metric("rmsse", "root mean squared scaled error", "lower",
           loss=lambda x: _safe_div(_error(x) ** 2, x.rmsse_scale[:, None] + 0 * x.actual),
           reduction="root_mean", default=True),
    Metric("smape", "symmetric MAPE (M4 definition)", "lower",
           loss=lambda x: 200.0 * _safe_div(np.abs(_error(x)), np.abs(x.actual)
                                            + np.abs(x.forecast)),
           default=True),
    Metric("r2", "coefficient of determination over the test block", "higher", task_score=_r2,
           unreliable="not a forecast accuracy measure", can_rank=False),
    Metric("coverage", "percent of actuals inside the interval", "target", loss=_coverage,
           per_level=True, can_rank=False),
    Metric("winkler", "interval score", "lower", loss=_winkler, per_level=True, can_rank=False),
    Metric("pinball", "pinball loss of the interval bounds", "lower", loss=_pinball,
           per_level=True, can_rank=False),
)
BY_NAME: dict[str, Metric] = {m.name: m for m in METRICS}
#: Metrics scored when the config lists none.
DEFAULT_METRICS: tuple[str, ...] = tuple(m.name for m in METRICS if m.default)
#: Metrics the leaderboard flags as unreliable for comparing forecasts, and why.
UNRELIABLE: dict[str, str] = {m.name: m.unreliable for m in METRICS if m.unreliable}
#: The mark beside a flagged metric in every table a person reads.
FLAG = "†"


def flag_note(column: str) -> str | None:
    """The footnote of a metric column flagged in :data:`UNRELIABLE` (None when not flagged).

    >>> flag_note("r2")
    '† r2: unreliable for comparing forecasts (not a forecast accuracy measure).'
    >>> flag_note("mae") is None
    True
    """
    base = column.partition("_")[0]
    why = UNRELIABLE.get(base)
    return None if why is None else f"{FLAG} {base}: unreliable for comparing forecasts ({why})."


@dataclass(frozen=True)
class MetricInfo:
    """How a metric column is ordered: ``lower`` / ``higher`` is better, ``abs`` (closest to 0)
    or ``target`` (closest to ``target``)."""

    better: str
    target: float = 0.0


def metric_of(column: str) -> Metric:
    """The table entry behind a metric column (``coverage_80`` -> coverage)."""
    base = column.partition("_")[0]
    return BY_NAME[base]


def columns(metrics: list[str], levels: tuple[float, ...]) -> list[str]:
    """Metric column names: per-level metrics expand to one column per level (coverage_80)."""
    out: list[str] = []
    for name in metrics:
        if BY_NAME[name].per_level:
            out.extend(f"{name}_{level:g}" for level in levels)
        else:
            out.append(name)
    return out


def info(column: str) -> MetricInfo:
    """Ordering of a metric column."""
    m = metric_of(column)
    if m.better == "target":
        return MetricInfo("target", float(column.partition("_")[2]))
    return MetricInfo(m.better)


@dataclass
class Scored:
    """Scores of one metric column: per task (n,), per step (H,), and tasks that were NaN.

    ``step_sum`` / ``step_count`` (H,) are the sum and the number of the pointwise losses
    behind ``per_step`` (NaN left out), counted from where :func:`score_tasks` was told to
    start: scored chunk by chunk, each chunk carrying on from the previous one, the last
    chunk's are the whole run's (:func:`per_step_from`).
    """

    per_task: np.ndarray
    per_step: np.ndarray
    undefined: np.ndarray
    step_sum: np.ndarray | None = None
    step_count: np.ndarray | None = None


def per_step_from(column: str, step_sum: np.ndarray, step_count: np.ndarray) -> np.ndarray:
    """Per-step scores from summed pointwise losses: the mean (its root for a root metric);
    NaN at a step without any loss."""
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = step_sum / step_count
    if metric_of(column).reduction == "root_mean":
        return np.sqrt(mean)
    return mean


def pointwise_loss(
    column: str, actual: np.ndarray, forecast: np.ndarray, mase_scale: np.ndarray,
    rmsse_scale: np.ndarray,
) -> np.ndarray | None:
    """The (n, H) pointwise loss whose mean (or root mean) is the metric; None when the metric
    has no pointwise loss (r2) or needs interval bounds."""
    m = metric_of(column)
    if m.loss is None or m.per_level:
        return None
    return m.loss(LossInput(actual, forecast, mase_scale, rmsse_scale))


def _reduce(
    metric: Metric, loss: np.ndarray, axis: int, observed: np.ndarray | None = None
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
    if metric.reduction == "root_mean":
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
    carry: dict[str, tuple[np.ndarray, np.ndarray]] | None = None,
) -> dict[str, Scored]:
    """Score ``forecast`` (n, H) against ``actual`` (n, H) on every metric column.

    ``lower`` / ``upper`` are (levels, n, H); scales are per task (n,). Rows of ``forecast``
    that are NaN (failed tasks) score NaN and are not counted as undefined. ``carry`` gives,
    per column, the per-step sums and counts of the tasks scored before these (earlier
    chunks): the per-step figures then cover those tasks too.
    """
    out: dict[str, Scored] = {}
    failed = np.isnan(forecast).any(axis=1)
    ok = ~failed
    observed = ~np.isnan(actual)
    scored = observed.any(axis=1)  # a task whose actuals are all missing has no score
    for col in cols:
        m = metric_of(col)
        if m.task_score is not None:
            per_task = m.task_score(actual, forecast)
            per_task[failed | ~scored] = np.nan
            h = actual.shape[1]
            out[col] = Scored(per_task, np.full(h, np.nan), ok & scored & np.isnan(per_task),
                              np.zeros(h), np.zeros(h, dtype=np.int64))
            continue
        x = LossInput(actual, forecast, mase_scale, rmsse_scale)
        if m.per_level:
            level = float(col.partition("_")[2])
            i = levels.index(level)
            x = LossInput(actual, forecast, mase_scale, rmsse_scale, lower[i], upper[i], level)
        loss = m.loss(x)
        per_task = _reduce(m, loss, axis=1, observed=observed)
        per_task[failed] = np.nan
        undefined = ok & scored & np.isnan(per_task)
        if m.per_level:
            # a forecaster without intervals has NaN bounds everywhere: not "undefined"
            undefined &= ~np.isnan(x.lower).all(axis=1)
        kept = loss[ok]
        missing = np.isnan(kept)
        start = (np.zeros(loss.shape[1]), np.zeros(loss.shape[1], dtype=np.int64))
        if carry is not None and col in carry:
            start = carry[col]
        step_sum = running_sum(start[0], np.where(missing, 0.0, kept))
        step_count = start[1] + (~missing).sum(axis=0, dtype=np.int64)
        per_step = per_step_from(col, step_sum, step_count)
        out[col] = Scored(per_task, per_step, undefined, step_sum, step_count)
    return out


def running_sum(start: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """``start`` (H,) plus every row of ``rows`` (k, H), added one row after the other.

    Always in that order (``numpy.cumsum`` accumulates strictly in sequence, where ``sum`` may
    add in pairs), so that carrying the total from one chunk of rows to the next gives the
    same bits as one pass over all of them, whatever the chunks.

    >>> running_sum(np.array([1.0]), np.array([[1e16], [-1e16]]))
    array([0.])
    """
    if not len(rows):
        return np.array(start, dtype=float, copy=True)
    # one contiguous row per step: cumsum along it runs straight through memory
    by_step = np.concatenate([np.asarray(start, dtype=float)[:, None], rows.T], axis=1)
    return np.cumsum(by_step, axis=1)[:, -1].copy()  # not a view keeping the whole cumsum


#: The rank metric when the config sets none and lists it (or lists no metrics).
DEFAULT_RANK_BY = "mase"


def check_metrics(
    metrics: list[str] | None, rank_by: str | None, has_intervals: bool, source: str
) -> tuple[str, str | None]:
    """Check the config's metric choices; return the rank metric and a note when a default gave
    way.

    Names must be in :data:`METRICS`; per-level metrics need ``intervals``. A ``rank_by`` the
    user wrote must be listed and able to order a leaderboard, else it is an error. Without
    ``rank_by`` the default yields to the list the user wrote: :data:`DEFAULT_RANK_BY` when it
    is listed, else the first listed metric that can rank, preferring one not flagged as
    unreliable (the note says which). Raises
    :class:`~runner.errors.ConfigError` naming the field.
    """
    from runner.errors import ConfigError, brief

    known = ", ".join(BY_NAME)
    chosen = list(DEFAULT_METRICS) if metrics is None else metrics
    for name in chosen:
        if name not in BY_NAME:
            raise ConfigError(
                f"{source}: metrics: unknown metric {brief(name)}; expected some of {known}"
            )
    if any(BY_NAME[m].per_level for m in chosen) and not has_intervals:
        raise ConfigError(f"{source}: metrics: interval metrics need intervals: [levels]")
    note = None
    if rank_by is None:
        # reliable metrics first: a default never picks a flagged metric when another can rank
        rankable = sorted((m for m in chosen if BY_NAME[m].can_rank),
                          key=lambda m: m in UNRELIABLE)
        if DEFAULT_RANK_BY in chosen:
            rank_by = DEFAULT_RANK_BY
        elif rankable:
            rank_by = rankable[0]
            note = (f"rank_by: {rank_by} (the default {DEFAULT_RANK_BY} is not among metrics; "
                    "the first listed metric that can rank)")
        else:
            raise ConfigError(
                f"{source}: metrics: none of {brief(chosen)} can order a leaderboard; add a "
                f"point error metric such as {DEFAULT_RANK_BY}"
            )
    elif rank_by not in BY_NAME:
        raise ConfigError(
            f"{source}: rank_by: unknown metric {brief(rank_by)}; expected one of {known}"
        )
    elif rank_by not in chosen:
        raise ConfigError(f"{source}: rank_by: {rank_by!r} is not among metrics {chosen}")
    if not BY_NAME[rank_by].can_rank:
        raise ConfigError(
            f"{source}: rank_by: {rank_by!r} cannot order a leaderboard; "
            "expected a point error metric such as mase"
        )
    return rank_by, note


def unreliable_rank_warning(rank_by: str) -> str | None:
    """A warning when the leaderboard is ordered by a metric flagged as unreliable."""
    why = UNRELIABLE.get(rank_by)
    if why is None:
        return None
    return (f"rank_by: {rank_by} is unreliable for comparing forecasts ({why}); the ranking "
            f"may mislead, consider {DEFAULT_RANK_BY}")
