"""castgrid: rolling-origin evaluation of forecasters against simple benchmarks.

The public API::

    runner.run(path_or_config)       -> RunResult (leaderboard and scores as DataFrames)
    runner.load_config(path)         -> Config
    runner.Forecast                  what a forecaster's predict may return
    runner.ConfigError, DataError, PluginError
"""

__version__ = "0.1.0"

from .config import Config, load_config  # noqa: E402
from .errors import CastgridError, ConfigError, DataError, PluginError  # noqa: E402
from .forecast import Forecast  # noqa: E402
from .pipeline import RunResult, run  # noqa: E402

__all__ = [
    "CastgridError",
    "Config",
    "ConfigError",
    "DataError",
    "Forecast",
    "PluginError",
    "RunResult",
    "__version__",
    "load_config",
    "run",
]
