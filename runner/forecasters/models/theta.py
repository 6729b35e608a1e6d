"""``kind: theta``: the theta method through statsmodels.

Assimakopoulos, V., Nikolopoulos, K. (2000), "The theta model: a decomposition approach to
forecasting", *International Journal of Forecasting* 16(4), 521-530; estimated as in
Hyndman, R.J., Billah, B. (2003), "Unmasking the Theta method", IJF 19(2), 287-290, which is
what ``statsmodels.tsa.forecasting.theta.ThetaModel`` implements (SES with drift, optional
classical deseasonalisation when a seasonality test says so). Point forecasts are statsmodels'.

Prediction intervals come from the model Hyndman & Billah show the method to be: simple
exponential smoothing with drift, x_t = l_{t-1} + b + e_t, l_t = l_{t-1} + b + alpha e_t
(an ARIMA(0,1,1) with drift), on the deseasonalised series x. Its h-step forecast variance is
sigma^2 (1 + (h - 1) alpha^2) (Hyndman, Koehler, Ord & Snyder 2008, ch. 6, the ETS(A,N,N)
class). The drift is the method's own, b = (1 - 1/theta) b0 with b0 the slope of the linear
trend, and the residuals are the method's one-step in-sample errors: started at the first
value (the SES starts there, so e_1 = 0), the recursion f_{t+1} = f_t + alpha e_t + b gives
exactly the theta forecast f_{T+1} of statsmodels. sigma^2 follows castgrid's convention
(:mod:`runner.forecasters.intervals`): sum e_t^2 / (T - 1 - K), with K = 2 (alpha, b0) plus
m - 1 seasonal indices when the series was deseasonalised. The interval is computed on the
deseasonalised scale and then reseasonalised like the points (multiplied by, or added to, the
seasonal index of each step).

statsmodels' own intervals took sigma^2 from an ARIMA(0,1,1) fit to the raw (still seasonal)
series and an h-step factor 1 + (h - 1)(1 + (alpha - 1)^2) that is not the method's; they
covered 99.7% at nominal 80% on seasonal data.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from runner.forecasters.contract import Forecast
from runner.forecasters.intervals import dof_factor, normal_bounds
from runner.forecasters.models._common import (
    boolean,
    check_levels,
    choice,
    horizon_steps,
    need_length,
    number,
    quiet,
    require_fitted,
    season_length,
    series,
    with_bounds,
)


class Theta:
    """The theta method (statsmodels), the season length taken from the dataset.

    Parameters
    ----------
    deseasonalize:
        Remove a classical seasonal component before fitting (only when the season is above 1).
    method:
        ``auto`` (multiplicative when every value is positive, else additive), ``additive`` or
        ``multiplicative`` deseasonalisation.
    use_test:
        Deseasonalise only when the 90% seasonality test of the ACF at the season lag rejects.
    theta:
        The weight of the trend line in the forecast (2 is the published method); >= 1.
    difference:
        Run the seasonality test on the differenced series.
    use_mle:
        Estimate by exact MLE of the equivalent ARIMA(0,1,1) with drift instead of two steps.

    >>> m = Theta().fit(np.arange(1.0, 31.0), season=1)
    >>> m.predict(3).shape
    (3,)
    """

    version = "2"  # 2: intervals of SES with drift on the deseasonalised series
    uses_covariates = False

    def __init__(
        self,
        deseasonalize: Any = True,
        method: Any = "auto",
        use_test: Any = True,
        theta: Any = 2.0,
        difference: Any = False,
        use_mle: Any = False,
    ) -> None:
        self.deseasonalize = deseasonalize
        self.method = method
        self.use_test = use_test
        self.theta = theta
        self.difference = difference
        self.use_mle = use_mle
        self._checked()

    def _checked(self) -> None:
        boolean(self.deseasonalize, "deseasonalize")
        choice(self.method, "method", ("auto", "additive", "multiplicative"))
        boolean(self.use_test, "use_test")
        number(self.theta, "theta", low=1.0)
        boolean(self.difference, "difference")
        boolean(self.use_mle, "use_mle")

    def fit(self, y: np.ndarray, *, season: int, covariates: np.ndarray | None = None) -> Theta:
        """Fit on ``y`` (covariates are not used by theta)."""
        self._checked()
        y = series(y, "theta")
        season = season_length(season, "theta")
        # With a season of 1 there is nothing to remove; statsmodels would otherwise run its
        # seasonality test at lag 1 and "deseasonalise" a trending series with period 1.
        deseasonalize = bool(self.deseasonalize) and season > 1
        need_length(y.shape[0], 3, "theta", "the theta method")
        if deseasonalize:
            need_length(
                y.shape[0],
                2 * season,
                "theta",
                f"deseasonalising with season {season} (or set deseasonalize: false)",
            )
            if self.method == "multiplicative" and not np.all(y > 0):
                raise ValueError(
                    "theta: method 'multiplicative' needs strictly positive values; the training "
                    "series has values <= 0"
                )
        from statsmodels.tsa.forecasting.theta import ThetaModel  # here: see arima.py

        with quiet():
            res = ThetaModel(
                y,
                period=season,
                deseasonalize=deseasonalize,
                use_test=bool(self.use_test),
                method=self.method,
                difference=bool(self.difference),
            ).fit(use_mle=bool(self.use_mle))
        self.result_ = res
        self.y_ = y.copy()
        return self

    def predict(
        self,
        horizon: int,
        *,
        covariates: np.ndarray | None = None,
        levels: tuple[float, ...] = (),
    ) -> np.ndarray | Forecast:
        """Forecast ``horizon`` steps, with the method's normal intervals at ``levels``."""
        res = require_fitted(self, "result_")
        horizon = horizon_steps(horizon, "theta")
        levels = check_levels(levels, "theta")
        theta = float(self.theta)
        with quiet():
            point = res.forecast(horizon, theta=theta).to_numpy(dtype=float)
            if not levels:
                return point
            parts = ses_drift_parts(res, self.y_, theta, horizon)
        if parts is None:
            return point
        flat, sd, seasonal, multiplicative = parts
        bounds = normal_bounds(flat, sd, levels)
        for lv, b in bounds.items():
            bounds[lv] = b * seasonal[:, None] if multiplicative else b + seasonal[:, None]
        return with_bounds(point, bounds)


