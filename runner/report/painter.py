"""Drawing the report's plots in a process of their own, started when a run starts.

A run's report is its last step, and drawing is most of it: importing matplotlib (about half a
second) and rendering each PNG. On a machine with two or more cores, :func:`start_painter`
forks the run's process as soon as the run begins; the fork imports matplotlib and sets up its
fonts while the run loads, forecasts and scores, then waits. When the report has plots to draw,
:meth:`Painter.paint` hands it their sketches (plain data and a module-level drawing function,
so they pickle); it draws them, half in a fork of its own when there is more than one, and
sends back the PNG bytes and notes. The plots are the same bytes as plots drawn in the run's
own process: the same code, library, fonts and settings draw them.

Anything wrong with the painter (it died, a pipe broke, a drawing raised) makes
:meth:`Painter.paint` return None, and the report draws in its own process instead, where an
error in a drawing surfaces with its own traceback. On platforms without ``fork`` (or with one
core) there is no painter and the report draws as before.
"""

from __future__ import annotations

import gc
import os
import pickle
import signal
import struct
import sys
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from runner.report.plots import Sketch

#: A drawn plot as the painter sends it back: PNG bytes and the notes shown under it.
Painted = tuple[bytes, list[str]]

_LENGTH = struct.Struct("<Q")


def _send(fd: int, obj: object) -> None:
    data = pickle.dumps(obj, protocol=pickle.HIGHEST_PROTOCOL)
    view = memoryview(_LENGTH.pack(len(data)) + data)
    while view:
        view = view[os.write(fd, view):]


def _receive(fd: int) -> Any:
    """The next message on ``fd``; EOFError when the other end closed."""
    head = _read_exactly(fd, _LENGTH.size)
    return pickle.loads(_read_exactly(fd, _LENGTH.unpack(head)[0]))


def _read_exactly(fd: int, n: int) -> bytes:
    parts, got = [], 0
    while got < n:
        part = os.read(fd, min(n - got, 1 << 20))
        if not part:
            raise EOFError("the other end closed the pipe")
        parts.append(part)
        got += len(part)
    return b"".join(parts)


def _usable_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def can_paint_aside() -> bool:
    """Whether a painter can be started: Linux (fork of a process whose libraries are loaded
    is safe there when one thread runs), one thread running, and at least two usable cores
    (on one core, drawing aside would only compete with the run)."""
    return (sys.platform.startswith("linux") and threading.active_count() == 1
            and _usable_cores() >= 2)


class Painter:
    """The run's end of a painter process (see the module doc). Use :func:`start_painter`."""

    def __init__(self, pid: int, to_child: int, from_child: int) -> None:
        self.pid = pid
        self.to_child = to_child
        self.from_child = from_child
        self.closed = False

    def paint(self, jobs: list[tuple[Sketch, str]]) -> list[Painted] | None:
        """The PNG bytes and notes of each ``(sketch, key)`` (the key is stored in the PNG, as
        :func:`runner.report.reuse.stamp` says), in order; None when the painter could not
        draw them (the caller then draws them itself)."""
        if self.closed:
            return None
        try:
            _send(self.to_child, [(s.data, s.paint, key) for s, key in jobs])
            answer = _receive(self.from_child)
        except (OSError, EOFError, pickle.PickleError, AttributeError, TypeError):
            self.close()
            return None
        if not isinstance(answer, list) or len(answer) != len(jobs):
            self.close()  # the painter reported a failure: draw here, where it shows
            return None
        return answer

    def close(self) -> None:
        """End the painter process and reap it (idempotent)."""
        if self.closed:
            return
        self.closed = True
        for fd in (self.to_child, self.from_child):
            try:
                os.close(fd)
            except OSError:
                pass
        try:  # it exits when its pipe closes; kill it if it is stuck in a drawing
            os.kill(self.pid, signal.SIGKILL)
        except ProcessLookupError:
            pass
        try:
            os.waitpid(self.pid, 0)
        except ChildProcessError:
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
    for stream in (sys.stdout, sys.stderr):  # nothing buffered here may be written twice
        try:
            stream.flush()
        except (OSError, ValueError, AttributeError):
            pass
    down_r, down_w = os.pipe()
    up_r, up_w = os.pipe()
    try:
        pid = os.fork()
    except OSError:
        for fd in (down_r, down_w, up_r, up_w):
            os.close(fd)
        return None
    if pid:
        os.close(down_r)
        os.close(up_w)
        return Painter(pid, down_w, up_r)
    code = 0
    try:  # the child: never returns into the caller's code
        os.close(down_w)
        os.close(up_r)
        _serve(down_r, up_w)
    except BaseException:
        code = 1
    finally:
        os._exit(code)


