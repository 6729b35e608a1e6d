"""Faults reproduced for real: stuck fits, dying workers, killed runs, a cache killed mid-write.

Each misbehaving plugin (tests/fault_plugins.py) misbehaves on training slices of one length
only, so every test knows which tasks must fail and checks that all the others did not.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

from test_parallel import macro_work, plugin, same_outcomes

from runner.config import ExecutionConfig
from runner.execution.cache import ForecastCache
from runner.execution.dispatch import forecast_models
from runner.execution.engines import execute
from runner.execution.serial import run_serial

REPO = Path(__file__).resolve().parent.parent
#: macro_work's folds have training slices of 44, 48, 52 and 56 quarters.
BAD = 48


def _check_only_bad_failed(tasks, out, reason: str) -> None:
    for t, o in zip(tasks, out):
        if t.end - t.start == BAD and t.forecaster == 1:
            assert o.reason == reason, (o.reason, o.message)
        else:
            assert o.ok, (t, o.reason, o.message)


# The stuck plugins hold their fit for 600 s: a fit that was not stopped would end normally
# (and fail the check below) instead of with reason "timeout". The good fits (LineFit, well
# under a millisecond) stay far inside fit_timeout however busy the machine is; no test
# measures how long anything took.


def test_fit_past_the_timeout_is_stopped_in_process():
    tasks, shared = macro_work([plugin("line", "LineFit"),
                                plugin("sleepy", "Sleepy", seconds=600, when_length=BAD)],
                               columns=["realgdp", "cpi"])
    # The in-process timer serves built-in models with jobs=1 (plugins go to a worker then).
    # A 600-s sleep that ends as a timeout proves the timer stopped it; no clock is read here.
    out: list = [None] * len(tasks)
    run_serial(tasks, shared, 2.0, False, None, out)
    _check_only_bad_failed(tasks, out, "timeout")
    assert "fit_timeout (2 s)" in next(o.message for o in out if o.reason == "timeout")


def test_fit_past_the_timeout_gets_its_worker_replaced():
    # Stubborn swallows every exception while it sleeps: only killing its process stops it
    tasks, shared = macro_work([plugin("line", "LineFit"),
                                plugin("stubborn", "Stubborn", seconds=600, when_length=BAD)],
                               columns=["realgdp", "cpi"])
    out = execute(tasks, shared, jobs=2, fit_timeout=3.0)
    _check_only_bad_failed(tasks, out, "timeout")
    assert same_outcomes(
        [o for t, o in zip(tasks, out) if t.forecaster == 0],
        execute([t for t in tasks if t.forecaster == 0], shared, jobs=1),
    )


def test_worker_that_exits_or_segfaults_fails_only_its_task(tmp_path):
    tasks, shared = macro_work([plugin("line", "LineFit"),
                                plugin("exits", "Exits", when_length=BAD)],
                               columns=["realgdp", "cpi", "realcons"])
    ex = ExecutionConfig(jobs=2, cache=str(tmp_path))
    out, counts = forecast_models(tasks, shared, ex, quiet=True)
    _check_only_bad_failed(tasks, out, "crash")
    assert "died (exit code 3)" in next(o.message for o in out if o.reason == "crash")
    assert (counts.computed, counts.failed) == (len(tasks) - 3, 3)
    # crashes are not remembered by the cache: the next run tries them again
    out, counts = forecast_models(tasks, shared, ex, quiet=True)
    assert (counts.cached, counts.failed, counts.computed) == (len(tasks) - 3, 3, 0)
    _check_only_bad_failed(tasks, out, "crash")
    tasks, shared = macro_work([plugin("line", "LineFit"),
                                plugin("segv", "Segfaults", when_length=BAD)],
                               columns=["realgdp"])
    out = execute(tasks, shared, jobs=2)
    _check_only_bad_failed(tasks, out, "crash")
    assert "SIGSEGV" in next(o.message for o in out if o.reason == "crash")


_GATED_RUN = """
import signal
import sys
# Ctrl-C as in a terminal: a process started in the background of a non-interactive shell
# (as CI runners start the suite) inherits SIGINT ignored, and Python then keeps it ignored
signal.signal(signal.SIGINT, signal.default_int_handler)
sys.path[:0] = [{tests!r}]
from dataclasses import replace
from test_parallel import macro_work, plugin
from runner.config import ExecutionConfig
from runner.execution.dispatch import forecast_models
# 5 series x 8 folds = 40 tasks with training slices of 68, 72, ..., 96 quarters; the fits on
# the two longest (10 tasks) are held by the gate until the test opens it
tasks, shared = macro_work([plugin("gate", "Gate", folder={folder!r}, when_lengths=[92, 96])],
                           columns=["realgdp", "realcons", "realinv", "cpi", "m1"],
                           folds=8, length=100)
# held tasks last: batches are contiguous runs of this order, so every free task is done
# before both workers are held
order = sorted(tasks, key=lambda t: t.end - t.start in (92, 96))
tasks = [replace(t, index=i) for i, t in enumerate(order)]
done = open({done!r}, "a")

def on_done(outcome):
    done.write(f"{{outcome.index}}\\n")
    done.flush()

out, counts = forecast_models(tasks, shared, ExecutionConfig(jobs={jobs}, cache={cache!r}),
                              quiet=True, on_done=on_done)
