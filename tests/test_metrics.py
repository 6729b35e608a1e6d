"""Metrics (runner.scoring.metrics) against scikit-learn and the published definitions."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import (
    mean_absolute_error,
    mean_absolute_percentage_error,
    mean_pinball_loss,
    mean_squared_error,
    r2_score,
)

from runner.scoring import metrics as M


@pytest.fixture
def data():
    rng = np.random.default_rng(42)
    actual = rng.normal(100, 10, size=(50, 8))
    forecast = actual + rng.normal(0, 5, size=actual.shape)
    return actual, forecast


def _score(cols, actual, forecast, levels=(), lower=None, upper=None, mase=None, rmsse=None):
    n, h = actual.shape
    lower = np.full((len(levels), n, h), np.nan) if lower is None else lower
    upper = np.full((len(levels), n, h), np.nan) if upper is None else upper
    mase = np.ones(n) if mase is None else mase
    rmsse = np.ones(n) if rmsse is None else rmsse
    return M.score_tasks(cols, actual, forecast, lower, upper, levels, mase, rmsse)


def test_point_metrics_match_sklearn_per_task(data):
    # Source: scikit-learn's mean_absolute_error, mean_squared_error, r2_score and
    # mean_absolute_percentage_error (a fraction there, a percentage here).
    actual, forecast = data
    s = _score(["mae", "mse", "rmse", "r2", "mape", "me"], actual, forecast)
    for i in range(len(actual)):
        y, f = actual[i], forecast[i]
        assert s["mae"].per_task[i] == pytest.approx(mean_absolute_error(y, f))
        assert s["mse"].per_task[i] == pytest.approx(mean_squared_error(y, f))
        assert s["rmse"].per_task[i] == pytest.approx(np.sqrt(mean_squared_error(y, f)))
        assert s["r2"].per_task[i] == pytest.approx(r2_score(y, f))
        assert s["mape"].per_task[i] == pytest.approx(100 * mean_absolute_percentage_error(y, f))
        assert s["me"].per_task[i] == pytest.approx(np.mean(y - f))


def test_per_step_scores_pool_over_tasks(data):
    actual, forecast = data
    s = _score(["mae", "rmse"], actual, forecast)
    for h in range(actual.shape[1]):
        assert s["mae"].per_step[h] == pytest.approx(
            mean_absolute_error(actual[:, h], forecast[:, h]))
        assert s["rmse"].per_step[h] == pytest.approx(
            np.sqrt(mean_squared_error(actual[:, h], forecast[:, h])))


def test_smape_m4_definition():
    # Source: M4 competitor's guide, sMAPE = 2/h * sum |y - f| / (|y| + |f|) * 100.
    y = np.array([[10.0, 20.0, 30.0]])
    f = np.array([[12.0, 18.0, 33.0]])
    expected = 200 / 3 * (2 / 22 + 2 / 38 + 3 / 63)
    assert _score(["smape"], y, f)["smape"].per_task[0] == pytest.approx(expected)


def test_mase_and_rmsse_scaling():
    # Hyndman & Koehler (2006): MASE = MAE / in-sample (seasonal) naive MAE; M5 guide:
    # RMSSE = sqrt(MSE / in-sample mean squared one-step naive error).
    y = np.array([[3.0, 5.0]])
    f = np.array([[1.0, 4.0]])
    s = _score(["mase", "rmsse"], y, f, mase=np.array([2.0]), rmsse=np.array([4.0]))
    assert s["mase"].per_task[0] == pytest.approx(1.5 / 2.0)
    assert s["rmsse"].per_task[0] == pytest.approx(np.sqrt(2.5 / 4.0))


def test_zero_denominators_are_nan_and_flagged_never_inf():
    y = np.array([[0.0, 1.0], [2.0, 2.0]])
    f = np.array([[0.0, 1.5], [2.0, 2.0]])
    s = _score(["mape", "mase", "r2", "smape"], y, f, mase=np.array([0.0, 1.0]))
    assert np.isnan(s["mape"].per_task[0]) and s["mape"].undefined[0]
    assert np.isnan(s["mase"].per_task[0]) and s["mase"].undefined[0]
    assert np.isnan(s["r2"].per_task[1]) and s["r2"].undefined[1]  # constant test block
    assert np.isnan(s["smape"].per_task[0]) and s["smape"].undefined[0]  # 0/0 at step 1
    for sc in s.values():
        assert not np.isinf(sc.per_task).any()


def test_interval_metrics():
    # Winkler (1972) interval score in the form of Gneiting & Raftery (2007) eq. 43;
    # pinball loss against scikit-learn's mean_pinball_loss at the two bound quantiles.
    rng = np.random.default_rng(1)
    y = rng.normal(size=(30, 5))
    f = np.zeros_like(y)
    lo = f[None] - 1.2816
    hi = f[None] + 1.2816
    s = _score(["coverage_80", "winkler_80", "pinball_80"], y, f, levels=(80.0,), lower=lo,
               upper=hi)
    inside = (y >= lo[0]) & (y <= hi[0])
    assert s["coverage_80"].per_task == pytest.approx(100 * inside.mean(axis=1))
    a = 0.2
    wk = (hi[0] - lo[0]) + 2 / a * np.clip(lo[0] - y, 0, None) + 2 / a * np.clip(y - hi[0], 0, None)
    assert s["winkler_80"].per_task == pytest.approx(wk.mean(axis=1))
    for i in range(len(y)):
        ref = (mean_pinball_loss(y[i], lo[0, i], alpha=0.1)
               + mean_pinball_loss(y[i], hi[0, i], alpha=0.9)) / 2
        assert s["pinball_80"].per_task[i] == pytest.approx(ref)


def test_failed_rows_are_nan_not_undefined(data):
    actual, forecast = data
    forecast = forecast.copy()
    forecast[3] = np.nan
    s = _score(["mae"], actual, forecast)
    assert np.isnan(s["mae"].per_task[3]) and not s["mae"].undefined[3]
    assert np.isfinite(s["mae"].per_step).all()