def _serve(requests: int, answers: int) -> None:
    """The painter's loop: load matplotlib, then draw each request until the pipe closes."""
    # Ctrl-C is the run's to handle: it ends this process by closing the pipe (or killing it).
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_DFL)
    # The run's objects are shared with this fork until written; a collection pass would
    # write to every one of them (and so copy the run's memory). Leave them out of it.
    gc.freeze()
    devnull = os.open(os.devnull, os.O_RDWR)
    for fd in (0, 1):  # nothing drawn here may reach the run's stdout
        os.dup2(devnull, fd)
    os.close(devnull)
    _warm_up()
    while True:
        try:
            jobs = _receive(requests)
        except EOFError:
            return
        try:
            answer: Any = _draw_split(jobs)
        except Exception as exc:  # the run draws again itself, where the error shows
            answer = f"{type(exc).__name__}: {exc}"
        _send(answers, answer)


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


def _draw_split(jobs: list[tuple[dict[str, Any], Any, str]]) -> list[Painted]:
    """Draw ``jobs`` in this process and, when there is more than one, in a fork of it, so that
    two cores draw at once. Each process takes the next job from a shared queue (a pipe of job
    numbers, largest sketch first) when it is done with its last, so neither waits for the
    other while jobs remain."""
    if len(jobs) < 2:
        return [_draw(*job) for job in jobs]
    order = sorted(range(len(jobs)), key=lambda i: -len(pickle.dumps(jobs[i][0])))
    queue_r, queue_w = os.pipe()
    _send_numbers(queue_w, order)
    os.close(queue_w)  # an empty queue then reads as the end of the pipe
    theirs_r, theirs_w = os.pipe()
    pid = os.fork()
    if pid == 0:
        code = 0
        try:
            os.close(theirs_r)
            _send(theirs_w, _take_and_draw(queue_r, jobs))
        except BaseException:
            code = 1
        finally:
            os._exit(code)
    os.close(theirs_w)
    try:
        mine = _take_and_draw(queue_r, jobs)
        theirs = _receive(theirs_r)
    finally:
        os.close(theirs_r)
        os.close(queue_r)
        os.waitpid(pid, 0)
    drawn = {**mine, **theirs}
    return [drawn[i] for i in range(len(jobs))]


def _send_numbers(fd: int, numbers: list[int]) -> None:
    """Job numbers as two bytes each: a pipe read of two bytes is never split between two
    readers (anything up to PIPE_BUF bytes is read and written whole)."""
    data = b"".join(struct.pack("<H", n) for n in numbers)
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]


def _take_and_draw(queue: int, jobs: list[tuple[dict[str, Any], Any, str]]
                   ) -> dict[int, Painted]:
    done: dict[int, Painted] = {}
    while len(taken := os.read(queue, 2)) == 2:
        i = struct.unpack("<H", taken)[0]
        done[i] = _draw(*jobs[i])
    return done


def _draw(data: dict[str, Any], paint: Any, key: str) -> Painted:
    from matplotlib import rc_context

    from runner.report.reuse import stamp
    from runner.report.style import RC

    with rc_context(RC):
        drawn = paint(data)
        return drawn.png(stamp(key, drawn.notes)), drawn.notes
