"""``kind: ets``: exponential smoothing state-space models through statsmodels.

Hyndman, R.J., Koehler, A.B., Ord, J.K., Snyder, R.D. (2008), *Forecasting with Exponential
Smoothing: The State Space Approach*, Springer: the ETS(error, trend, seasonal) family,
estimated by maximum likelihood (``statsmodels.tsa.exponential_smoothing.ets.ETSModel``).

Prediction intervals follow the book's chapter 6: for the linear models (additive error, no or
additive trend, damped or not, no or additive season: its "class 1") the h-step forecast
variance is sigma^2 (1 + sum_{j=1}^{h-1} c_j^2), c_j = w' F^{j-1} g, which statsmodels
evaluates in closed form (checked against the general formula in tests/test_models.py); for
the others the interval is the quantiles of 1000 sample paths simulated from the fitted model
with a fixed seed. In both, sigma^2 follows castgrid's residual-variance convention
(:mod:`runner.forecasters.intervals`): SSE / (T - K), K the estimated smoothing weights,
damping and initial states. statsmodels' own variance is SSE / T, which with the m + 2
parameters of ETS(A,N,A) made the intervals visibly too narrow (78.5% coverage at nominal 80%
on 300 monthly observations).
The estimate is the maximum likelihood: the smoothing weights and the initial states, from
several starting points with tight optimiser tolerances (:meth:`ETS._maximum_likelihood`), so
that it is the optimum rather than wherever the optimiser happened to stop.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:  # statsmodels is imported where a model is fitted
    from statsmodels.tsa.exponential_smoothing.ets import ETSModel

from runner.forecasters.contract import Forecast
from runner.forecasters.intervals import dof_factor, normal_bounds
from runner.forecasters.models._common import (
    boolean,
    check_converged,
    check_levels,
    choice,
    horizon_steps,
    need_length,
    quiet,
    require_fitted,
    season_length,
    series,
    with_bounds,
)

#: Seed of the simulated prediction intervals (models without an analytic interval), fixed so
#: that the same fit always gives the same bounds.
SIMULATION_SEED = 0
SIMULATIONS = 1000
#: The models with an analytic forecast variance (Hyndman et al. 2008, class 1).
ANALYTIC = ("ANN", "AAN", "AAdN", "ANA", "AAA", "AAdA")

#: Options of statsmodels' L-BFGS-B maximum-likelihood fit. Its defaults (factr 1e7, pgtol
#: 1e-5) often stop a seasonal model far from the optimum (log-likelihoods up to 47 below it
#: on the demo) at a point that depends on the CPU's BLAS kernel; these run the optimiser to
#: its numerical limit. Measured in README, "Reproducibility".
FIT_OPTIONS = {"factr": 10.0, "pgtol": 1e-10, "maxiter": 10000, "maxfun": 100000}
#: Starting smoothing weights (alpha, beta, gamma) tried besides statsmodels' own start
#: (0.1, 0.01, 0.01): the likelihood of a seasonal model has several local optima, and one
#: start alone lands in a different one on a different BLAS kernel. The fit keeps the highest
#: likelihood.
SMOOTHING_STARTS = ((0.5, 0.05, 0.2), (0.9, 0.05, 0.05))


def _at_an_optimum(res: Any) -> bool:
    """Whether an L-BFGS-B run stopped at an optimum: converged, or (warnflag 2) its line search
    found no better point; not when it ran out of iterations or ended non-finite."""
    retvals = res.mle_retvals or {}
    return bool(np.isfinite(res.llf)) and (
        retvals.get("converged", True) is not False or retvals.get("warnflag") == 2
    )


class ETS:
    """ETS(error, trend, seasonal) model, optionally with a damped trend (statsmodels).

    Parameters
    ----------
    error:
        ``add`` or ``mul``.
    trend:
        ``null`` (none), ``add`` or ``mul``.
    damped:
        ``true`` damps the trend (needs a trend).
    seasonal:
        ``null`` (none), ``add`` or ``mul``; the season length comes from the dataset.

    Multiplicative components need strictly positive data. Prediction intervals are analytic
    for the linear models (additive error, additive or no trend and seasonal) and otherwise
    simulated from 1000 seeded sample paths; both with the innovation variance over T - K.

    >>> y = 10.0 + np.arange(30.0) + np.sin(np.arange(30.0))
    >>> f = ETS(trend="add").fit(y, season=1).predict(2, levels=(80.0,))
    >>> f.point.shape, bool(np.all(f.lower[80.0] < f.upper[80.0]))
    ((2,), True)
    """

    version = "4"  # 2: interval variance over T - K; 3: maximum likelihood from several starts;
    # 4: a run ending in its line search competes, confirmed by the default stopping rule
    uses_covariates = False

    def __init__(
        self,
        error: Any = "add",
        trend: Any = None,
        damped: Any = False,
        seasonal: Any = None,
    ) -> None:
        self.error = error
        self.trend = trend
        self.damped = damped
        self.seasonal = seasonal
        self._checked()

    def _checked(self) -> None:
        choice(self.error, "error", ("add", "mul"))
        choice(self.trend, "trend", (None, "add", "mul"))
        choice(self.seasonal, "seasonal", (None, "add", "mul"))
        if boolean(self.damped, "damped") and self.trend is None:
            raise ValueError("damped: true needs a trend (add or mul)")

    def _minimum_length(self, season: int) -> int:
        # More values than estimated parameters (smoothing weights, phi, initial states), and the
        # two full seasons statsmodels' start values need.
        n_params = 2 + (2 if self.trend else 0) + (1 if self.damped else 0)
        if self.seasonal:
            n_params += 1 + season
        need = n_params + 1
        return max(need, 2 * season) if self.seasonal else need

    def fit(self, y: np.ndarray, *, season: int, covariates: np.ndarray | None = None) -> ETS:
        """Estimate the model on ``y`` (covariates are not used by ETS)."""
        self._checked()
        y = series(y, "ets")
        season = season_length(season, "ets")
        if self.seasonal and season < 2:
            raise ValueError(
                f"ets: seasonal {self.seasonal!r} needs a season >= 2, but the series has "
                f"season {season}"
            )
        multiplicative = [k for k in ("error", "trend", "seasonal") if getattr(self, k) == "mul"]
        if multiplicative and not np.all(y > 0):
            raise ValueError(
                f"ets: {multiplicative[0]} 'mul' needs strictly positive values; the training "
                "series has values <= 0"
            )
        need_length(y.shape[0], self._minimum_length(season), "ets", "this model")
        # A Series with a RangeIndex, not an ndarray: statsmodels' get_prediction (intervals)
        # fails on ndarray input (it reads `.index` of the predicted mean).
        import pandas as pd
        from statsmodels.tsa.exponential_smoothing.ets import ETSModel  # here: see arima.py

        endog = pd.Series(y, copy=False)
        with quiet():
            res, judge = self._maximum_likelihood(lambda: ETSModel(
                endog,
                error=self.error,
                trend=self.trend,
                damped_trend=bool(self.damped),
                seasonal=self.seasonal,
                seasonal_periods=season if self.seasonal else None,
            ))
        check_converged(judge, "ets")
        self.result_ = res
        self.nobs_ = int(y.shape[0])
        return self

    def _maximum_likelihood(self, make_model: Callable[[], ETSModel]) -> tuple[Any, Any]:
        """The maximum-likelihood fit, as reproducible across machines as the optimiser allows,
        and the run whose convergence report counts.

        L-BFGS-B (:data:`FIT_OPTIONS`) from statsmodels' start and from each of
        :data:`SMOOTHING_STARTS` (initial states from statsmodels' start in every case); the
        highest log-likelihood wins (the earliest start on a tie within 1e-9), and one more run
        from its optimum is kept when it climbs higher still. Each run uses a fresh model.

        With tolerances this tight a run often ends because its line search finds no better
        point at the limit of numerical precision, which statsmodels reports as "not
        converged". Such an optimum is confirmed by a run with statsmodels' own default stopping
        rule started from it: its report is the one that counts.
        """
        base = make_model()
        n_smoothing = 1 + bool(self.trend) + bool(self.seasonal)
        starts: list[np.ndarray | None] = [None]
        for alpha, beta, gamma in SMOOTHING_STARTS:
            start = np.array(base.start_params, dtype=float)
            start[:n_smoothing] = [alpha, *([beta] if self.trend else []),
                                   *([gamma] if self.seasonal else [])]
            starts.append(start)
        fits = [make_model().fit(start_params=start, disp=False, **FIT_OPTIONS)
                for start in starts]
        usable = [r for r in fits if _at_an_optimum(r)]
        if not usable:
            # The tight tolerances can end L-BFGS-B's line search before it reports
            # convergence (seen on multiplicative models); statsmodels' own tolerances then
            # decide, and check_converged judges that fit as before.
            fallback = make_model().fit(disp=False, maxiter=FIT_OPTIONS["maxiter"])
            return fallback, fallback
        top = max(r.llf for r in usable)
        best = next(r for r in usable if r.llf >= top - 1e-9 * abs(top))
        again = make_model().fit(start_params=np.asarray(best.params, dtype=float), disp=False,
                                 **FIT_OPTIONS)
        if _at_an_optimum(again) and again.llf > best.llf:
            best = again
        if (best.mle_retvals or {}).get("converged", True) is not False:
            return best, best
        judge = make_model().fit(start_params=np.asarray(best.params, dtype=float), disp=False)
        if np.isfinite(judge.llf) and judge.llf > best.llf + 1e-9 * abs(best.llf):
            return judge, judge
        return best, judge

    def predict(
        self,
        horizon: int,
        *,
        covariates: np.ndarray | None = None,
        levels: tuple[float, ...] = (),
    ) -> np.ndarray | Forecast:
        """Forecast ``horizon`` steps, with intervals at ``levels`` (percent) when asked."""
        res = require_fitted(self, "result_")
        horizon = horizon_steps(horizon, "ets")
        levels = check_levels(levels, "ets")
        with quiet():
            if not levels:
                return np.asarray(res.forecast(horizon), dtype=float)
            factor = residual_variance_factor(res)
            if not np.isfinite(factor):
                return np.asarray(res.forecast(horizon), dtype=float)
            if res.model.short_name in ANALYTIC:
                pred = res.get_prediction(start=self.nobs_, end=self.nobs_ + horizon - 1)
                point = np.asarray(pred.predicted_mean, dtype=float)
                sd = np.sqrt(np.asarray(pred.var_pred_mean, dtype=float) * factor)
                return with_bounds(point, normal_bounds(point, sd, levels))
            point = np.asarray(res.forecast(horizon), dtype=float)
            # statsmodels draws N(0, scale) errors itself; drawing them here lets the scale be
            # castgrid's (same seed, same draws, same paths for the same fit).
            rng = np.random.default_rng(SIMULATION_SEED)
            errors = rng.standard_normal((horizon, SIMULATIONS)) * np.sqrt(res.scale * factor)
            paths = np.asarray(
                res.simulate(horizon, anchor="end", repetitions=SIMULATIONS, random_errors=errors),
                dtype=float,
            ).reshape(horizon, SIMULATIONS)
        bounds = {
            lv: np.quantile(paths, [0.5 - lv / 200.0, 0.5 + lv / 200.0], axis=1).T
            for lv in levels
        }
        return with_bounds(point, bounds)


def residual_variance_factor(res: Any) -> float:
    """``T / (T - K)`` of a fitted statsmodels ETS model.

    statsmodels estimates every initial seasonal state but pins the last one (0 or 1) by its
    bounds, so that parameter is not free; user-fixed parameters are not free either.
    """
    free = len(res.params) - len(res.fixed_params) - (1 if res.model.seasonal else 0)
    return dof_factor(int(res.nobs), free)
