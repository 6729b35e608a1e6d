"""The forecaster contract: what every forecaster, built-in or plugin, offers and returns.

A forecaster is a class (or factory) built with its config ``params`` as keyword arguments,
offering the two methods of :class:`Forecaster`. castgrid builds a fresh object for every
(series, fold) task, calls ``fit`` once on the training slice and ``predict`` once, so nothing
fitted leaks between folds. The registry (:mod:`runner.forecasters.registry`), the check of a
config's forecasters (:mod:`runner.forecasters.validation`) and the conformance checks
(:mod:`runner.forecasters.conformance`) all read the protocol from this module.
"""

from __future__ import annotations

import inspect
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Protocol, runtime_checkable

import numpy as np


@dataclass(frozen=True)
class Forecast:
    """Point forecasts for ``horizon`` steps and, per interval level, lower and upper bounds.

    ``levels`` are central interval levels in percent (80 means the 10% and 90% quantiles).

    >>> f = Forecast(np.array([1.0, 2.0]), lower={80.0: np.array([0.5, 1.0])},
    ...              upper={80.0: np.array([1.5, 3.0])})
    >>> f.horizon
    2
    """

    point: np.ndarray
    lower: Mapping[float, np.ndarray] = field(default_factory=dict)
    upper: Mapping[float, np.ndarray] = field(default_factory=dict)

    @property
    def horizon(self) -> int:
        """Number of forecast steps."""
        return int(np.shape(self.point)[0])


def as_forecast(value: object, horizon: int, levels: tuple[float, ...]) -> Forecast:
    """Normalise what ``predict`` returned into a checked :class:`Forecast`.

    Raises ``ValueError`` with a readable reason when the shape is wrong, a value is NaN or
    infinite, or a requested interval level is missing.
    """
    if isinstance(value, Forecast):
        point = np.asarray(value.point, dtype=float)
        lower = {float(k): np.asarray(v, dtype=float) for k, v in value.lower.items()}
        upper = {float(k): np.asarray(v, dtype=float) for k, v in value.upper.items()}
    else:
        point = np.asarray(value, dtype=float)
        lower, upper = {}, {}
    if point.shape != (horizon,):
        raise ValueError(f"predict returned shape {point.shape}, expected ({horizon},)")
    if not np.all(np.isfinite(point)):
        raise ValueError("predict returned NaN or infinite point forecasts")
    for level in levels:
        if level not in lower or level not in upper:
            continue  # a forecaster without intervals leaves the bounds empty (NaN)
        for name, bound in (("lower", lower[level]), ("upper", upper[level])):
            if bound.shape != (horizon,):
                raise ValueError(
                    f"predict returned {name} bound at {level:g}% of shape {bound.shape}, "
                    f"expected ({horizon},)"
                )
    return Forecast(point, lower, upper)


@runtime_checkable
class Forecaster(Protocol):
    """The per-series forecaster protocol.

    ``fit(y, *, season, covariates=None)`` receives the training values of one series as a
    1-D float64 array (oldest first, no missing values), the season length (1 when there is
    none) and, for forecasters that take them, the known-in-advance covariates of the training
    period as a 2-D array (one row per observation). It returns the forecaster itself.

    ``predict(horizon, *, covariates=None, levels=())`` returns ``horizon`` point forecasts as
    a 1-D array, or a :class:`Forecast` that also holds, for each requested central interval
    level in percent (80 means the 10% and 90% quantiles), the lower and upper bounds.
    ``covariates`` then holds the covariates of the forecast period (``horizon`` rows).

    A forecaster never sees a value of the series dated after its training slice. It raises
    ``ValueError`` with a message when it cannot forecast (a series too short, say); the task
    is then recorded as failed with that message.
    """

    def fit(
        self, y: np.ndarray, *, season: int, covariates: np.ndarray | None = None
    ) -> Any: ...

    def predict(
        self,
        horizon: int,
        *,
        covariates: np.ndarray | None = None,
        levels: tuple[float, ...] = (),
    ) -> np.ndarray | Forecast: ...


def _keywords(method: Any) -> tuple[str, ...]:
    return tuple(p.name for p in inspect.signature(method).parameters.values()
                 if p.kind is p.KEYWORD_ONLY)


#: Keyword arguments each protocol method must accept (beyond its first positional one),
#: read off :class:`Forecaster`.
PROTOCOL: dict[str, tuple[str, ...]] = {
    "fit": _keywords(Forecaster.fit),
    "predict": _keywords(Forecaster.predict),
}
PROTOCOL_TEXT = (
    "fit(y, *, season, covariates=None) -> self and "
    "predict(horizon, *, covariates=None, levels=()) -> array or Forecast"
)
_FIRST_ARGUMENT = {"fit": "y", "predict": "horizon"}


def protocol_problem(obj: Any) -> str | None:
    """Why ``obj`` does not offer the forecaster protocol's methods, or None when it does.

    Looks at the methods only (presence and the keywords they accept), never calls them.
    """
    for method, keywords in PROTOCOL.items():
        fn = getattr(obj, method, None)
        if fn is None or not callable(fn):
            return f"has no {method} method (a forecaster needs {PROTOCOL_TEXT})"
        try:
            sig = inspect.signature(fn)
        except (TypeError, ValueError):
            continue  # a builtin or C callable: nothing to read, let the run show it
        params = list(sig.parameters.values())
        if any(p.kind is p.VAR_KEYWORD for p in params):
            continue
        names = {p.name for p in params if p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD)}
        missing = [k for k in keywords if k not in names]
        if missing:
            return f"{method} does not accept the keyword {missing[0]!r} (expected {PROTOCOL_TEXT})"
        positional = [p for p in params if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
        if not positional and not any(p.kind is p.VAR_POSITIONAL for p in params):
            return (f"{method} takes no positional argument for {_FIRST_ARGUMENT[method]} "
                    f"(expected {PROTOCOL_TEXT})")
    return None
