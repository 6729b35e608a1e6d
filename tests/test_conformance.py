"""runner.testing.check_forecaster: every built-in passes; each broken plugin fails its check."""

from __future__ import annotations

import threading

import numpy as np
import pytest

from runner.forecasters.contract import Forecast
from runner.forecasters.registry import BUILTIN, KINDS, load_entry
from runner.testing import (
    CHECKS,
    RecordingForecaster,
    check_forecaster,
    clone,
    get_params,
)

# Small params where the defaults would make the suite slow (a seasonal order search per fit).
# The seasonal search is covered in test_models; one seasonal SARIMA fit can take seconds.
FAST_PARAMS = {"arima_search": {"p_up_to": 1, "q_up_to": 1, "fits_up_to": 6, "seasonal": False}}


# Derived kinds (combinations, selections) and recorded ones have no fit / predict: their
# forecasts are computed from other forecasters' (tests/test_derived.py) or read from a file
# (tests/test_recorded.py).
FORECASTING_KINDS = sorted(k.name for k in KINDS if not (k.derived or k.from_file))


@pytest.mark.parametrize("kind", FORECASTING_KINDS)
def test_every_builtin_passes(kind):
    factory = load_entry(BUILTIN[kind])
    report = check_forecaster(factory, params=FAST_PARAMS.get(kind, {}))
    assert report.passed, str(report)
    assert [r.name for r in report.checks] == list(CHECKS)


def test_seasonal_arima_and_multiplicative_ets_pass():
    from runner.forecasters.models.arima import Arima
    from runner.forecasters.models.ets import ETS

    check_forecaster(
        Arima, params={"order": [1, 0, 0], "seasonal_order": [1, 0, 0]}, raise_on_failure=True
    )
    check_forecaster(
        ETS,
        params={"error": "mul", "trend": "add", "damped": True, "seasonal": "mul"},
        raise_on_failure=True,
    )


def test_the_recording_fake_passes():
    check_forecaster(RecordingForecaster, raise_on_failure=True)


def test_an_instance_is_checked_through_clones():
    report = check_forecaster(RecordingForecaster(offset=1.5))
    assert report.passed, str(report)
    assert get_params(clone(RecordingForecaster(offset=1.5))) == {"offset": 1.5}


# ------------------------------------------------------------------ deliberately broken plugins


class Good:
    """Last value, with intervals from the spread of one-step changes (a correct plugin)."""

    version = "1"

    def __init__(self, scale: float = 1.0) -> None:
        self.scale = scale

    def fit(self, y, *, season, covariates=None):
        y = np.asarray(y, dtype=float)
        if y.shape[0] < 2:
            raise ValueError("Good: needs at least 2 values")
        self.last_ = float(y[-1])
        self.sd_ = float(np.std(np.diff(y))) * self.scale
        return self

    def predict(self, horizon, *, covariates=None, levels=()):
        point = np.full(horizon, self.last_)
        half = {
            lv: 1.3 * (lv / 80.0) * self.sd_ * np.sqrt(np.arange(1, horizon + 1)) for lv in levels
        }
        return Forecast(
            point,
            {lv: point - w for lv, w in half.items()},
            {lv: point + w for lv, w in half.items()},
        )


class NoLevelsKeyword(Good):
    def predict(self, horizon, *, covariates=None):
        return np.full(horizon, self.last_)


class TakesKwargs(Good):
    def __init__(self, **kwargs) -> None:
        self.scale = kwargs.get("scale", 1.0)


class FitsInInit(Good):
    def __init__(self, scale: float = 1.0) -> None:
        self.scale = scale
        self.last_ = 0.0


class ConvertsParam(Good):
    def __init__(self, scale: float = 1.0) -> None:
        self.scale = float(scale) * 2


class FitReturnsNone(Good):
    def fit(self, y, *, season, covariates=None):
        super().fit(y, season=season)


class FitChangesParam(Good):
    def fit(self, y, *, season, covariates=None):
        self.scale = 0.5
        return super().fit(y, season=season)


class PlainFittedName(Good):
    def fit(self, y, *, season, covariates=None):
        super().fit(y, season=season)
        self.level = self.last_
        return self


class WrongLength(Good):
    def predict(self, horizon, *, covariates=None, levels=()):
        return np.full(horizon + 1, self.last_)


class NaNForecast(Good):
    def predict(self, horizon, *, covariates=None, levels=()):
        return np.full(horizon, np.nan)


class MutatesInput(Good):
    def fit(self, y, *, season, covariates=None):
        y -= y.mean()  # writes into the caller's array
        return super().fit(y, season=season)


class HoldsALock(Good):
    def __init__(self, scale: float = 1.0) -> None:
        self.scale = scale
        self._lock = threading.Lock()


class FittedLambda(Good):
    def fit(self, y, *, season, covariates=None):
        super().fit(y, season=season)
        self.step_ = lambda k: k * 0.0
        return self


class Unseeded(Good):
    def predict(self, horizon, *, covariates=None, levels=()):
        return np.full(horizon, self.last_) + np.random.default_rng().normal(size=horizon)


