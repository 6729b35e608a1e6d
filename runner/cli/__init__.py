"""The ``castgrid`` command line.

Each subcommand lives in its own module, which offers ``add_arguments(parser)`` and
``main(args) -> int``; this module only dispatches and turns user-facing errors into one-line
messages with exit code 2 (a traceback only with ``--debug``).
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from runner.errors import CastgridError

#: subcommand -> (module, one-line help)
COMMANDS: dict[str, tuple[str, str]] = {
    "run": ("runner.cli.run", "run the evaluation and print the leaderboard"),
    "check": ("runner.cli.check", "validate config and data and print the plan"),
    "diff": ("runner.cli.diff", "compare two results folders"),
    "history": ("runner.cli.history", "show how each forecaster's score moved run by run"),
    "report": ("runner.cli.report", "(re)build report.html and the plots of a results folder"),
    "schema": ("runner.cli.schema", "print the JSON Schema of the config"),
    "cache": ("runner.cli.cache", "inspect or prune the forecast cache"),
}


def build_parser(only: str | None = None) -> argparse.ArgumentParser:
    """The argument parser; ``only`` limits option set-up to one subcommand.

    Setting up a subcommand imports its module; limiting it to the one being run keeps start-up
    fast and keeps one command's import problem from breaking the others.
    """
    parser = argparse.ArgumentParser(
        prog="castgrid",
        description="Rolling-origin evaluation of forecasters against simple benchmarks.",
    )
    parser.add_argument("--debug", action="store_true", help="show tracebacks of errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name, (module, help_text) in COMMANDS.items():
        p = sub.add_parser(name, help=help_text, description=help_text)
        if only is None or only == name:
            importlib.import_module(module).add_arguments(p)
        p.set_defaults(_module=module)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``castgrid`` console script; returns the exit code."""
    argv = list(sys.argv[1:] if argv is None else argv)
    chosen = next((a for a in argv if not a.startswith("-")), None)
    parser = build_parser(chosen if chosen in COMMANDS else None)
    args = parser.parse_args(argv)
    try:
        return int(importlib.import_module(args._module).main(args))
    except CastgridError as exc:
        if args.debug:
            raise
        print(f"castgrid: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("castgrid: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # an internal error: say so plainly, exit 1
        if args.debug:
            raise
        print(
            f"castgrid: internal error: {type(exc).__name__}: {exc} (rerun with --debug)",
            file=sys.stderr,
        )
        return 1
