"""Candidate models built on statsmodels.

The model modules import statsmodels inside ``fit``, so that checking a config (which builds
each forecaster once to validate its params) and a rerun whose forecasts are all cached never
load it. A process about to fit imports it ahead with :func:`load_fitting_libraries`, so that
the import never counts toward a fit's ``fit_timeout``.
"""

from __future__ import annotations

import importlib

#: The statsmodels modules the models fit with.
FITTING_MODULES = (
    "statsmodels.tsa.arima.model",
    "statsmodels.tsa.exponential_smoothing.ets",
    "statsmodels.tsa.forecasting.theta",
    "statsmodels.tsa.seasonal",
    "statsmodels.tsa.stattools",
)


def load_fitting_libraries(entries: list[str]) -> None:
    """Import :data:`FITTING_MODULES` when any of ``entries`` (``module:attribute``) is one of
    these models; nothing otherwise."""
    if any(entry.startswith(f"{__name__}.") for entry in entries):
        for module in FITTING_MODULES:
            importlib.import_module(module)