class RemembersEveryFit(Good):
    def fit(self, y, *, season, covariates=None):
        self.seen_ = getattr(self, "seen_", []) + [float(np.mean(y))]
        super().fit(y, season=season)
        self.last_ = float(np.mean(self.seen_))
        return self


class IndexErrorWhenShort(Good):
    def fit(self, y, *, season, covariates=None):
        self.last_ = float(y[-1])
        self.sd_ = abs(float(y[-1] - y[-2]))
        return self


class AcceptsEmpty(Good):
    def fit(self, y, *, season, covariates=None):
        self.last_ = float(np.sum(y))
        self.sd_ = 1.0
        return self


class BoundsSwapped(Good):
    def predict(self, horizon, *, covariates=None, levels=()):
        f = super().predict(horizon, levels=levels)
        return Forecast(f.point, f.upper, f.lower)


class NarrowerAt95(Good):
    def predict(self, horizon, *, covariates=None, levels=()):
        point = np.full(horizon, self.last_)
        w = {lv: (100.0 - lv) * 0.1 + 0.01 for lv in levels}
        return Forecast(
            point, {lv: point - v for lv, v in w.items()}, {lv: point + v for lv, v in w.items()}
        )


class BreaksOnCovariates(Good):
    uses_covariates = True

    def fit(self, y, *, season, covariates=None):
        if covariates is not None:
            y = y - covariates[:, 1]  # assumes two covariate columns
        return super().fit(y, season=season)


# (plugin, the check its fault is about, every check it fails: some faults rightly break more)
CASCADE = ("picklable_fitted", "deterministic", "refit_independent", "too_short_series")
BROKEN = [
    (
        NoLevelsKeyword,
        "protocol",
        {"protocol", "deterministic", "refit_independent", "too_short_series", "intervals_ordered"},
    ),
    (TakesKwargs, "init_stores_params", {"init_stores_params", "clone_equal_params"}),
    (FitsInInit, "init_stores_params", {"init_stores_params"}),
    (ConvertsParam, "init_stores_params", {"init_stores_params", "clone_equal_params"}),
    (FitReturnsNone, "fit_returns_self", {"fit_returns_self"}),
    (FitChangesParam, "fit_keeps_params", {"fit_keeps_params"}),
    (PlainFittedName, "fitted_attributes_underscore", {"fitted_attributes_underscore"}),
    (WrongLength, "predict_shape", {"predict_shape", "covariates", *CASCADE}),
    (NaNForecast, "predict_shape", {"predict_shape", "covariates", *CASCADE}),
    (MutatesInput, "no_input_mutation", {"no_input_mutation"}),
    (HoldsALock, "picklable_unfitted", {"picklable_unfitted", "picklable_fitted"}),
    (FittedLambda, "picklable_fitted", {"picklable_fitted"}),
    (Unseeded, "deterministic", {"picklable_fitted", "deterministic", "refit_independent"}),
    (RemembersEveryFit, "refit_independent", {"refit_independent"}),
    (IndexErrorWhenShort, "too_short_series", {"too_short_series"}),
    (AcceptsEmpty, "too_short_series", {"too_short_series"}),
    (BoundsSwapped, "intervals_ordered", {"intervals_ordered"}),
    (NarrowerAt95, "intervals_ordered", {"intervals_ordered"}),
    (BreaksOnCovariates, "covariates", {"covariates"}),
]


def test_the_correct_plugin_passes():
    report = check_forecaster(Good)
    assert report.passed, str(report)
    assert report.result("intervals_ordered").status == "pass"
    assert report.result("covariates").status == "pass"  # plugins receive covariates


@pytest.mark.parametrize("cls, check, fails", BROKEN, ids=[c[0].__name__ for c in BROKEN])
def test_a_broken_plugin_fails_its_named_check(cls, check, fails):
    report = check_forecaster(cls)
    assert check in report.failed, str(report)
    assert report.result(check).message  # says why
    # ...and only the checks its fault touches: the others still pass.
    assert set(report.failed) == fails, str(report)
    with pytest.raises(AssertionError, match=check):
        check_forecaster(cls, raise_on_failure=True)


def test_a_constructor_that_raises_fails_every_check():
    def factory(**params):
        raise RuntimeError("no licence server")

    report = check_forecaster(factory)
    assert report.failed == list(CHECKS)
    assert "no licence server" in report.result("protocol").message


def test_one_check_runs_by_itself_and_unknown_names_are_refused():
    """Each check is a module-level function; ``only`` runs just the named ones."""
    from runner.forecasters import conformance

    report = check_forecaster(RecordingForecaster, only=("fit_returns_self", "protocol"))
    assert [r.name for r in report.checks] == ["protocol", "fit_returns_self"]  # CHECKS order
    assert report.passed
    assert all(callable(getattr(conformance, f"check_{name}")) for name in CHECKS)
    with pytest.raises(ValueError, match="unknown check 'no_such_check'"):
        check_forecaster(RecordingForecaster, only=("no_such_check",))
