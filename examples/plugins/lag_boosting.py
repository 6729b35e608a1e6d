"""An example model trained across series: gradient-boosted trees on lag features.

A castgrid panel plugin (``kind: panel_plugin``): at every origin castgrid builds a fresh
``LagBoosting``, calls ``fit`` once with the history of every series of the dataset up to the
origin, and ``predict`` once for the series that have that origin. One scikit-learn
``HistGradientBoostingRegressor`` is fit on the rows of all series together.

Features of the value at position ``t`` of a series (in this column order):

1. ``lag_1 ... lag_p``: the values at ``t - 1 ... t - p`` (``p = lags``);
2. ``seasonal_lag_1 ... seasonal_lag_q``: the values at ``t - m, t - 2m, ... t - qm``
   (``q = seasonal_lags``, ``m`` the season length; left out when ``m`` is 1; a seasonal lag
   equal to an ordinary one is not repeated);
3. ``phase``: ``t mod m``, the point of the season (left out when ``m`` is 1);
4. the dataset's known-in-advance covariates at ``t`` (e.g. a promotion flag), when given.

Values (the target and its lags) are divided by the series' recent level, the mean absolute
value of its last ``max(m, lags)`` values up to the origin (1 when that is 0), so series of
different sizes share one model; forecasts are multiplied back. The recent level rather than the
whole history's: trees cannot extrapolate, and a growing series divided by its long-run mean
would end its history above every value the trees were fit on.

Multi-step forecasts are **recursive**: the model forecasts one step ahead, and step ``k + 1``
uses the forecasts of steps ``1 ... k`` in place of the lags not yet observed. One model per
origin then serves every step (``fit`` is not told the horizon); the price is that errors of
early steps feed into later ones. A series with fewer than ``max(lags, q * m)`` values cannot
fill its lags: its row of the forecast is NaN, which castgrid records as a failed task of that
series only. No prediction intervals.

Use it from a config (with this folder on PYTHONPATH, scikit-learn installed: ``pip install
"castgrid[examples]"``)::

    models:
      - name: lag-boosting
        kind: panel_plugin
        entry: lag_boosting:LagBoosting
        params: {lags: 3, seasonal_lags: 2}
"""

from __future__ import annotations

from typing import Any

import numpy as np
from sklearn.ensemble import HistGradientBoostingRegressor

from runner import PanelHistory


def _whole(name: str, value: Any, low: int) -> None:
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        raise ValueError(f"{name}: expected an integer >= {low}, got {value!r}")


def _number(name: str, value: Any, low: float, high: float | None = None) -> None:
    bad = isinstance(value, bool) or not isinstance(value, (int, float))
    if bad or value < low or (high is not None and value > high):
        where = f">= {low:g}" if high is None else f"in [{low:g}, {high:g}]"
        raise ValueError(f"{name}: expected a number {where}, got {value!r}")


def lag_list(lags: int, seasonal_lags: int, season: int) -> list[int]:
    """The lags of the features, in column order: ``1 ... lags``, then the seasonal ones."""
    out = list(range(1, lags + 1))
    if season > 1:
        out += [season * j for j in range(1, seasonal_lags + 1) if season * j > lags]
    return out


