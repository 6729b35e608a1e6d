"""castgrid: rolling-origin evaluation of forecasters against simple benchmarks.

The public API::

    runner.run(path_or_config)       -> RunResult (leaderboard and scores as DataFrames)
    runner.load_config(path)         -> Config
    runner.Forecast                  what a forecaster's predict may return
    runner.PanelHistory              what a panel forecaster's fit receives (kind: panel_plugin)
    runner.PanelForecast             what a panel forecaster's predict may return
    runner.ConfigError, DataError, PluginError, PathError

Names are imported on first use (PEP 562), so that worker processes and the command line do
not pay for pandas and the pipeline unless they need them.
"""

from __future__ import annotations

import importlib
from typing import Any

__version__ = "0.1.0"

_EXPORTS = {
    "CastgridError": "runner.errors",
    "Config": "runner.config",
    "ConfigError": "runner.errors",
    "DataError": "runner.errors",
    "Forecast": "runner.forecasters.contract",
    "PanelForecast": "runner.forecasters.contract",
    "PanelHistory": "runner.forecasters.contract",
    "PathError": "runner.errors",
    "PluginError": "runner.errors",
    "RunResult": "runner.pipeline",
    "load_config": "runner.config",
    "run": "runner.pipeline",
}

__all__ = sorted([*_EXPORTS, "__version__"])


def __getattr__(name: str) -> Any:
    if name in _EXPORTS:
        value = getattr(importlib.import_module(_EXPORTS[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'runner' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_EXPORTS))
