"""``castgrid schema``: the JSON Schema of the config, for editors and CI checks.

The structure comes from the pydantic models (:mod:`runner.config.model`); the enumerations of
forecaster kinds and metric names come from their tables (:data:`runner.forecasters.registry.KINDS`,
:data:`runner.scoring.metrics.METRICS`), so the schema lists exactly what a run accepts.
"""

from __future__ import annotations

import argparse
import json
from typing import Any


def config_schema() -> dict[str, Any]:
    """The JSON Schema of a castgrid config, with every enumeration filled in."""
    from runner.config import Config
    from runner.forecasters.registry import PANEL_PLUGIN, PLUGIN, kinds_for
    from runner.scoring.metrics import METRICS

    schema = Config.model_json_schema()
    schema["title"] = "castgrid experiment config"
    props, defs = schema["properties"], schema["$defs"]
    baselines = kinds_for("baseline")
    # A baseline is written as its name, or as {name: {params}} (README, "baselines").
    props["baselines"] = {
        "title": "Baselines",
        "description": "benchmark forecasters; default: every one that applies",
        "default": None,
        "anyOf": [
            {
                "type": "array",
                "items": {
                    "anyOf": [
                        {"type": "string", "enum": baselines},
                        {
                            "type": "object",
                            "minProperties": 1,
                            "maxProperties": 1,
                            "propertyNames": {"enum": baselines},
                            "additionalProperties": {"anyOf": [{"type": "object"},
                                                               {"type": "null"}]},
                        },
                    ]
                },
            },
            {"type": "null"},
        ],
    }
    defs.pop("BaselineSpec", None)
    defs["ModelConfig"]["properties"]["kind"] = {
        "title": "Kind", "type": "string", "enum": [*kinds_for("candidate"), PLUGIN, PANEL_PLUGIN],
    }
    names = [m.name for m in METRICS]
    props["metrics"]["anyOf"][0]["items"] = {"type": "string", "enum": names}
    # rank_by may be left out (null): the first branch is the string one
    props["rank_by"]["anyOf"][0]["enum"] = [m.name for m in METRICS if m.can_rank]
    # levels are percentages; a fraction such as 0.8 is refused (README, "The config")
    props["intervals"]["items"].update({"minimum": 1, "exclusiveMaximum": 100})
    return schema


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """``castgrid schema`` takes no arguments."""


def main(args: argparse.Namespace) -> int:
    """Print the schema as JSON."""
    print(json.dumps(config_schema(), indent=2, sort_keys=True))
    return 0
