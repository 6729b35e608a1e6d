"""The experiment config: what a YAML file may say, and how it is read and checked.

- :mod:`runner.config.model`: pydantic models of every key (structure and ranges).
- :mod:`runner.config.loading`: the YAML loader and its one-line error messages.

Names that belong to a higher layer's table (forecaster kinds, metric names) are checked by
that layer, before any data is read (:func:`runner.pipeline.prepare`).
"""

from runner.config.loading import format_validation_error, load_config, parse_config
from runner.config.model import (
    DERIVED_SEGMENTS,
    RENAMED_KINDS,
    RENAMED_PARAMS,
    BaselineSpec,
    Config,
    DatasetConfig,
    ExecutionConfig,
    ForecasterSpec,
    ModelConfig,
    OutputConfig,
    WindowsConfig,
    canonical_json,
    config_hash,
)

__all__ = [
    "DERIVED_SEGMENTS", "RENAMED_KINDS", "RENAMED_PARAMS", "BaselineSpec", "Config",
    "DatasetConfig", "ExecutionConfig", "ForecasterSpec", "ModelConfig", "OutputConfig",
    "WindowsConfig",
    "canonical_json", "config_hash", "format_validation_error", "load_config", "parse_config",
]
