"""The forecaster registry: every forecaster, built-in or plugin, is found by ``module:attribute``.

Built-in baselines and models are registered here under their ``kind`` and load through the
same path as a user's plugin (``kind: plugin`` with ``entry: mypackage.mod:Class``), so the
protocol the plugins must honour is the one the built-ins are held to. A user's model trained
across series (``kind: panel_plugin``, the protocol
:class:`~runner.forecasters.contract.PanelForecaster`) loads the same way.
"""

from __future__ import annotations

import importlib
import json
from dataclasses import dataclass
from functools import cache
from typing import Any

from runner.config import ForecasterSpec
from runner.errors import PluginError, brief, clip


@dataclass(frozen=True)
class Kind:
    """One built-in forecaster kind, as a config names it.

    ``role`` is ``baseline`` (a benchmark, listed under ``baselines:``) or ``candidate`` (a model,
    listed under ``models:``). ``default`` benchmarks run when a config lists no baselines;
    ``seasonal_only`` ones need a season above 1 and are left out of the defaults otherwise.
    ``derived`` candidates make no forecast of their own: their forecasts are computed from
    other forecasters' forecasts of the same run (:mod:`runner.forecasters.derived`), so no
    model task is built for them and they have no ``fit`` / ``predict``.
    ``from_file`` candidates fit nothing: their forecasts are read from a file
    (:mod:`runner.forecasters.recorded`), so no model task is built for them and they have no
    ``fit`` / ``predict``.
    """

    name: str
    entry: str
    role: str
    summary: str
    default: bool = False
    seasonal_only: bool = False
    derived: bool = False
    from_file: bool = False


_B = "runner.forecasters.benchmarks"
_M = "runner.forecasters.models"
_I = "runner.forecasters.intermittent"
_D = "runner.forecasters.derived"

#: Every built-in kind. The config's kinds, the JSON Schema's enumerations, the default baseline
#: list and the conformance tests all derive from this table.
KINDS: tuple[Kind, ...] = (
    Kind("naive", f"{_B}:Naive", "baseline", "every step is the last observed value",
         default=True),
    Kind("moving_average", f"{_B}:MovingAverage", "baseline",
         "mean, median or mode of the last `size` values", default=True),
    Kind("seasonal_naive", f"{_B}:SeasonalNaive", "baseline",
         "the value at the same point of the last season", default=True, seasonal_only=True),
    Kind("season_average", f"{_B}:SeasonAverage", "baseline",
         "the mean of the last full season, for every step", default=True, seasonal_only=True),
    Kind("drift", f"{_B}:Drift", "baseline",
         "the line from the first to the last observation, extended", default=True),
    Kind("mean", f"{_B}:Mean", "baseline", "the mean of the whole training window",
         default=True),
    Kind("croston", f"{_I}:Croston", "baseline",
         "Croston's method for intermittent demand: smoothed size / smoothed interval"),
    Kind("sba", f"{_I}:SBA", "baseline",
         "the Syntetos-Boylan approximation: Croston's forecast times (1 - beta/2)"),
    Kind("tsb", f"{_I}:TSB", "baseline",
         "Teunter-Syntetos-Babai: smoothed demand probability times smoothed size"),
    Kind("arima", f"{_M}.arima:Arima", "candidate", "ARIMA of a given order (statsmodels)"),
    Kind("ets", f"{_M}.ets:ETS", "candidate", "exponential smoothing state space model"),
    Kind("theta", f"{_M}.theta:Theta", "candidate", "the theta method"),
    Kind("arima_search", f"{_M}.arima_search:ArimaSearch", "candidate",
         "ARIMA with orders chosen by a stepwise search per training window"),
    Kind("combination", f"{_D}:Combination", "candidate",
         "the mean or median of listed forecasters' forecasts of the same run (no refit)",
         derived=True),
    Kind("best_so_far", f"{_D}:BestSoFar", "candidate",
         "per series, the listed forecaster that scored best at earlier folds only",
         derived=True),
    Kind("recorded", "runner.forecasters.recorded:Recorded", "candidate",
         "forecasts made elsewhere, read from a file and scored like any other", from_file=True),
)
BY_KIND: dict[str, Kind] = {k.name: k for k in KINDS}
#: ``kind`` -> ``module:attribute`` of every built-in.
BUILTIN: dict[str, str] = {k.name: k.entry for k in KINDS}
#: The kind of a user's own forecaster, named by ``entry: module:attribute``.
PLUGIN = "plugin"
#: The kind of a user's own model trained across the series of a dataset (one fit per origin).
PANEL_PLUGIN = "panel_plugin"


