"""``castgrid history RESULTS``: how each forecaster's rank metric moved run by run."""

from __future__ import annotations

import argparse

from runner.compare.history import format_history
from runner.errors import DataError
from runner.output.history import read_history
from runner.output.reader import ResultsFolder


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """``castgrid history RESULTS [--last N] [--format markdown]``."""
    parser.add_argument("results", metavar="RESULTS",
                        help="results folder (or REV:path read from git)")
    parser.add_argument("--last", type=int, default=10, metavar="N",
                        help="show only the latest N runs (default 10; 0 = all)")
    parser.add_argument("--format", choices=("text", "markdown"), default="text",
                        help="text table (default) or Markdown")


def main(args: argparse.Namespace) -> int:
    """Print the history tables; exit 2 (via DataError) when history.jsonl is missing or bad."""
    if args.last < 0:
        raise DataError(f"--last: expected a count >= 0, got {args.last}")
    entries = read_history(ResultsFolder.open(args.results))
    if args.last:
        entries = entries[-args.last:]
    print(format_history(entries, markdown=args.format == "markdown"))
    return 0
