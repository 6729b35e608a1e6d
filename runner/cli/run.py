"""``castgrid run CONFIG``: run the evaluation, write the results folder, print the leaderboard."""

from __future__ import annotations

import argparse
import sys
import time
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from runner.report.painter import Painter


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``castgrid run``."""
    parser.add_argument("config", help="the experiment's YAML config")
    parser.add_argument("--jobs", type=int, default=None, help="worker processes (-1: all cores)")
    parser.add_argument("--no-cache", action="store_true", help="neither read nor fill the cache")
    parser.add_argument("--out", default=None, help="results folder (default results/<experiment>)")
    parser.add_argument("--quiet", action="store_true", help="no progress or summary on stderr")


def main(args: argparse.Namespace) -> int:
    """Exit 0 when every task succeeded, 3 when some failed (2 on bad input, raised)."""
    from runner.report.painter import start_painter

    t0 = time.perf_counter()
    # The report's painter starts first, so that it loads matplotlib while this process
    # loads its own libraries and the data (runner.report.painter).
    with start_painter() as painter:
        return _run(args, t0, painter)


def _run(args: argparse.Namespace, t0: float, painter: Painter | None) -> int:
    from runner.cli._summary import summarise
    from runner.config.model import check_jobs
    from runner.errors import ConfigError
    from runner.output.tables import to_terminal
    from runner.pipeline import prepare, run
    from runner.scoring.derived import selection_frame, selection_lines

    if args.jobs is not None:
        try:
            check_jobs(args.jobs)
        except ValueError as exc:
            raise ConfigError(f"--jobs: {exc}") from None
    plan = prepare(args.config)
    if not args.quiet:
        for note in plan.all_notes():
            print(f"castgrid: note: {note}", file=sys.stderr)
        for warning in plan.warnings:
            print(f"castgrid: warning: {warning}", file=sys.stderr)
        for dp in plan.datasets:
            for note in summarise(dp.panel.notes):
                print(f"castgrid: note: {dp.panel.name}: {note}", file=sys.stderr)
            for s in summarise(dp.skipped):
                print(f"castgrid: warning: {dp.panel.name}: skipped {s}", file=sys.stderr)
    result = run(
        plan, out_dir=args.out, use_cache=not args.no_cache, jobs=args.jobs, quiet=args.quiet,
        painter=painter,
    )
    cfg = plan.config
    print(to_terminal(result.leaderboard, cfg.rank_by))
    for line in selection_lines(selection_frame(result.evaluation)):
        print(line)
    tasks = result.manifest["tasks"]
    if not args.quiet:
        print(
            f"castgrid: {tasks['total']} tasks: {tasks['computed']} computed, "
            f"{tasks['cached']} cached, {tasks['failed']} failed, "
            f"{tasks['skipped_series']} series skipped; {time.perf_counter() - t0:.1f} s; "
            f"results in {result.out_dir}",
            file=sys.stderr,
        )
        if tasks["failed"]:
            print(
                f"castgrid: {tasks['failed']} task(s) failed; see "
                f"{result.out_dir}/failures.csv",
                file=sys.stderr,
            )
    return 3 if tasks["failed"] or result.evaluation.stopped else 0