def kinds_for(role: str) -> list[str]:
    """Names of the built-in kinds of ``role`` (``baseline`` or ``candidate``)."""
    return [k.name for k in KINDS if k.role == role]


def is_derived(spec: ForecasterSpec) -> bool:
    """True for candidates whose forecasts are computed from other forecasters' forecasts."""
    kind = BY_KIND.get(spec.kind)
    return kind is not None and kind.derived
def is_from_file(spec: ForecasterSpec) -> bool:
    """True for candidates whose forecasts are read from a file instead of fitted."""
    kind = BY_KIND.get(spec.kind)
    return kind is not None and kind.from_file


def entry_of(spec: ForecasterSpec) -> str:
    """The ``module:attribute`` that builds ``spec``."""
    if spec.kind in (PLUGIN, PANEL_PLUGIN):
        assert spec.entry is not None
        return spec.entry
    return BUILTIN[spec.kind]


def is_panel(spec: ForecasterSpec) -> bool:
    """True for forecasters fit once per origin on every series of a dataset."""
    return spec.kind == PANEL_PLUGIN


@cache
def load_entry(entry: str) -> Any:
    """Import ``module:attribute`` and return the attribute (a class or a factory)."""
    module_name, _, attr = entry.partition(":")
    try:
        module = importlib.import_module(module_name)
    except Exception as exc:  # any import-time failure of user code is the plugin's problem
        raise PluginError(
            f"entry {entry}: cannot import module {module_name!r} "
            f"({type(exc).__name__}: {clip(str(exc))})"
        ) from None
    obj: Any = module
    for part in attr.split("."):
        try:
            obj = getattr(obj, part)
        except AttributeError:
            raise PluginError(
                f"entry {entry}: module {module_name!r} has no attribute {attr!r}"
            ) from None
    if not callable(obj):
        raise PluginError(f"entry {entry}: {attr!r} is not a class or a callable factory")
    return obj


def build(spec: ForecasterSpec) -> Any:
    """A fresh, unfitted forecaster for ``spec`` (its params as keyword arguments)."""
    factory = load_entry(entry_of(spec))
    try:
        return factory(**spec.params)
    except (TypeError, ValueError) as exc:
        raise PluginError(
            f"forecaster {clip(spec.name)}: bad params {brief(spec.params)} ({clip(str(exc))})"
        ) from None


def implementation_version(spec: ForecasterSpec) -> str:
    """The ``version`` a forecaster class declares (bump it when its forecasts change)."""
    factory = load_entry(entry_of(spec))
    return str(getattr(factory, "version", "0"))


def identity(spec: ForecasterSpec) -> str:
    """Canonical identity of a forecaster: kind, parameters, version (and a plugin's entry), as
    JSON.

    Part of every cache key, so two configs that spell the same forecaster differently share
    their cached forecasts, and a new implementation version invalidates them. A built-in is
    identified by its kind alone, never by the module that holds it, so moving a file inside
    castgrid keeps every user's cache; a plugin is its entry, since that is all castgrid knows.
    """
    fields: dict[str, Any] = {
        "kind": spec.kind,
        "params": spec.params,
        "version": implementation_version(spec),
    }
    if spec.kind in (PLUGIN, PANEL_PLUGIN):
        fields["entry"] = entry_of(spec)
    return json.dumps(
        fields,
        sort_keys=True,
        separators=(",", ":"),
        default=str,
    )


def is_vectorised(spec: ForecasterSpec) -> bool:
    """True for forecasters that forecast many (series, fold) tasks at once with numpy."""
    return bool(getattr(load_entry(entry_of(spec)), "vectorised", False))


def accepts_covariates(spec: ForecasterSpec) -> bool:
    """True for forecasters that are given the datasets' covariates.

    Built-ins say so with a ``uses_covariates`` class attribute; plugins (per-series and
    panel) receive them unless their class says ``uses_covariates = False``, since both plugin
    protocols take covariates.
    """
    factory = load_entry(entry_of(spec))
    return bool(getattr(factory, "uses_covariates", spec.kind in (PLUGIN, PANEL_PLUGIN)))
