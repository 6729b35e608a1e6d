"""The experiment config: what a YAML file may say, and how it is read and checked.

- :mod:`runner.config.model`: pydantic models of every key, grid expansion into forecaster specs.
- :mod:`runner.config.loading`: the YAML loader and its one-line error messages.
"""

from runner.config.loading import format_validation_error, json_schema, load_config, parse_config
from runner.config.model import (
    BASELINE_KINDS,
    DEFAULT_METRICS,
    INTERVAL_METRICS,
    MODEL_KINDS,
    POINT_METRICS,
    SEASONAL_BASELINES,
    BaselineSpec,
    Config,
    DatasetConfig,
    ExecutionConfig,
    ForecasterSpec,
    ModelConfig,
    OutputConfig,
    WindowsConfig,
    baseline_specs,
    candidate_specs,
    canonical_json,
    config_hash,
    forecaster_specs,
)

__all__ = [
    "BASELINE_KINDS", "DEFAULT_METRICS", "INTERVAL_METRICS", "MODEL_KINDS", "POINT_METRICS",
    "SEASONAL_BASELINES", "BaselineSpec", "Config", "DatasetConfig", "ExecutionConfig",
    "ForecasterSpec", "ModelConfig", "OutputConfig", "WindowsConfig", "baseline_specs",
    "canonical_json", "candidate_specs", "config_hash", "forecaster_specs",
    "format_validation_error", "json_schema", "load_config", "parse_config",
]
