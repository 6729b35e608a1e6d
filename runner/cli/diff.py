"""``castgrid diff OLD NEW``: what changed between two results folders (either may be REV:path)."""

from __future__ import annotations

import argparse
import math

from runner.compare.diff import EXIT_WORSE, Results, compare
from runner.compare.diff_text import format_change_percent, format_diff
from runner.errors import DataError


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """``castgrid diff OLD NEW [--fail-if-worse PCT] [--format markdown]``."""
    parser.add_argument("old", metavar="OLD", help="results folder, or REV:path read from git")
    parser.add_argument("new", metavar="NEW", help="results folder, or REV:path read from git")
    parser.add_argument("--fail-if-worse", type=float, metavar="PCT", default=None,
                        help="exit 4 when a candidate's rank metric got worse by more than PCT "
                        "percent")
    parser.add_argument("--format", choices=("text", "markdown"), default="text",
                        help="text table (default) or Markdown for a review comment")


def main(args: argparse.Namespace) -> int:
    """Print the comparison; exit 4 when --fail-if-worse is exceeded, else 0."""
    pct = args.fail_if_worse
    if pct is not None and not (math.isfinite(pct) and pct >= 0):
        raise DataError(f"--fail-if-worse: expected a percentage >= 0, got {pct:g}")
    d = compare(Results.load(args.old), Results.load(args.new))
    print(format_diff(d, markdown=args.format == "markdown", fail_pct=pct))
    if pct is None:
        return 0
    worse = d.worse_than(pct)
    if worse:
        listed = ", ".join(f"{name} on {ds} ({format_change_percent(w)})" for ds, name, w in worse)
        print(f"\nworse by more than {pct:g}% in {d.rank_by}: {listed}")
        return EXIT_WORSE
    return 0
