"""Panel forecasters (``kind: panel_plugin``) for the tests: a spy that records everything it is
given, ones that fail on purpose at one origin, and ones that break one rule of the panel
protocol each (for the conformance checks)."""

from __future__ import annotations

import dataclasses
import os
import time

import numpy as np

from runner.forecasters.contract import PanelForecast, PanelHistory


def _times_text(times: np.ndarray) -> list[str]:
    if times.dtype.kind == "M":
        return [str(t) for t in np.datetime_as_string(times, unit="D")]
    return [str(int(t)) for t in times]


class LastValues:
    """Each requested series' last value for every step, plus ``bump`` times the mean of its
    forecast-period covariates (0 without covariates). Honours the whole panel protocol."""

    version = "1"

    def __init__(self, bump: float = 0.0) -> None:
        self.bump = bump

    def fit(self, history: PanelHistory):
        if history.n_series == 0:
            raise ValueError("LastValues: the history has no series")
        self.last_ = history.values[history.offsets[1:] - 1].copy()
        return self

    def predict(self, horizon, *, series, covariates=None, levels=()):
        point = np.repeat(self.last_[series][:, None], horizon, axis=1)
        if covariates is not None and self.bump:
            point = point + self.bump * covariates.mean(axis=2)
        return point


class Spy(LastValues):
    """Records in ``info_`` every field of the history record, the requested series and the
    forecast-period covariates it was given (times as ISO dates)."""

    def fit(self, history: PanelHistory):
        self.info_ = {
            "fields": [f.name for f in dataclasses.fields(history)],
            "keys": list(history.keys),
            "offsets": history.offsets.tolist(),
            "values": history.values.tolist(),
            "positions": history.positions.tolist(),
            "times": _times_text(history.times),
            "covariates": None if history.covariates is None else history.covariates.tolist(),
            "covariate_names": list(history.covariate_names),
            "static": {k: v.tolist() for k, v in history.static.items()},
            "attributes": {k: v.tolist() for k, v in history.attributes.items()},
            "origin": int(history.origin),
            "origin_time": _times_text(np.asarray([history.origin_time]))[0],
            "season": int(history.season),
            "frequency": history.frequency,
        }
        return super().fit(history)

    def predict(self, horizon, *, series, covariates=None, levels=()):
        self.info_["series"] = np.asarray(series).tolist()
        self.info_["future"] = None if covariates is None else covariates.tolist()
        self.info_["steps"] = int(horizon)
        return super().predict(horizon, series=series, covariates=covariates, levels=levels)


class FailsAtOrigin(LastValues):
    """Raises the builtin exception ``error`` in fit at the origin at position ``when``."""

    def __init__(self, when: int = -1, error: str = "ValueError") -> None:
        super().__init__()
        self.when = when
        self.error = error

    def fit(self, history):
        if history.origin == self.when:
            import builtins

            raise getattr(builtins, self.error)(f"refusing origin {history.origin}")
        return super().fit(history)


class SleepsAtOrigin(LastValues):
    """Sleeps ``seconds`` in fit at the origin at position ``when``, swallowing every exception
    meanwhile (so only killing its process stops it)."""

    def __init__(self, when: int = -1, seconds: float = 600.0) -> None:
        super().__init__()
        self.when = when
        self.seconds = seconds

    def fit(self, history):
        if history.origin == self.when:
            end = time.monotonic() + self.seconds
            while time.monotonic() < end:
                try:
                    time.sleep(0.05)
                except BaseException:  # noqa: B036 - the point of this plugin
                    pass
        return super().fit(history)


class ExitsAtOrigin(LastValues):
    """Ends its process with ``os._exit(3)`` at the origin at position ``when``."""

    def __init__(self, when: int = -1) -> None:
        super().__init__()
        self.when = when

    def fit(self, history):
        if history.origin == self.when:
            os._exit(3)
        return super().fit(history)


class NanFor(LastValues):
    """Forecasts NaN for the series called ``key`` (at every origin), the last value for the
    others."""

    def __init__(self, key: str = "") -> None:
        super().__init__()
        self.key = key

    def fit(self, history):
        self.keys_ = history.keys
        return super().fit(history)

    def predict(self, horizon, *, series, covariates=None, levels=()):
        point = super().predict(horizon, series=series)
        point[[self.keys_[i] == self.key for i in series]] = np.nan
        return point


