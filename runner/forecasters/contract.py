"""The forecaster contracts: what every forecaster, built-in or plugin, offers and returns.

Two protocols, declared here side by side:

* :class:`Forecaster`, the per-series contract. A forecaster is a class (or factory) built with
  its config ``params`` as keyword arguments. castgrid builds a fresh object for every
  (series, fold) task, calls ``fit`` once on the training slice and ``predict`` once, so
  nothing fitted leaks between folds.
* :class:`PanelForecaster`, the contract of models trained across series (``kind:
  panel_plugin``). castgrid builds a fresh object for every (dataset, origin): one ``fit`` sees
  the history of every series of the dataset up to the origin (a :class:`PanelHistory`), and
  one ``predict`` forecasts every series that has that origin.

The registry (:mod:`runner.forecasters.registry`), the check of a config's forecasters
(:mod:`runner.forecasters.validation`) and the conformance checks
(:mod:`runner.forecasters.conformance`, :mod:`runner.forecasters.panel_conformance`) all read
the protocols from this module.
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
    return _signature_problem(obj, PROTOCOL, PROTOCOL_TEXT, _FIRST_ARGUMENT, "a forecaster")


def _signature_problem(
    obj: Any, protocol: dict[str, tuple[str, ...]], text: str, first: dict[str, str], what: str
) -> str | None:
    for method, keywords in protocol.items():
        fn = getattr(obj, method, None)
        if fn is None or not callable(fn):
            return f"has no {method} method ({what} needs {text})"
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
            return f"{method} does not accept the keyword {missing[0]!r} (expected {text})"
        positional = [p for p in params if p.kind in (p.POSITIONAL_ONLY, p.POSITIONAL_OR_KEYWORD)]
        if not positional and not any(p.kind is p.VAR_POSITIONAL for p in params):
            return (f"{method} takes no positional argument for {first[method]} "
                    f"(expected {text})")
    return None


# ----------------------------------------------------------------------------------------------
# Models trained across series: the panel contract


@dataclass(frozen=True)
class PanelHistory:
    """The history of every series of a dataset up to one origin: what a panel ``fit`` gets.

    Ragged layout, all series end to end: series ``i`` is ``values[offsets[i]:offsets[i+1]]``,
    oldest first, named ``keys[i]``. ``positions``, ``times`` and the rows of ``covariates``
    line up with ``values``.

    * ``values``: float64 target values, no missing values.
    * ``offsets``: int64, ``n_series + 1`` entries, starting at 0.
    * ``keys``: the series names (as in the results), in the dataset's order.
    * ``positions``: int64 position of each value on the dataset's time axis (0 is the
      dataset's first time; one step per observation period, shared by every series), so the
      values of different series at the same time have the same position and ``position %
      season`` is the same point of the season for every series.
    * ``times``: the time of each value (``datetime64[ns]``, or int64 for whole-number times).
    * ``covariates``: float64, one row per value, one column per name in ``covariate_names``
      (the dataset's known-in-advance columns); None when the dataset has none or the
      forecaster's class says ``uses_covariates = False``.
    * ``static``: the covariate columns that are constant within every series of this record,
      as one value per series (``static[name][i]``), read from the rows given here only.
    * ``attributes``: the dataset's series attributes (``attributes:`` of the dataset: a
      format, a region), one text per series (``attributes[name][i]``, a numpy string array).
    * ``origin``: the origin's position on the time axis: the position of the last training
      observation. Every value here is at or before it.
    * ``origin_time``: the time at ``origin`` (same type as ``times``).
    * ``season``: the dataset's season length (1 when there is none).
    * ``frequency``: the dataset's pandas offset alias (None for whole-number times).

    The record holds every series with at least one observation in the training window at
    the origin (from its first observation with ``expanding`` windows; the last ``train``
    positions up to the origin with ``sliding`` ones); a series that starts after the origin
    is not in it, not even by name. The arrays are fresh copies made for this fit.
    """

    values: np.ndarray
    offsets: np.ndarray
    keys: tuple[str, ...]
    positions: np.ndarray
    times: np.ndarray
    covariates: np.ndarray | None
    covariate_names: tuple[str, ...]
    static: Mapping[str, np.ndarray]
    attributes: Mapping[str, np.ndarray]
    origin: int
    origin_time: Any
    season: int
    frequency: str | None

    @property
    def n_series(self) -> int:
        """Number of series in the record."""
        return len(self.keys)

    def series_values(self, i: int) -> np.ndarray:
        """Values of series ``i`` (a view, oldest first)."""
        return self.values[self.offsets[i] : self.offsets[i + 1]]

    def series_positions(self, i: int) -> np.ndarray:
        """Time-axis positions of series ``i`` (a view)."""
        return self.positions[self.offsets[i] : self.offsets[i + 1]]

    def series_covariates(self, i: int) -> np.ndarray | None:
        """Covariate rows of series ``i`` (a view), or None without covariates."""
        if self.covariates is None:
            return None
        return self.covariates[self.offsets[i] : self.offsets[i + 1]]


@dataclass(frozen=True)
class PanelForecast:
    """Forecasts of several series at one origin: one row per series, one column per step.

    ``point`` has shape ``(n_series, horizon)``; ``lower`` and ``upper`` map a central interval
    level in percent to arrays of the same shape. A row of NaN in ``point`` says "no forecast
    for this series" (it fails that series' task only).
    """

    point: np.ndarray
    lower: Mapping[float, np.ndarray] = field(default_factory=dict)
    upper: Mapping[float, np.ndarray] = field(default_factory=dict)


def as_panel_forecast(
    value: object, n_series: int, horizon: int, levels: tuple[float, ...]
) -> PanelForecast:
    """Normalise what a panel ``predict`` returned into a :class:`PanelForecast` of float64.

    Raises ``ValueError`` with a readable reason when an array has the wrong shape. Non-finite
    point forecasts are kept: they fail only the series of their row
    (:func:`bad_rows`).
    """
    if isinstance(value, PanelForecast):
        point = np.asarray(value.point, dtype=float)
        lower = {float(k): np.asarray(v, dtype=float) for k, v in value.lower.items()}
        upper = {float(k): np.asarray(v, dtype=float) for k, v in value.upper.items()}
    elif isinstance(value, Forecast):
        raise ValueError(
            "predict returned a Forecast (one series); a panel forecaster returns a 2-D array "
            "or a PanelForecast with one row per requested series"
        )
    else:
        point = np.asarray(value, dtype=float)
        lower, upper = {}, {}
    expected = (n_series, horizon)
    if point.shape != expected:
        raise ValueError(
            f"predict returned shape {point.shape}, expected {expected} "
            f"({n_series} series x {horizon} steps)"
        )
    for level in levels:
        if level not in lower or level not in upper:
            continue  # a forecaster without intervals leaves the bounds empty (NaN)
        for name, bound in (("lower", lower[level]), ("upper", upper[level])):
            if bound.shape != expected:
                raise ValueError(
                    f"predict returned {name} bound at {level:g}% of shape {bound.shape}, "
                    f"expected {expected}"
                )
    return PanelForecast(point, lower, upper)


def bad_rows(fc: PanelForecast) -> np.ndarray:
    """Boolean mask of the rows of ``fc`` with a NaN or infinite point forecast."""
    return ~np.all(np.isfinite(fc.point), axis=1)


@runtime_checkable
class PanelForecaster(Protocol):
    """The protocol of models trained across series (``kind: panel_plugin``).

    At each origin castgrid builds a fresh object from the config's ``params`` and calls:

    ``fit(history)`` once. ``history`` is a :class:`PanelHistory`: the values of every series
    of the dataset up to the origin (the origin is the last training observation), their
    positions and times, the known-in-advance covariates of those rows, the series keys, the
    static covariates and series attributes, the origin, the season length and the frequency.
    Nothing dated after the origin is in it, for any series. ``fit`` returns the forecaster
    itself.

    ``predict(horizon, *, series, covariates=None, levels=())`` once. ``series`` is an int64
    array of indices into ``history.keys``: the series to forecast, those that have this origin
    (each one's last value in ``history`` is at the origin). ``covariates`` is None, or a
    float64 array of shape ``(len(series), horizon, len(history.covariate_names))``: the
    known-in-advance covariates of each requested series at the ``horizon`` steps after the
    origin. ``levels`` are central interval levels in percent (80 means the 10% and 90%
    quantiles). It returns a float64 array of shape ``(len(series), horizon)`` (row ``j`` is
    series ``series[j]``, column ``k`` is step ``k + 1``), or a :class:`PanelForecast` that also
    holds, per level, lower and upper bounds of that shape.

    The forecasts of a series must not depend on which other series are requested (the
    runner may ask for any subset; :func:`runner.testing.check_panel_forecaster` checks it). A
    row of NaN means "cannot forecast this series" and fails that series' task only; raising
    ``ValueError`` with a message fails every series at the origin with that message.
    """

    def fit(self, history: PanelHistory) -> Any: ...

    def predict(
        self,
        horizon: int,
        *,
        series: np.ndarray,
        covariates: np.ndarray | None = None,
        levels: tuple[float, ...] = (),
    ) -> np.ndarray | PanelForecast: ...


#: Keyword arguments each panel protocol method must accept (beyond its first positional one),
#: read off :class:`PanelForecaster`.
PANEL_PROTOCOL: dict[str, tuple[str, ...]] = {
    "fit": _keywords(PanelForecaster.fit),
    "predict": _keywords(PanelForecaster.predict),
}
PANEL_PROTOCOL_TEXT = (
    "fit(history) -> self and "
    "predict(horizon, *, series, covariates=None, levels=()) -> 2-D array or PanelForecast"
)
_PANEL_FIRST_ARGUMENT = {"fit": "history", "predict": "horizon"}


def panel_protocol_problem(obj: Any) -> str | None:
    """Why ``obj`` does not offer the panel forecaster protocol's methods, or None when it does.

    Looks at the methods only (presence and the keywords they accept), never calls them.
    """
    return _signature_problem(obj, PANEL_PROTOCOL, PANEL_PROTOCOL_TEXT, _PANEL_FIRST_ARGUMENT,
                              "a panel forecaster")
