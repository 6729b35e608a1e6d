"""``castgrid report RESULTS``: (re)build report.html and the plots of a results folder."""

from __future__ import annotations

import argparse
from pathlib import Path

from runner.errors import DataError
from runner.report.page import build_report


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """``castgrid report RESULTS``."""
    parser.add_argument("results", metavar="RESULTS", help="results folder")


def main(args: argparse.Namespace) -> int:
    """Build the report and print where it is."""
    path = Path(args.results)
    if not path.is_dir():
        raise DataError(f"{path}: results folder not found")
    print(build_report(path))
    return 0