def ses_drift_parts(
    res: Any, y: np.ndarray, theta: float, horizon: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray, bool] | None:
    """The deseasonalised forecasts, their standard deviations, the seasonal index of each
    step and whether it multiplies, for a fitted statsmodels theta result on ``y``.

    None when no degree of freedom is left for the variance (T - 1 - K <= 0).
    """
    from scipy.signal import lfilter

    n = y.shape[0]
    m = int(res.model.period or 1)
    multiplicative = str(res.model.method).startswith("mul")
    neutral = 1.0 if multiplicative else 0.0
    comp = res.forecast_components(max(horizon, m))
    step_index = comp["seasonal"].to_numpy(dtype=float)
    flat = (
        (1.0 - 1.0 / theta) * comp["trend"].to_numpy(dtype=float)
        + comp["ses"].to_numpy(dtype=float)
    )[:horizon]
    # The index of position t is the one statsmodels applies to step T + i with (T + i) % m
    # == t % m; positions of the training slice reuse the first m steps' values.
    by_position = np.full(m, neutral)
    by_position[(n + np.arange(m)) % m] = step_index[:m]
    deseasonalised = m > 1 and bool(np.any(by_position != neutral))
    in_sample = by_position[np.arange(n) % m]
    x = y / in_sample if multiplicative else y - in_sample
    alpha, b0 = float(res.params["alpha"]), float(res.params["b0"])
    drift = (1.0 - 1.0 / theta) * b0
    # f_{t+1} = (1 - alpha) f_t + alpha x_t + drift, f_1 = x_1: the one-step forecasts.
    decay = 1.0 - alpha
    f_next = lfilter([1.0], [1.0, -decay], alpha * x + drift, zi=[decay * x[0]])[0]
    fitted = np.concatenate([[x[0]], f_next[:-1]])
    errors = (x - fitted)[1:]  # e_1 = 0 by construction: not a residual
    n_params = 2 + (m - 1 if deseasonalised else 0)
    factor = dof_factor(errors.shape[0], n_params)
    if not np.isfinite(factor):
        return None
    sigma2 = float(np.mean(errors**2)) * factor
    steps = np.arange(horizon, dtype=float)
    sd = np.sqrt(sigma2 * (1.0 + steps * alpha**2))
    return flat, sd, step_index[:horizon], multiplicative
