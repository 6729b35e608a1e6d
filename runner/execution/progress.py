"""Progress of the model tasks on stderr: done of total, cached, failed, elapsed, remaining.

On a terminal one line is redrawn in place (at most ten times a second). Anywhere else (a log
file, CI) a plain line is printed when a quarter, half, three quarters and all of the tasks are
done, so logs stay short. ``quiet`` prints nothing.
"""

from __future__ import annotations

import sys
import time
from typing import TextIO

#: Shares of the tasks at which a plain (non-terminal) line is printed.
MILESTONES = (0.25, 0.5, 0.75, 1.0)
_REDRAW_EVERY = 0.1


def _clock(seconds: float) -> str:
    seconds = int(round(seconds))
    h, rest = divmod(seconds, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


class Progress:
    """Counts finished tasks and shows them; call :meth:`task_done` per task, then :meth:`close`.

    >>> import io
    >>> p = Progress(4, cached=2, stream=io.StringIO(), tty=False)
    >>> p.task_done(ok=True); p.task_done(ok=False); p.close()
    >>> p.done, p.failed
    (4, 1)
    """

    def __init__(
        self,
        total: int,
        *,
        cached: int = 0,
        quiet: bool = False,
        stream: TextIO | None = None,
        tty: bool | None = None,
        label: str = "model tasks",
    ) -> None:
        self.total = total
        self.cached = cached
        self.done = cached
        self.failed = 0
        self.quiet = quiet or total == 0
        self.stream = stream if stream is not None else sys.stderr
        if tty is None:
            isatty = getattr(self.stream, "isatty", None)
            tty = bool(isatty and isatty())
        self.tty = tty
        self.label = label
        self.start = time.monotonic()
        self._last_draw = 0.0
        self._next_milestone = 0
        self._width = 0
        self._closed = False
        self._show(force=False)

    def task_done(self, ok: bool) -> None:
        """One computed task finished (``ok`` False when it failed)."""
        self.done += 1
        if not ok:
            self.failed += 1
        self._show(force=False)

    def line(self) -> str:
        """The progress text as it is now."""
        elapsed = time.monotonic() - self.start
        computed = self.done - self.cached
        parts = [f"{self.label} {self.done}/{self.total}"]
        if self.cached:
            parts.append(f"cached {self.cached}")
        if self.failed:
            parts.append(f"failed {self.failed}")
        parts.append(f"elapsed {_clock(elapsed)}")
        left = self.total - self.done
        if left and computed:
            parts.append(f"remaining ~{_clock(elapsed / computed * left)}")
        elif not left:
            parts.append("remaining 0:00")
        return "castgrid: " + ", ".join(parts)

    def _show(self, force: bool) -> None:
        if self.quiet:
            return
        if self.tty:
            now = time.monotonic()
            if force or now - self._last_draw >= _REDRAW_EVERY or self.done == self.total:
                text = self.line()
                pad = " " * max(0, self._width - len(text))
                self.stream.write("\r" + text + pad)
                self.stream.flush()
                self._width = len(text)
                self._last_draw = now
            return
        share = self.done / self.total
        printed = False
        while self._next_milestone < len(MILESTONES) and share >= MILESTONES[
            self._next_milestone
        ]:
            self._next_milestone += 1
            printed = True
        if printed:
            self.stream.write(self.line() + "\n")
            self.stream.flush()

    def close(self) -> None:
        """Finish the display (a final redraw and a newline on a terminal)."""
        if self._closed:
            return
        self._closed = True
        if self.quiet:
            return
        if self.tty:
            self._show(force=True)
            self.stream.write("\n")
            self.stream.flush()
        elif self.done < self.total:  # stopped early: say where it stopped
            self.stream.write(self.line() + " (stopped)\n")
            self.stream.flush()
