"""Conformance checks for forecaster authors: ``check_forecaster(obj)`` and its helpers.

The checks live in :mod:`runner.forecasters.conformance`; this module is their public address.
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

__all__ = [
    "CHECKS", "CheckReport", "CheckResult", "RecordingForecaster", "check_forecaster", "clone",
    "example_series", "get_params",
]
