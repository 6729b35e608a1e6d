"""The ``castgrid`` command line.

Each subcommand lives in its own module, which offers ``add_arguments(parser)`` and
``main(args) -> int``; this module only dispatches and turns user-facing errors into one-line
messages with exit code 2 (a traceback only with ``--debug``), for every command in one place:

* :class:`~runner.errors.CastgridError` (bad config, data, plugin, output path): its message.
* An ``OSError`` of the user's machine (:data:`ENVIRONMENT_ERRNOS`: permission denied, a
  read-only or full disk, a folder where a file should be): one line naming the path.
* A closed standard output (``castgrid diff OLD NEW | head``): no message, exit code
  :data:`EXIT_BROKEN_PIPE`, as a shell reports for any program a closed pipe stopped.
"""

from __future__ import annotations

import argparse
import errno
import importlib
import os
import re
import sys
from collections.abc import Sequence

from runner.errors import CastgridError

#: Exit code when standard output was closed by its reader: 128 + SIGPIPE, what a shell reports
#: for a program a closed pipe killed, so ``set -o pipefail`` still sees the output was cut.
EXIT_BROKEN_PIPE = 141
#: ``OSError`` numbers that describe the user's machine, not a castgrid bug (exit code 2).
ENVIRONMENT_ERRNOS = frozenset(
    getattr(errno, name)
    for name in ("EACCES", "EPERM", "EROFS", "ENOSPC", "EDQUOT", "EISDIR", "ENOTDIR", "ENOENT",
                 "ENAMETOOLONG", "ELOOP", "EMFILE", "ENFILE", "EFBIG")
    if hasattr(errno, name)
)  # fmt: skip

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
        code = int(importlib.import_module(args._module).main(args))
        # Flush here, not at interpreter exit, so a closed pipe is seen below.
        sys.stdout.flush()
        return code
    except BrokenPipeError as exc:
        if not _stdout_closed():  # a pipe of castgrid's own broke: that is a bug
            if args.debug:
                raise
            return _internal_error(exc)
        _silence_stdout()
        return EXIT_BROKEN_PIPE
    except CastgridError as exc:
        if args.debug:
            raise
        print(f"castgrid: error: {_one_line(str(exc))}", file=sys.stderr)
        return 2
    except OSError as exc:
        if args.debug:
            raise
        if exc.errno not in ENVIRONMENT_ERRNOS:
            return _internal_error(exc)
        print(f"castgrid: error: {_one_line(_describe_os_error(exc))}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("castgrid: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # an internal error: say so plainly, exit 1
        if args.debug:
            raise
        return _internal_error(exc)


def _internal_error(exc: BaseException) -> int:
    print(
        f"castgrid: internal error: {type(exc).__name__}: {_one_line(str(exc))} "
        "(rerun with --debug)",
        file=sys.stderr,
    )
    return 1


#: Control characters and line separators other than "\n": a terminal would act on them, or
#: a reader split the message there. (A config error may list a few problems, one a line.)
_LINE_BREAKING = re.compile("[\x00-\x09\x0b-\x1f\x7f-\x9f\u2028\u2029]")


def _one_line(text: str) -> str:
    """A message as it is meant to be read: stray control characters shown escaped."""
    return _LINE_BREAKING.sub(lambda m: repr(m.group(0))[1:-1], text)


def _describe_os_error(exc: OSError) -> str:
    """``PATH: what went wrong`` (both paths of a rename), from the exception itself."""
    what = (exc.strerror or type(exc).__name__).lower()
    paths = [p for p in (exc.filename, exc.filename2) if p is not None]
    if not paths:
        return f"{what} ({type(exc).__name__})"
    where = " -> ".join(os.fsdecode(p) for p in paths)
    return f"{where}: {what}"


def _stdout_closed() -> bool:
    """True when stdout is a pipe whose reader has gone away (POSIX ``poll`` says POLLERR)."""
    try:
        import select

        poller = select.poll()
        poller.register(sys.stdout.fileno(), select.POLLOUT)
        return any(events & (select.POLLERR | select.POLLHUP) for _, events in poller.poll(0))
    except (AttributeError, OSError, ValueError):  # no descriptor, or no poll()
        return False


def _silence_stdout() -> None:
    """Point stdout at /dev/null, so the interpreter's final flush cannot fail again."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        os.close(devnull)
    except (OSError, ValueError):  # stdout without a file descriptor (captured in tests)
        pass
