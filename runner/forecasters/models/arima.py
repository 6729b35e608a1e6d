"""``kind: arima``: ARIMA and seasonal ARIMA through statsmodels.

Box, G.E.P., Jenkins, G.M., Reinsel, G.C. (2008), *Time Series Analysis: Forecasting and
Control*, 4th ed., Wiley: the (p,d,q)(P,D,Q)s model. Estimation is statsmodels' exact
maximum likelihood on the state-space form (``statsmodels.tsa.arima.model.ARIMA``).

Prediction intervals are the model's normal forecast distribution (statsmodels' forecast
variance) with the innovation variance put on castgrid's residual-variance convention
(:mod:`runner.forecasters.intervals`): the maximum-likelihood sigma^2 times T / (T - K), T the
observations after differencing and K the estimated coefficients (AR, MA, trend, regressors).
For FPP2 section 8.5's ARIMA(1,0,3) with a mean of the uschange consumption series this gives
the book's sigma^2 = 0.3499 (statsmodels' maximum likelihood: 0.3405).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from runner.forecasters.contract import Forecast
from runner.forecasters.intervals import dof_factor, normal_bounds
from runner.forecasters.models._common import (
    check_converged,
    check_levels,
    choice,
    covariate_matrix,
    horizon_steps,
    int_tuple,
    need_length,
    positive_int,
    quiet,
    require_fitted,
    season_length,
    series,
    shown,
    with_bounds,
)

TRENDS = (None, "n", "c", "t", "ct")
#: Lowest power of time each trend spec contains ('n' and None have none).
_TREND_LOWEST = {"c": 0, "ct": 0, "t": 1}
_TREND_TERMS = {None: 0, "n": 0, "c": 1, "t": 1, "ct": 2}


def seasonal_spec(value: Any, name: str = "seasonal_order") -> tuple[int, ...] | None:
    """Check a seasonal order: null, ``[P, D, Q]`` (season from the data) or ``[P, D, Q, s]``."""
    if value is None:
        return None
    spec = int_tuple(value, name, (3, 4))
    if len(spec) == 4 and any(spec[:3]) and spec[3] < 2:
        raise ValueError(
            f"{name}: the season s must be >= 2 when P, D or Q is set, got {shown(value)}"
        )
    return spec


def resolve_seasonal(
    spec: tuple[int, ...] | None, season: int, owner: str
) -> tuple[int, int, int, int]:
    """The statsmodels ``seasonal_order`` for a fit on data with season length ``season``."""
    if spec is None or not any(spec[:3]):
        return (0, 0, 0, 0)
    if len(spec) == 4:
        return (spec[0], spec[1], spec[2], spec[3])
    if season < 2:
        raise ValueError(
            f"{owner}: seasonal_order {list(spec)} needs a season >= 2, but the series has "
            f"season {season}; give [P, D, Q, s] or set the dataset's season"
        )
    return (spec[0], spec[1], spec[2], season)


def check_trend(trend: Any, integration: int, name: str = "trend") -> None:
    """Reject a trend term that differencing would remove (statsmodels refuses those)."""
    choice(trend, name, TRENDS)
    lowest = _TREND_LOWEST.get(trend)
    if lowest is not None and lowest < integration:
        raise ValueError(
            f"{name}: {trend!r} has terms of order below d + D = {integration}, which "
            f"differencing removes; use 't' for a drift when d + D = 1, or null"
        )


def minimum_length(
    order: tuple[int, int, int], seasonal: tuple[int, int, int, int], n_trend: int, n_exog: int
) -> int:
    """Observations an ARIMA fit needs: differencing loss + lag span, and more than its params.

    A rule of our own (statsmodels fits even a handful of points, badly): after differencing,
    the series must be longer than the AR lag span and hold more values than there are
    estimated parameters (coefficients, trend, regressors and the variance).
    """
    p, d, q = order
    sp, sd, sq, s = seasonal
    lost = d + sd * s
    n_params = p + q + sp + sq + n_trend + n_exog + 1
    return lost + max(n_params + 1, p + sp * s + 1, q + sq * s + 1)


def predict_fitted(
    model: Any, name: str, horizon: int, covariates: np.ndarray | None,
    levels: tuple[float, ...],
) -> np.ndarray | Forecast:
    """``predict`` of a fitted statsmodels ARIMA kept in ``model.result_`` (arima, arima_search)."""
    res = require_fitted(model, "result_")
    horizon = horizon_steps(horizon, name)
    levels = check_levels(levels, name)
    exog = covariate_matrix(covariates, horizon, name, "forecast")
    got = 0 if exog is None else exog.shape[1]
    if got != model.n_exog_:
        raise ValueError(
            f"{name}: fitted with {model.n_exog_} covariate column(s), predict got {got}"
        )
    with quiet():
        return arima_point_and_bounds(res, horizon, levels, exog)


def residual_variance_factor(res: Any) -> float:
    """``T / (T - K)`` of a fitted statsmodels ARIMA: T observations after differencing (the
    diffuse ones excluded), K estimated parameters other than the innovation variance."""
    n_params = int(res.df_model) - (0 if res.model.concentrate_scale else 1)
    return dof_factor(int(res.nobs_effective), n_params)


def arima_point_and_bounds(
    res: Any, horizon: int, levels: tuple[float, ...], exog: np.ndarray | None
) -> np.ndarray | Forecast:
    """Forecasts (and intervals at ``levels``) of a fitted statsmodels ARIMA result.

    The forecast variance is linear in the innovation variance (the initial state covariance
    is sigma^2 times a fixed matrix, or diffuse and spent on the first d + D s observations),
    so scaling it by :func:`residual_variance_factor` puts the interval on castgrid's
    convention.
    """
    if not levels:
        return np.asarray(res.forecast(horizon, exog=exog), dtype=float)
    pred = res.get_forecast(horizon, exog=exog)
    point = np.asarray(pred.predicted_mean, dtype=float)
    var = np.asarray(pred.var_pred_mean, dtype=float) * residual_variance_factor(res)
    return with_bounds(point, normal_bounds(point, np.sqrt(var), levels))


class Arima:
    """ARIMA(p,d,q)(P,D,Q)s by exact maximum likelihood (statsmodels), with optional regressors.

    Parameters
    ----------
    order:
        ``[p, d, q]``.
    seasonal_order:
        ``null`` (no seasonal part), ``[P, D, Q]`` (the season length comes from the dataset)
        or ``[P, D, Q, s]``.
    trend:
        statsmodels' trend spec: ``null`` (its default: a constant when d + D = 0, else none),
        ``n``, ``c``, ``t`` or ``ct``.
    maxiter:
        Most iterations of the likelihood optimiser (200; statsmodels' own default is 50, and a
        fit that converges within 50 gives the same estimate either way).

    Covariates, when the dataset declares them, enter as exogenous regressors (regression with
    ARIMA errors). A fit whose optimiser reports no convergence (statsmodels would warn with a
    ConvergenceWarning) raises :class:`~runner.forecasters.models._common.ConvergenceError`, so the
    task is recorded as failed rather than scored on an unfinished estimate; raise ``maxiter`` to
    give the optimiser more room.

    >>> m = Arima(order=[0, 1, 1]).fit(np.arange(20.0) + np.sin(np.arange(20)), season=1)
    >>> m.predict(3).shape
    (3,)
    """

    version = "2"  # 2: interval variance over T - K
    uses_covariates = True

    def __init__(
        self,
        order: Any = (1, 1, 1),
        seasonal_order: Any = None,
        trend: Any = None,
        maxiter: Any = 200,
    ) -> None:
        self.order = order
        self.seasonal_order = seasonal_order
        self.trend = trend
        self.maxiter = maxiter
        self._checked()

    def _checked(self) -> tuple[tuple[int, int, int], tuple[int, ...] | None]:
        order = int_tuple(self.order, "order", 3)
        seasonal = seasonal_spec(self.seasonal_order)
        sd = seasonal[1] if seasonal is not None else 0
        check_trend(self.trend, order[1] + sd)
        positive_int(self.maxiter, "maxiter", low=1)
        return order, seasonal  # type: ignore[return-value]

    def fit(self, y: np.ndarray, *, season: int, covariates: np.ndarray | None = None) -> Arima:
        """Estimate the model on ``y`` (and regressors ``covariates``, one row per value)."""
        order, spec = self._checked()
        y = series(y, "arima")
        season = season_length(season, "arima")
        seasonal = resolve_seasonal(spec, season, "arima")
        exog = covariate_matrix(covariates, y.shape[0], "arima", "training")
        n_exog = 0 if exog is None else exog.shape[1]
        n_trend = _TREND_TERMS[self.trend]
        if self.trend is None and order[1] + seasonal[1] == 0:
            n_trend = 1  # statsmodels' default adds a constant to models without integration
        need = minimum_length(order, seasonal, n_trend, n_exog)
        need_length(y.shape[0], need, "arima", f"order {list(order)} seasonal {list(seasonal)}")
        from statsmodels.tsa.arima.model import ARIMA  # here: validating needs no statsmodels

        with quiet():
            model = ARIMA(y, exog=exog, order=order, seasonal_order=seasonal, trend=self.trend)
            # More room than statsmodels' 50 iterations: a fit that converges within 50 is
            # unchanged, a slower one may finish instead of being recorded as a failure.
            res = model.fit(method_kwargs={"maxiter": int(self.maxiter)})
        check_converged(res, "arima")
        self.result_ = res
        self.n_exog_ = n_exog
        return self

    def predict(
        self,
        horizon: int,
        *,
        covariates: np.ndarray | None = None,
        levels: tuple[float, ...] = (),
    ) -> np.ndarray | Forecast:
        """Forecast ``horizon`` steps; ``covariates`` are the regressors over those steps."""
        return predict_fitted(self, "arima", horizon, covariates, levels)
