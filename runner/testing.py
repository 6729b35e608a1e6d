"""Conformance checks for forecaster authors: ``check_forecaster(obj)`` for per-series
forecasters, ``check_panel_forecaster(obj)`` for models trained across series, and their helpers.

The checks live in :mod:`runner.forecasters.conformance` and
:mod:`runner.forecasters.panel_conformance`; this module is their public address.
"""

from runner.forecasters.conformance import (
    CHECKS,
    CheckReport,
    CheckResult,
    RecordingForecaster,
    check_forecaster,
    clone,
    example_series,
    get_params,
)
from runner.forecasters.panel_conformance import (
    PANEL_CHECKS,
    check_panel_forecaster,
    example_panel,
)

__all__ = [
    "CHECKS", "PANEL_CHECKS", "CheckReport", "CheckResult", "RecordingForecaster",
    "check_forecaster", "check_panel_forecaster", "clone", "example_panel", "example_series",
    "get_params",
]
