"""``kind: theta``: the theta method through statsmodels.

Assimakopoulos, V., Nikolopoulos, K. (2000), "The theta model: a decomposition approach to
forecasting", *International Journal of Forecasting* 16(4), 521-530; estimated as in
Hyndman, R.J., Billah, B. (2003), "Unmasking the Theta method", IJF 19(2), 287-290, which is
what ``statsmodels.tsa.forecasting.theta.ThetaModel`` implements (SES with drift, optional
classical deseasonalisation when a seasonality test says so).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from runner.forecasters.contract import Forecast
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

    version = "1"
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
            bounds = {
                lv: res.prediction_intervals(horizon, theta=theta, alpha=1.0 - lv / 100.0).to_numpy(
                    dtype=float
                )
                for lv in levels
            }
        return with_bounds(point, bounds)
