"""The benchmark forecasters, vectorised over many (series, fold) tasks at once.

Each method is implemented as published in Hyndman & Athanasopoulos, *Forecasting: Principles
and Practice* (3rd ed., 2021), section 5.2 "Some simple forecasting methods" (mean, naive,
seasonal naive, drift), with the prediction intervals of its section 5.5 table of benchmark
forecast standard deviations; the two moving averages take theirs from the constant-level
model they are optimal for:

=================  =========================================  ==============================
method             point forecast for step h                  sigma_h
=================  =========================================  ==============================
mean               mean of y_1..y_T                           sigma sqrt(1 + 1/T)
naive              y_T                                        sigma sqrt(h)
seasonal naive     y_{T+h-m(k+1)}, k = floor((h-1)/m)         sigma sqrt(k + 1)
drift              y_T + h (y_T - y_1) / (T - 1)              sigma sqrt(h (1 + h/(T-1)))
moving average     mean (or median) of y_{T-k+1}..y_T         sigma_1 (the same for every h)
season average     mean of y_{T-m+1}..y_T                     sigma_1 (the same for every h)
=================  =========================================  ==============================

**One residual-variance convention for every built-in** (benchmarks and models alike, see
:mod:`runner.forecasters.intervals`): sigma^2 = (sum of squared residuals) / (T - K), with T
the number of one-step residuals the method produces on the training slice and K the number of
parameters it estimated from it. Here: mean, residuals y_t - mean, T residuals, K = 1; naive,
y_t - y_{t-1}, T - 1 residuals, K = 0; seasonal naive, y_t - y_{t-m}, T - m residuals, K = 0;
drift, y_t - y_{t-1} - c, T - 1 residuals, K = 1 (c). The drift row's ``T - 1`` follows from
the variance of the drift estimate, sigma^2 / (T - 1). It is the textbook's convention (FPP3
5.5; FPP2 7.1 and 8.5 show the same divisor in its ETS and ARIMA output), chosen over maximum
likelihood's divisor T because it is what the published tables use and because with many
parameters (a seasonal ETS has m + 2) the ML divisor makes intervals visibly too narrow.

Moving average and season average: under the model they are optimal for, independent values
around a constant level (the constant-process model of the moving average, e.g. Montgomery,
Jennings & Kulahci 2015, *Introduction to Time Series Analysis and Forecasting*, 2nd ed.,
section 4.2, from memory), the forecast error y_{T+h} - (mean of the last k) has the same
distribution for every h, with variance sigma^2 (1 + 1/k). sigma_1 is estimated directly as
the root mean square of the method's own one-step in-sample errors e_t = y_t - (mean of
y_{t-k}..y_{t-1}), t = k+1..T: T - k residuals, K = 0 (k is chosen, not estimated). The same
holds for the moving median. The moving mode (meant for counts) gives no interval: a normal
interval would misstate a discrete distribution, and no published one exists.

Every method reads its training slice with the slice's missing values filled from the slice
alone (:mod:`runner.forecasters.gaps`), exactly as the per-series models see it; a slice without
any observed value cannot be forecast.

The built-ins load through :mod:`runner.forecasters.registry` like any plugin, and also honour the
per-series protocol (``fit`` / ``predict``) so the conformance checks apply to them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from runner.forecasters.contract import Forecast
from runner.forecasters.gaps import SliceFill
from runner.forecasters.intervals import z_values
from runner.forecasters.slices import (
    CHUNK_ELEMENTS,
    SliceSummary,
    chunks,
    padded,
    row_sums,
    summarise,
)


@dataclass
class BatchForecast:
    """Forecasts of many tasks: ``point`` (n, H); ``lower``/``upper`` (levels, n, H).

    ``ok`` is False for tasks the method cannot forecast (too short a training slice);
    ``message`` says why.
    """

    point: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    ok: np.ndarray
    message: str = ""


class _Baseline:
    """Shared per-series protocol on top of :meth:`forecast_many`."""

    version = "1"
    vectorised = True
    uses_covariates = False

    def min_length(self, season: int) -> int:
        """Shortest training slice the method can forecast from."""
        return 1

    def forecast_many(
        self,
        values: np.ndarray | SliceFill,
        starts: np.ndarray,
        ends: np.ndarray,
        horizon: int,
        *,
        season: int,
        levels: tuple[float, ...] = (),
        summary: SliceSummary | None = None,
    ) -> BatchForecast:
        """Forecast every slice ``values[starts[i]:ends[i]]`` ``horizon`` steps ahead.

        ``summary`` (from :func:`~runner.forecasters.slices.summarise` on the same slices)
        saves recomputing the per-slice statistics; ``values`` may be a
        :class:`~runner.forecasters.gaps.SliceFill` of them, shared by many calls.
        """
        starts = np.asarray(starts, dtype=np.int64)
        ends = np.asarray(ends, dtype=np.int64)
        fill = values if isinstance(values, SliceFill) else SliceFill(values)
        if summary is None:
            summary = summarise(fill, starts, ends, season)
        n_levels = len(levels)
        point, sigma = self._point_and_sigma(
            fill, starts, ends, horizon, season, summary, with_sigma=n_levels > 0
        )
        long_enough = summary.length >= self.min_length(season)
        ok = long_enough & (summary.observed > 0)
        point[~ok] = np.nan
        if sigma is None or n_levels == 0:
            lower = np.full((n_levels,) + point.shape, np.nan)
            upper = lower.copy()
        else:
            sigma[~ok] = np.nan
            half = z_values(levels)[:, None, None] * sigma[None, :, :]
            lower, upper = point[None] - half, point[None] + half
        message = (
            f"{type(self).__name__} needs at least {self.min_length(season)} training "
            f"observations"
            if not long_enough.all()
            else "the training slice has no observed value (every one is missing)"
        )
        return BatchForecast(point, lower, upper, ok, "" if ok.all() else message)

    def _point_and_sigma(
        self,
        values: SliceFill,
        starts: np.ndarray,
        ends: np.ndarray,
        horizon: int,
        season: int,
        s: SliceSummary,
        with_sigma: bool = True,
    ) -> tuple[np.ndarray, np.ndarray | None]:
        """Point forecasts (n, H) and forecast standard deviations (n, H), or None for none.

        ``with_sigma`` is False when no interval is asked for; a method whose sigma is costly
        may then skip it.
        """
        raise NotImplementedError

    # ---- the per-series protocol (used by check_forecaster and by plugin-style callers)

    def fit(self, y: np.ndarray, *, season: int, covariates: np.ndarray | None = None):
        """Remember the training values (the methods have nothing else to estimate)."""
        y = np.asarray(y, dtype=float)
        if y.ndim != 1 or len(y) < self.min_length(season):
            raise ValueError(
                f"{type(self).__name__} needs at least {self.min_length(season)} observations, "
                f"got {len(y)}"
            )
        self.y_ = y.copy()
        self.season_ = int(season)
        return self

    def predict(
        self,
        horizon: int,
        *,
        covariates: np.ndarray | None = None,
        levels: tuple[float, ...] = (),
    ) -> Forecast:
        """Forecast ``horizon`` steps from the fitted values."""
        if not hasattr(self, "y_"):
            raise RuntimeError(f"{type(self).__name__} is not fitted; call fit first")
        b = self.forecast_many(
            self.y_, np.array([0]), np.array([len(self.y_)]), horizon,
            season=self.season_, levels=tuple(levels),
        )
        lower = {
            lv: b.lower[i, 0] for i, lv in enumerate(levels) if np.isfinite(b.lower[i, 0]).all()
        }
        upper = {lv: b.upper[i, 0] for i, lv in enumerate(levels) if lv in lower}
        return Forecast(b.point[0], lower, upper)

    def __repr__(self) -> str:
        params = ", ".join(f"{k}={v!r}" for k, v in vars(self).items() if not k.endswith("_"))
        return f"{type(self).__name__}({params})"


def _last_values(
    values: SliceFill, idx: np.ndarray, starts: np.ndarray, ends: np.ndarray
) -> np.ndarray:
    """Filled values at ``idx`` (n, k) of each slice; positions before a too-short slice's
    start are read as its start (the task is failed anyway)."""
    idx = np.maximum(idx, starts[:, None])
    return values.take(idx, starts[:, None], ends[:, None]).astype(float)


def _steps(horizon: int) -> np.ndarray:
    return np.arange(1, horizon + 1, dtype=float)


class Naive(_Baseline):
    """Naive method: every step is the last observed value (FPP3 5.2), sigma_h = sigma sqrt(h)."""

    def __init__(self) -> None:
        pass

    def _point_and_sigma(self, values, starts, ends, horizon, season, s, with_sigma=True):
        point = np.repeat(s.last[:, None], horizon, axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            sigma = np.sqrt(s.diff_sq / (s.length - 1))
        return point, sigma[:, None] * np.sqrt(_steps(horizon))[None, :]

    def min_length(self, season: int) -> int:
        return 1


class SeasonalNaive(_Baseline):
    """Seasonal naive method: the value at the same point of the last season (FPP3 5.2).

    y_hat_{T+h} = y_{T+h-m(k+1)} with k = floor((h-1)/m); sigma_h = sigma sqrt(k+1).
    With season 1 it equals the naive method.
    """

    def __init__(self) -> None:
        pass

    def min_length(self, season: int) -> int:
        return max(int(season), 1)

    def _point_and_sigma(self, values, starts, ends, horizon, season, s, with_sigma=True):
        m = max(int(season), 1)
        h0 = np.arange(horizon)
        idx = ends[:, None] - m + (h0 % m)[None, :]
        point = _last_values(values, idx, starts, ends)
        k = h0 // m
        with np.errstate(invalid="ignore", divide="ignore"):
            sigma = np.sqrt(s.seasonal_sq / (s.length - m))
        return point, sigma[:, None] * np.sqrt(k + 1.0)[None, :]


class Mean(_Baseline):
    """Mean (average) method: the mean of the whole training window (FPP3 5.2).

    sigma_h = sigma sqrt(1 + 1/T), sigma from the residuals about the mean (K = 1).
    """

    def __init__(self) -> None:
        pass

    def _point_and_sigma(self, values, starts, ends, horizon, season, s, with_sigma=True):
        point = np.repeat(s.mean[:, None], horizon, axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            sigma = np.sqrt(s.mean_sq / (s.length - 1)) * np.sqrt(1.0 + 1.0 / s.length)
        return point, np.repeat(sigma[:, None], horizon, axis=1)


class Drift(_Baseline):
    """Drift method: the line from the first to the last observation, extended (FPP3 5.2).

    y_hat_{T+h} = y_T + h (y_T - y_1)/(T - 1); sigma_h = sigma sqrt(h (1 + h/(T-1))), sigma
    from the residuals y_t - y_{t-1} - c (K = 1, M = 1).
    """

    def __init__(self) -> None:
        pass

    def min_length(self, season: int) -> int:
        return 2

    def _point_and_sigma(self, values, starts, ends, horizon, season, s, with_sigma=True):
        h = _steps(horizon)
        with np.errstate(invalid="ignore", divide="ignore"):
            slope = (s.last - s.first) / (s.length - 1)
            point = s.last[:, None] + slope[:, None] * h[None, :]
            sigma = np.sqrt(s.drift_sq / (s.length - 2))
            t1 = (s.length - 1)[:, None]
            sigma_h = sigma[:, None] * np.sqrt(h[None, :] * (1.0 + h[None, :] / t1))
        return point, sigma_h


def moving_error_sigma(
    values: np.ndarray | SliceFill, starts: np.ndarray, ends: np.ndarray, k: int,
    stat: str = "mean",
) -> np.ndarray:
    """Root mean square of the one-step in-sample errors of a moving ``stat`` of ``k`` values.

    For each slice, e_t = y_t - stat(y_{t-k}..y_{t-1}) for the T - k positions that have k
    values before them; sigma = sqrt(sum e_t^2 / (T - k)) (K = 0: the window is chosen, not
    estimated). NaN when the slice has no such position.
    """
    n = len(starts)
    sse = np.zeros(n)
    count = np.zeros(n)
    width = int(np.max(ends - starts)) if n else 0
    if width > k:
        # The median copies every window, so the padded matrix times k must fit the budget.
        rows = max(1, CHUNK_ELEMENTS // (width * (k + 1)))
        for lo in range(0, n, rows):
            part = slice(lo, min(n, lo + rows))
            mat = padded(values, starts[part], ends[part])
            windows = np.lib.stride_tricks.sliding_window_view(mat, k, axis=1)[:, :-1, :]
            with np.errstate(invalid="ignore"):
                centre = windows.mean(axis=2) if stat == "mean" else np.median(windows, axis=2)
            err = mat[:, k:] - centre
            finite = np.isfinite(err)
            sse[part] = row_sums(np.where(finite, err, 0.0) ** 2)  # width-independent
            count[part] = finite.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        sigma = np.sqrt(sse / count)
    sigma[count < 1] = np.nan
    return sigma


class SeasonAverage(_Baseline):
    """The mean of the last full season, for every step.

    Its interval is the moving average's (module docstring) with a window of one season:
    sigma_h = sigma_1, the root mean square of y_t - mean(y_{t-m}..y_{t-1}) over the slice.
    """

    version = "2"  # 2: prediction intervals

    def __init__(self) -> None:
        pass

    def min_length(self, season: int) -> int:
        return max(int(season), 1)

    def _point_and_sigma(self, values, starts, ends, horizon, season, s, with_sigma=True):
        m = max(int(season), 1)
        idx = ends[:, None] - m + np.arange(m)[None, :]
        last_season = _last_values(values, idx, starts, ends)
        point = np.repeat(last_season.mean(axis=1)[:, None], horizon, axis=1)
        if not with_sigma:
            return point, None
        sigma = moving_error_sigma(values, starts, ends, m, "mean")
        return point, np.repeat(sigma[:, None], horizon, axis=1)


class MovingAverage(_Baseline):
    """The mean, median or mode of the last ``size`` values, for every step.

    A moving-average forecast. ``mode`` is the most frequent of the ``size`` values, the
    smallest one on ties, and is meant for count data. Intervals (mean and median): sigma_h =
    sigma_1, the root mean square of the method's own one-step in-sample errors, as under the
    constant-level model (module docstring); the mode gives none.
    """

    version = "2"  # 2: prediction intervals (mean and median)

    def __init__(self, size: int = 3, stat: str = "mean") -> None:
        if isinstance(size, bool) or not isinstance(size, int) or size < 1:
            raise ValueError(f"size: expected an integer >= 1, got {size!r}")
        if stat not in ("mean", "median", "mode"):
            raise ValueError(f"stat: expected one of mean, median, mode, got {stat!r}")
        self.size = size
        self.stat = stat

    def min_length(self, season: int) -> int:
        return self.size

    def _point_and_sigma(self, values, starts, ends, horizon, season, s, with_sigma=True):
        k = self.size
        out = np.empty(len(starts))
        for part in chunks(np.maximum(ends - k, starts), ends):
            idx = ends[part, None] - k + np.arange(k)[None, :]
            win = _last_values(values, idx, starts[part], ends[part])
            if self.stat == "mean":
                out[part] = win.mean(axis=1)
            elif self.stat == "median":
                out[part] = np.median(win, axis=1)
            else:
                srt = np.sort(win, axis=1)
                counts = (srt[:, :, None] == srt[:, None, :]).sum(axis=2)
                out[part] = srt[np.arange(len(srt)), counts.argmax(axis=1)]
        point = np.repeat(out[:, None], horizon, axis=1)
        if not with_sigma or self.stat == "mode":
            return point, None
        sigma = moving_error_sigma(values, starts, ends, k, self.stat)
        return point, np.repeat(sigma[:, None], horizon, axis=1)


__all__ = [
    "BatchForecast",
    "Drift",
    "Mean",
    "Naive",
    "SeasonAverage",
    "SeasonalNaive",
    "MovingAverage",
    "moving_error_sigma",
    "padded",
]
