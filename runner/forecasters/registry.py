"""The forecaster registry: every forecaster, built-in or plugin, is found by ``module:attribute``.

Built-in baselines and models are registered here under their ``kind`` and load through the
same path as a user's plugin (``kind: plugin`` with ``entry: mypackage.mod:Class``), so the
protocol the plugins must honour is the one the built-ins are held to.
"""

from __future__ import annotations

import importlib
import json
from functools import cache
from typing import Any

from runner.config import ForecasterSpec
from runner.errors import PluginError

BUILTIN: dict[str, str] = {
    "naive": "runner.forecasters.benchmarks:Naive",
    "moving_average": "runner.forecasters.benchmarks:MovingAverage",
    "seasonal_naive": "runner.forecasters.benchmarks:SeasonalNaive",
    "season_average": "runner.forecasters.benchmarks:SeasonAverage",
    "drift": "runner.forecasters.benchmarks:Drift",
    "mean": "runner.forecasters.benchmarks:Mean",
    "croston": "runner.forecasters.intermittent:Croston",
    "sba": "runner.forecasters.intermittent:SBA",
    "tsb": "runner.forecasters.intermittent:TSB",
    "arima": "runner.forecasters.models.arima:Arima",
    "ets": "runner.forecasters.models.ets:ETS",
    "theta": "runner.forecasters.models.theta:Theta",
    "arima_search": "runner.forecasters.models.arima_search:ArimaSearch",
}


def entry_of(spec: ForecasterSpec) -> str:
    """The ``module:attribute`` that builds ``spec``."""
    if spec.kind == "plugin":
        assert spec.entry is not None
        return spec.entry
    return BUILTIN[spec.kind]


@cache
def load_entry(entry: str) -> Any:
    """Import ``module:attribute`` and return the attribute (a class or a factory)."""
    module_name, _, attr = entry.partition(":")
    try:
        module = importlib.import_module(module_name)
    except Exception as exc:  # any import-time failure of user code is the plugin's problem
        raise PluginError(
            f"entry {entry}: cannot import module {module_name!r} ({type(exc).__name__}: {exc})"
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
        raise PluginError(f"forecaster {spec.name}: bad params {spec.params} ({exc})") from None


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
    if spec.kind == "plugin":
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

    Built-ins say so with a ``uses_covariates`` class attribute; plugins always receive them,
    since the plugin protocol takes ``covariates`` in both ``fit`` and ``predict``.
    """
    factory = load_entry(entry_of(spec))
    return bool(getattr(factory, "uses_covariates", spec.kind == "plugin"))