print("counts", counts.computed, counts.cached, counts.failed)
"""
#: Tasks of the gated run, and those the gate holds.
TOTAL, HELD = 40, 10
#: Guard against a run that never reaches the awaited state (a broken engine): not a measure.
GUARD = 300.0


def _start(folder: Path, cache: Path, jobs: int) -> subprocess.Popen:
    code = _GATED_RUN.format(tests=str(REPO / "tests"), folder=str(folder),
                             done=str(folder / "done"), jobs=jobs, cache=str(cache))
    return subprocess.Popen([sys.executable, "-c", textwrap.dedent(code)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _await(condition, what: str, proc: subprocess.Popen | None = None) -> None:
    """Poll until ``condition()`` holds; fail if ``proc`` ends first (or hangs past GUARD)."""
    deadline = time.monotonic() + GUARD
    while not condition():
        if proc is not None and proc.poll() is not None:
            raise AssertionError(f"the run ended before {what}: {proc.communicate()}")
        if time.monotonic() > deadline:
            if proc is not None:
                proc.kill()
            raise AssertionError(f"never reached: {what}")
        time.sleep(0.05)


def _free_tasks_done_and_both_workers_held(folder: Path, proc: subprocess.Popen) -> None:
    """Wait for the events, not for time: every free task reported done, two fits held."""
    done = folder / "done"

    def reached() -> bool:
        n_done = len(done.read_text().split()) if done.exists() else 0
        return n_done == TOTAL - HELD and len(list(folder.glob("blocked-*"))) == 2

    _await(reached, f"{TOTAL - HELD} tasks done and 2 fits held", proc)


def _entries(cache: Path) -> int:
    c = ForecastCache.open_readonly(cache)
    if c is None:
        return 0
    with c:
        return c.entries()


def _resume_and_compare(folder: Path, cache: Path, kept: int) -> None:
    (folder / "open").write_text("")  # the resumed run's held fits go straight through
    resumed = _start(folder, cache, jobs=1)
    out, err = resumed.communicate(timeout=GUARD)
    assert resumed.returncode == 0, err
    computed, cached, failed = (int(x) for x in out.split()[1:])
    # exactly what the interrupted run kept is reused, the rest is computed
    assert (computed, cached, failed) == (TOTAL - kept, kept, 0)
    with ForecastCache.open(cache) as c:
        assert c.conn.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
        assert c.entries() == TOTAL


def test_run_killed_with_sigkill_leaves_a_consistent_cache_and_resumes(tmp_path):
    cache = tmp_path / "cache"
    proc = _start(tmp_path, cache, jobs=2)
    _free_tasks_done_and_both_workers_held(tmp_path, proc)
    workers = [int(p) for p in subprocess.run(
        ["ps", "-o", "pid=", "--ppid", str(proc.pid)], capture_output=True, text=True
    ).stdout.split()]
    assert len(workers) == 2
    seen = _entries(cache)  # committed before the kill (the cache commits every half second)
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=GUARD)
    assert proc.returncode == -signal.SIGKILL
    with ForecastCache.open(cache) as c:  # opens without a "damaged" rebuild
        left = c.entries()
    # nothing committed is lost; nothing from the held fits can be there
    assert seen <= left <= TOTAL - HELD
    # the held workers did not outlive the run: they die with their parent (the gate is
    # still closed, so nothing else could end them)
    _await(lambda: all(_gone(p) for p in workers), "the workers of the killed run are gone")
    _resume_and_compare(tmp_path, cache, left)


def _gone(pid: int) -> bool:
    try:
        return Path(f"/proc/{pid}/stat").read_text().split()[2] == "Z"
    except (FileNotFoundError, ProcessLookupError):
        return True


def test_run_interrupted_with_ctrl_c_stops_and_resumes(tmp_path):
    cache = tmp_path / "cache"
    proc = _start(tmp_path, cache, jobs=2)
    _free_tasks_done_and_both_workers_held(tmp_path, proc)
    os.kill(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=GUARD)
    assert proc.returncode != 0 and "KeyboardInterrupt" in err
    # Ctrl-C commits every outcome the run had received: all the free tasks, none held
    assert _entries(cache) == TOTAL - HELD
    _resume_and_compare(tmp_path, cache, TOTAL - HELD)


def test_failures_that_follow_from_the_data_are_cached_and_transient_ones_are_not(tmp_path):
    tasks, shared = macro_work([plugin("line", "LineFit"),
                                plugin("raises", "Raises", when_length=BAD),
                                plugin("memory", "Raises", when_length=BAD, error="MemoryError")],
                               columns=["realgdp", "cpi"])
    ex = ExecutionConfig(jobs=1, cache=str(tmp_path))
    first, counts = forecast_models(tasks, shared, ex, quiet=True)
    assert (counts.failed, counts.computed) == (4, len(tasks) - 4)
    again, counts = forecast_models(tasks, shared, ex, quiet=True)
    assert (counts.failed, counts.cached, counts.computed) == (4, len(tasks) - 4, 0)
    by_kind = {t.forecaster: o for t, o in zip(tasks, again) if not o.ok}
    assert by_kind[1].cached and by_kind[1].message == next(
        o.message for t, o in zip(tasks, first) if t.forecaster == 1 and not o.ok)
    assert by_kind[1].message.startswith("ValueError: refusing this slice")
    assert not by_kind[2].cached and by_kind[2].message.startswith("MemoryError")