# ---------------------------------------------------------------- one broken rule each


class NoPredict:
    """Breaks ``protocol``: no predict."""

    def __init__(self) -> None:
        pass

    def fit(self, history):
        return self


class StarKwargs(LastValues):
    """Breaks ``init_stores_params``: takes ``**kwargs``."""

    def __init__(self, **kwargs) -> None:
        self.bump = kwargs.get("bump", 0.0)


class FitReturnsNone(LastValues):
    """Breaks ``fit_returns_self``."""

    def fit(self, history):
        super().fit(history)
        return None


class ChangesParam(LastValues):
    """Breaks ``fit_keeps_params``: fit overwrites its parameter."""

    def fit(self, history):
        self.bump = float(history.n_series)
        return super().fit(history)


class PlainAttribute(LastValues):
    """Breaks ``fitted_attributes_underscore``: fitted state in a name without ``_``."""

    def fit(self, history):
        super().fit(history)
        self.fitted = True
        return self


class Transposed(LastValues):
    """Breaks ``predict_shape``: returns (horizon, series)."""

    def predict(self, horizon, *, series, covariates=None, levels=()):
        return super().predict(horizon, series=series).T.copy()


class SelectionDependent(LastValues):
    """Breaks ``rows_match_series``: every row is the mean over the requested series."""

    def predict(self, horizon, *, series, covariates=None, levels=()):
        point = super().predict(horizon, series=series)
        return np.repeat(point.mean(axis=0, keepdims=True), len(series), axis=0)


class Mutates(LastValues):
    """Breaks ``no_input_mutation``: scales the history's values in place."""

    def fit(self, history):
        history.values[:] = history.values * 2.0
        return super().fit(history)


class Unpicklable(LastValues):
    """Breaks ``picklable_fitted``: keeps a lambda once fitted."""

    def fit(self, history):
        self.transform_ = lambda v: v
        return super().fit(history)


class Noisy(LastValues):
    """Breaks ``deterministic``: adds unseeded noise."""

    def predict(self, horizon, *, series, covariates=None, levels=()):
        point = super().predict(horizon, series=series)
        return point + np.random.default_rng().normal(0.0, 1.0, point.shape)


class Remembers(LastValues):
    """Breaks ``refit_independent``: counts its fits and adds the count."""

    def fit(self, history):
        self.fits_ = getattr(self, "fits_", 0) + 1
        return super().fit(history)

    def predict(self, horizon, *, series, covariates=None, levels=()):
        return super().predict(horizon, series=series) + self.fits_


class ShortFails(LastValues):
    """Breaks ``short_series``: refuses the whole origin when any series has under 5 values."""

    def fit(self, history):
        if np.diff(history.offsets).min() < 5:
            raise ValueError("ShortFails: a series has fewer than 5 values")
        return super().fit(history)


class NeedsCovariates(LastValues):
    """Breaks ``no_covariates``: assumes the dataset has covariates."""

    def fit(self, history):
        self.first_covariate_mean_ = float(history.covariates[:, 0].mean())
        return super().fit(history)


class WideIntervals(LastValues):
    """Breaks ``intervals_ordered``: its 80% interval is wider than its 95% one."""

    def predict(self, horizon, *, series, covariates=None, levels=()):
        point = super().predict(horizon, series=series)
        half = {80.0: 2.0, 95.0: 1.0}
        return PanelForecast(point, {lv: point - half.get(lv, 1.0) for lv in levels},
                             {lv: point + half.get(lv, 1.0) for lv in levels})


#: class name -> the conformance check it (and only it) fails
BROKEN = {
    "NoPredict": "protocol",
    "StarKwargs": "init_stores_params",
    "FitReturnsNone": "fit_returns_self",
    "ChangesParam": "fit_keeps_params",
    "PlainAttribute": "fitted_attributes_underscore",
    "Transposed": "predict_shape",
    "SelectionDependent": "rows_match_series",
    "Mutates": "no_input_mutation",
    "Unpicklable": "picklable_fitted",
    "Noisy": "deterministic",
    "Remembers": "refit_independent",
    "ShortFails": "short_series",
    "NeedsCovariates": "no_covariates",
    "WideIntervals": "intervals_ordered",
}