class LagBoosting:
    """Histogram gradient boosting on lag, seasonal-lag, phase and covariate features, fit once
    per origin on every series (recursive multi-step forecasts).

    Parameters
    ----------
    lags:
        Number of ordinary lags (values 1 ... ``lags`` steps back), an integer >= 1.
    seasonal_lags:
        Number of seasonal lags (1 ... ``seasonal_lags`` seasons back), an integer >= 0.
    max_iter, learning_rate, max_leaf_nodes, min_samples_leaf, l2_regularization:
        Passed to ``HistGradientBoostingRegressor`` (squared error, no early stopping, so a
        fit uses no random validation split and is deterministic).
    """

    version = "1"
    uses_covariates = True  # the promotion flag of the demo data is a feature

    def __init__(
        self,
        lags: int = 3,
        seasonal_lags: int = 2,
        max_iter: int = 200,
        learning_rate: float = 0.05,
        max_leaf_nodes: int = 15,
        min_samples_leaf: int = 20,
        l2_regularization: float = 0.0,
    ) -> None:
        # Only check and store: castgrid rebuilds, pickles and hashes these parameters.
        _whole("lags", lags, 1)
        _whole("seasonal_lags", seasonal_lags, 0)
        _whole("max_iter", max_iter, 1)
        _number("learning_rate", learning_rate, 1e-6, 1.0)
        _whole("max_leaf_nodes", max_leaf_nodes, 2)
        _whole("min_samples_leaf", min_samples_leaf, 1)
        _number("l2_regularization", l2_regularization, 0.0)
        self.lags = lags
        self.seasonal_lags = seasonal_lags
        self.max_iter = max_iter
        self.learning_rate = learning_rate
        self.max_leaf_nodes = max_leaf_nodes
        self.min_samples_leaf = min_samples_leaf
        self.l2_regularization = l2_regularization

    def _design(self, lagged: list[np.ndarray], phase: np.ndarray,
                cov: np.ndarray | None) -> np.ndarray:
        """Feature rows from the lagged scaled values (one array per lag), the phases and the
        covariate rows, in the documented column order."""
        cols = list(lagged)
        if self.season_ > 1:
            cols.append(phase.astype(float))
        if cov is not None:
            cols.extend(cov.T)
        return np.column_stack(cols)

    def fit(self, history: PanelHistory) -> LagBoosting:
        """Build the feature rows of every series and fit one regressor on all of them."""
        self.season_ = int(history.season)
        self.lags_ = lag_list(self.lags, self.seasonal_lags, self.season_)
        depth = max(self.lags_)
        n = history.n_series
        self.scale_ = np.ones(n)
        self.tail_ = np.full((n, depth), np.nan)  # each series' last `depth` scaled values
        x_parts, y_parts = [], []
        for i in range(n):
            y = history.series_values(i)
            scale = float(np.mean(np.abs(y[-max(self.season_, self.lags) :])))
            self.scale_[i] = scale if scale > 0 else 1.0
            z = y / self.scale_[i]
            keep = min(depth, len(z))
            self.tail_[i, depth - keep :] = z[len(z) - keep :]
            if len(z) <= depth:
                continue  # too short for one complete feature row
            t = np.arange(depth, len(z))
            cov = history.series_covariates(i)
            phase = history.series_positions(i)[t] % max(self.season_, 1)
            lagged = [z[t - lag] for lag in self.lags_]
            x_parts.append(self._design(lagged, phase, None if cov is None else cov[t]))
            y_parts.append(z[t])
        if not x_parts:
            raise ValueError(
                f"LagBoosting: no series has more than {depth} values (the longest lag), so "
                "there is nothing to learn from"
            )
        self.uses_covariates_ = history.covariates is not None
        self.origin_ = int(history.origin)
        self.model_ = HistGradientBoostingRegressor(
            loss="squared_error",
            learning_rate=self.learning_rate,
            max_iter=self.max_iter,
            max_leaf_nodes=self.max_leaf_nodes,
            min_samples_leaf=self.min_samples_leaf,
            l2_regularization=self.l2_regularization,
            early_stopping=False,
            random_state=0,
        ).fit(np.concatenate(x_parts), np.concatenate(y_parts))
        self.info_ = {"training_rows": int(sum(len(p) for p in y_parts))}
        return self

    def predict(
        self,
        horizon: int,
        *,
        series: np.ndarray,
        covariates: np.ndarray | None = None,
        levels: tuple[float, ...] = (),
    ) -> np.ndarray:
        """Recursive forecasts of ``horizon`` steps for each of ``series`` (one row each)."""
        if not hasattr(self, "model_"):
            raise RuntimeError("LagBoosting: call fit before predict")
        if self.uses_covariates_ and covariates is None:
            raise ValueError("LagBoosting: fit with covariates, so predict needs them too")
        series = np.asarray(series, dtype=np.int64)
        depth = max(self.lags_)
        buf = np.full((len(series), depth + horizon), np.nan)
        buf[:, :depth] = self.tail_[series]
        ready = ~np.isnan(buf[:, :depth]).any(axis=1)  # rows whose every lag is known
        for k in range(horizon):
            t = depth + k  # column of step k + 1 in buf; earlier columns hold its lags
            lagged = [buf[:, t - lag] for lag in self.lags_]
            phase = np.full(len(series), (self.origin_ + 1 + k) % max(self.season_, 1))
            cov = covariates[:, k, :] if self.uses_covariates_ else None
            rows = self._design(lagged, phase, cov)
            if ready.any():
                buf[ready, t] = self.model_.predict(rows[ready])
        return buf[:, depth:] * self.scale_[series][:, None]
