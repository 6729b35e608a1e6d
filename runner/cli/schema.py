"""``castgrid schema``: print the JSON Schema of the config."""

from __future__ import annotations

import argparse
import json

from runner.config import json_schema


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """No options."""


def main(args: argparse.Namespace) -> int:
    """Print the schema as indented JSON."""
    print(json.dumps(json_schema(), indent=2, sort_keys=True))
    return 0
