"""``castgrid run CONFIG``: run the evaluation, write the results folder, print the leaderboard."""

from __future__ import annotations

import argparse
import sys
import time

#: ``castgrid run --help``: when a run has nothing to do.
EPILOG = """\
A rerun with nothing to do: when the results folder already holds what this run would write
(a run of a config with the same bytes, on data and other input files with the same bytes,
with the same castgrid, installed packages, Python, platform and environment, that did not
stop early and whose failed tasks, if any, would fail the same way again, and every file it
wrote unchanged), castgrid prints the leaderboard that run printed, says on stderr that the
folder is up to date, and exits as that run did (0, or 3 with failed tasks) without reading
the data or writing anything (history.jsonl gets no line). --no-cache always runs in full.
--jobs does not change results, so it is not compared.
"""


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``castgrid run``."""
    parser.epilog = EPILOG
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    parser.add_argument("config", help="the experiment's YAML config")
    parser.add_argument("--jobs", type=int, default=None, help="worker processes (-1: all cores)")
    parser.add_argument("--no-cache", action="store_true",
                        help="neither read nor fill the cache; always run in full")
    parser.add_argument("--out", default=None, help="results folder (default results/<experiment>)")
    parser.add_argument("--quiet", action="store_true", help="no progress or summary on stderr")


def main(args: argparse.Namespace) -> int:
    """Exit 0 when every task succeeded (or the results were up to date), 3 when some failed
    (2 on bad input, raised)."""
    from runner.errors import ConfigError
    from runner.output.uptodate import check_results, source_digest

    # castgrid's own files, taken before the pipeline's modules are imported (see Inputs)
    source_digest()
    if args.jobs is not None:
        from runner.config.model import check_jobs

        try:
            check_jobs(args.jobs)
        except ValueError as exc:
            raise ConfigError(f"--jobs: {exc}") from None
    t0 = time.perf_counter()
    if not args.no_cache:
        # before pandas, numpy and the config's models are imported: that is what it saves
        verdict = check_results(args.config, args.out)
        if verdict.current:
            sys.stdout.write(verdict.text)
            if not args.quiet:
                print(
                    f"castgrid: {verdict.folder} is up to date (config, data, forecasters and "
                    "versions unchanged); nothing recomputed (use --no-cache to recompute)",
                    file=sys.stderr,
                )
                if verdict.failed:
                    _failed_note(verdict.failed, verdict.folder)
            # the exit code of the run that wrote the folder: its failures would recur
            return 3 if verdict.failed else 0

    from runner.cli._summary import summarise
    from runner.output.tables import terminal_text
    from runner.pipeline import prepare, run
    from runner.scoring.derived import selection_frame

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
        plan, out_dir=args.out, use_cache=not args.no_cache, jobs=args.jobs, quiet=args.quiet
    )
    cfg = plan.config
    # the same text the results folder keeps (runner.output.uptodate.TERMINAL)
    sys.stdout.write(terminal_text(result.leaderboard, cfg.rank_by,
                                   selection_frame(result.evaluation)))
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
            _failed_note(tasks["failed"], result.out_dir)
    return 3 if tasks["failed"] or result.evaluation.stopped else 0


def _failed_note(failed: int, folder: object) -> None:
    print(f"castgrid: {failed} task(s) failed; see {folder}/failures.csv", file=sys.stderr)
