"""Running tasks in this process, one after another, with a timer that stops a fit past
``fit_timeout`` (Python code and sleeps only; use worker processes for full isolation)."""

from __future__ import annotations

import signal
import threading
import time
from collections.abc import Callable, Sequence
from typing import Any

from runner.execution.tasks import SharedData, Task, TaskOutcome, failed, run_task

OnDone = Callable[[TaskOutcome], None]




class _FitTimeout(BaseException):
    """Raised inside a fit by the timer; a BaseException so ``except Exception`` won't eat it."""


def timeout_outcome(index: int, fit_timeout: float, seconds: float) -> TaskOutcome:
    return failed(
        index, "timeout", f"fit took longer than fit_timeout ({fit_timeout:g} s) and was stopped",
        seconds,
    )


def run_with_timer(task: Task, shared: SharedData, fit_timeout: float) -> TaskOutcome:
    """:func:`run_task` stopped by ``SIGALRM`` after ``fit_timeout`` seconds.

    Only in the main thread of a POSIX process (elsewhere the task runs without a timer). The
    timer re-fires every half second, so a fit that swallows the first interruption is
    interrupted again.
    """
    in_main = threading.current_thread() is threading.main_thread()
    if not hasattr(signal, "setitimer") or not in_main:
        return run_task(task, shared)
    armed = [True]

    def _alarm(signum: int, frame: Any) -> None:
        if armed[0]:
            raise _FitTimeout

    t0 = time.perf_counter()
    previous = signal.signal(signal.SIGALRM, _alarm)
    try:
        try:
            signal.setitimer(signal.ITIMER_REAL, fit_timeout, 0.5)
            return run_task(task, shared)
        finally:
            armed[0] = False
            signal.setitimer(signal.ITIMER_REAL, 0)
    except _FitTimeout:
        return timeout_outcome(task.index, fit_timeout, time.perf_counter() - t0)
    finally:
        signal.signal(signal.SIGALRM, previous)


def _blas_one_thread() -> Any:
    """A context that holds BLAS to one thread, as in the workers (so results match them)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # optional: without it the in-process BLAS keeps its own threads
        from contextlib import nullcontext

        return nullcontext()
    return threadpool_limits(1)


def run_serial(
    tasks: Sequence[Task],
    shared: SharedData,
    fit_timeout: float,
    stop: bool,
    on_done: OnDone | None,
    results: list[TaskOutcome | None],
) -> None:
    with _blas_one_thread():
        for pos, task in enumerate(tasks):
            outcome = run_with_timer(task, shared, fit_timeout)
            results[pos] = outcome
            if on_done is not None:
                on_done(outcome)
            if stop and not outcome.ok:
                return

