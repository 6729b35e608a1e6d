"""Drawing the report's plots in processes of their own, started when a run starts computing.

A run's report is its last step, and drawing is most of it: importing matplotlib (about half a
second) and rendering each PNG. On a machine with two or more cores, :func:`start_painter`
forks the run's process once its data are read (a large run: see
:data:`runner.pipeline.PAINT_ASIDE_TASKS`); the fork imports matplotlib and warms it up on a
drawing like the report's while the run forecasts and scores, then forks a second drawer of
its own. The report hands each plot's sketch (plain data and a module-level
drawing function, so it pickles) to the less busy drawer as soon as it is made
(:meth:`Painter.submit`), so the drawers draw while the report makes the next sketches, and
:meth:`Painter.collect` gathers the PNG bytes and notes. The plots are the same bytes as plots
drawn in the run's own process: the same code, library, fonts and settings draw them.

Anything wrong with a drawer (it died, a pipe broke, a drawing raised) makes
:meth:`Painter.collect` return None, and the report draws in its own process instead, where an
error in a drawing surfaces with its own traceback. On platforms without ``fork`` (or with one
core) there is no painter and the report draws as before.
"""

from __future__ import annotations

import gc
import os
import pickle
import signal
import time
from collections.abc import Iterator
from contextlib import contextmanager
from multiprocessing.connection import Connection
from typing import TYPE_CHECKING, Any

from runner.execution.engines import usable_cores
from runner.execution.workers import can_fork, flush_before_fork

if TYPE_CHECKING:
    from runner.report.plots import Sketch

#: A drawn plot as the painter sends it back: PNG bytes and the notes shown under it.
Painted = tuple[bytes, list[str]]

#: Seconds :meth:`Painter.close` lets the painter finish a drawing before it kills it.
CLOSE_WAIT = 2.0
#: How much nicer than the run the painter processes are (``os.nice``).
NICENESS = 10


def can_paint_aside() -> bool:
    """Whether a painter can be started: where run workers may be forks of the run
    (:func:`runner.execution.workers.can_fork`: Linux, one thread running), with at least two
    usable cores (on one core, drawing aside would only compete with the run)."""
    return can_fork() and usable_cores() >= 2


class _Drawer:
    """The run's ends of the pipes to one drawer process."""

    def __init__(self, requests: Connection, answers: Connection) -> None:
        self.requests = requests
        self.answers = answers
        self.jobs: list[int] = []  # what was sent to it, in order
        self.load = 0  # the pickled size of what was sent: a measure of the drawing to do


class Painter:
    """The run's end of the painter processes (see the module doc). Use :func:`start_painter`."""

    def __init__(self, pid: int, drawers: list[_Drawer]) -> None:
        self.pid = pid
        self.drawers = drawers
        self.submitted = 0
        self.closed = False

    def submit(self, sketch: Sketch, key: str) -> None:
        """Hand a plot's sketch to the less busy drawer (``key`` is stored in the PNG, as
        :func:`runner.report.reuse.stamp` says); a failure shows in :meth:`collect`."""
        index, self.submitted = self.submitted, self.submitted + 1
        if self.closed:
            return
        try:
            data = pickle.dumps(("draw", index, sketch.data, sketch.paint, key),
                                protocol=pickle.HIGHEST_PROTOCOL)
            drawer = min(self.drawers, key=lambda d: d.load)
            drawer.requests.send_bytes(data)
        except (OSError, pickle.PickleError, AttributeError, TypeError):
            self.close()
            return
        drawer.jobs.append(index)
        drawer.load += len(data)

    def collect(self) -> list[Painted] | None:
        """The PNG bytes and notes of every sketch submitted since the last collect, in the
        order submitted; None when the drawers could not draw them all (the caller then draws
        them itself)."""
        count, self.submitted = self.submitted, 0
        if self.closed:
            return None
        drawn: dict[int, Painted] = {}
        try:
            for d in self.drawers:
                d.requests.send(("collect",))
            for d in self.drawers:
                answer = d.answers.recv()
                if not isinstance(answer, dict) or sorted(answer) != sorted(d.jobs):
                    raise ValueError("a drawer failed")  # draw here, where the error shows
                drawn.update(answer)
                d.jobs, d.load = [], 0
        except (OSError, EOFError, ValueError, pickle.PickleError, AttributeError, TypeError):
            self.close()
            return None
        return [drawn[i] for i in range(count)]

    def close(self) -> None:
        """End the painter processes and reap them (idempotent).

        Closing the pipes ends both drawers once they finish the drawing at hand (the first
        waits for the second, its own child, so that nothing is left unreaped); a painter
        still there after :data:`CLOSE_WAIT` seconds is killed."""
        if self.closed:
            return
        self.closed = True
        for d in self.drawers:
            d.requests.close()
            d.answers.close()
        deadline = time.monotonic() + CLOSE_WAIT
        try:
            while os.waitpid(self.pid, os.WNOHANG) == (0, 0):
                if time.monotonic() > deadline:
                    os.kill(self.pid, signal.SIGKILL)
                    os.waitpid(self.pid, 0)
                    break
                time.sleep(0.005)
        except (ChildProcessError, ProcessLookupError):
            pass


@contextmanager
def start_painter() -> Iterator[Painter | None]:
    """A painter for the duration of the block (None where :func:`can_paint_aside` is false
    or the fork failed); the process is ended and reaped when the block ends, however it
    ends."""
    painter = _fork_painter() if can_paint_aside() else None
    try:
        yield painter
    finally:
        if painter is not None:
            painter.close()


def _fork_painter() -> Painter | None:
    flush_before_fork()
    # per drawer: requests (run -> drawer) and answers (drawer -> run)
    pipes = [(os.pipe(), os.pipe()) for _ in range(2)]
    try:
        pid = os.fork()
    except OSError:
        for (a, b), (c, e) in pipes:
            for fd in (a, b, c, e):
                os.close(fd)
        return None
    if pid:
        drawers = []
        for (req_r, req_w), (ans_r, ans_w) in pipes:
            os.close(req_r)
            os.close(ans_w)
            drawers.append(_Drawer(Connection(req_w, readable=False),
                                   Connection(ans_r, writable=False)))
        return Painter(pid, drawers)
    code = 0
    try:  # the child: never returns into the caller's code
        for (_, req_w), (ans_r, _) in pipes:
            os.close(req_w)
            os.close(ans_r)
        _serve([(Connection(req_r, writable=False), Connection(ans_w, readable=False))
                for (req_r, _), (_, ans_w) in pipes])
    except BaseException:
        code = 1
    finally:
        os._exit(code)


def _serve(ends: list[tuple[Connection, Connection]]) -> None:
    """The painter: load and warm up matplotlib, fork the second drawer, then each draws what
    its pipe brings until the pipe closes."""
    # Ctrl-C is the run's to handle: it ends these processes by closing the pipes.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    # The run's objects are shared with this fork until written; a collection pass would
    # write to every one of them (and so copy the run's memory). Leave them out of it.
    gc.freeze()
    # Below the run in the scheduler's eyes: while the run computes (on every core it can), the
    # loading and warming up take what it leaves; when the run waits for the plots, the
    # drawers have the cores to themselves.
    try:
        os.nice(NICENESS)
    except OSError:  # not allowed here: draw at the run's priority
        pass
    devnull = os.open(os.devnull, os.O_RDWR)
    for fd in (0, 1):  # nothing drawn here may reach the run's stdout
        os.dup2(devnull, fd)
    os.close(devnull)
    _warm_up()
    (mine_r, mine_w), (theirs_r, theirs_w) = ends
    try:
        second = os.fork()
    except OSError:  # its pipe closes with this process's end: the run then draws itself
        second = -1
    if second == 0:
        mine_r.close()
        mine_w.close()
        _draw_requests(theirs_r, theirs_w)
        return
    theirs_r.close()
    theirs_w.close()
    try:
        _draw_requests(mine_r, mine_w)
    finally:
        if second > 0:
            try:
                os.waitpid(second, 0)
            except ChildProcessError:
                pass


def _draw_requests(requests: Connection, answers: Connection) -> None:
    """Draw each sketch as it comes; send what was drawn when the run asks to collect (not
    before: the run reads only then, and a full pipe would stop the drawing)."""
    drawn: dict[int, Painted] = {}
    failed = ""
    while True:
        try:
            message = requests.recv()
        except EOFError:
            return
        if message[0] == "collect":
            answers.send(failed or drawn)
            drawn, failed = {}, ""
            continue
        _, index, data, paint, key = message
        if failed:
            continue
        try:
            drawn[index] = _draw(data, paint, key)
        except Exception as exc:  # the run draws again itself, where the error shows
            failed = f"{type(exc).__name__}: {exc}"


def _warm_up() -> None:
    """Load what the first drawings would otherwise load: matplotlib and the parts of it the
    report's plots use (dates on an axis, lines, bands, bars, a legend, bold and regular text at
    the report's sizes, the PNG writer), and pandas, which the sketches of the forecasts plot
    carry. Drawn with invented values, and thrown away."""
    import io

    import numpy as np
    import pandas as pd
    from matplotlib import rc_context
    from matplotlib.figure import Figure

    from runner.report.style import RC

    when = pd.date_range("2020-01-01", periods=12, freq="MS")
    with rc_context(RC):
        fig = Figure(figsize=(6, 4), layout="constrained")
        top, bottom = fig.subplots(2, 1)
        top.plot(when, np.arange(12.0), marker="o", label="a")
        top.fill_between(when, np.zeros(12), np.ones(12), alpha=0.2)
        top.set_title("warm-up")
        top.set_ylabel("value")
        top.legend(loc="upper left")
        bottom.barh(["a", "b"], [1.0, -2.0])
        bottom.axvline(0.0)
        bottom.set_xlabel("skill (percent)")
        bottom.text(0.5, 0.5, "1.0%", fontweight="bold")
        fig.savefig(io.BytesIO(), format="png")


def _draw(data: dict[str, Any], paint: Any, key: str) -> Painted:
    from matplotlib import rc_context

    from runner.report.reuse import stamp
    from runner.report.style import RC

    with rc_context(RC):
        drawn = paint(data)
        return drawn.png(stamp(key, drawn.notes)), drawn.notes
