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


def test_fit_past_the_timeout_is_stopped_in_process():
    tasks, shared = macro_work([plugin("line", "LineFit"),
                                plugin("sleepy", "Sleepy", seconds=600, when_length=BAD)],
                               columns=["realgdp", "cpi"])
    # The in-process timer serves built-in models with jobs=1 (plugins go to a worker then).
    t0 = time.monotonic()
    out: list = [None] * len(tasks)
    run_serial(tasks, shared, 0.5, False, None, out)
    assert time.monotonic() - t0 < 5
    _check_only_bad_failed(tasks, out, "timeout")
    assert "fit_timeout (0.5 s)" in next(o.message for o in out if o.reason == "timeout")


def test_fit_past_the_timeout_gets_its_worker_replaced():
    # Stubborn swallows every exception while it sleeps: only killing its process stops it
    tasks, shared = macro_work([plugin("line", "LineFit"),
                                plugin("stubborn", "Stubborn", seconds=600, when_length=BAD)],
                               columns=["realgdp", "cpi"])
    t0 = time.monotonic()
    out = execute(tasks, shared, jobs=2, fit_timeout=1.0)
    assert time.monotonic() - t0 < 20
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


_LONG_RUN = """
import sys
sys.path[:0] = [{tests!r}]
from test_parallel import macro_work, plugin
from runner.config import ExecutionConfig
from runner.execution.dispatch import forecast_models
# slow enough (40 tasks x 0.2 s on 2 workers) that the signal lands mid-run, not after it
tasks, shared = macro_work([plugin("slow", "SlowLine", delay=0.2)],
                           columns=["realgdp", "realcons", "realinv", "cpi", "m1"],
                           folds=8, length=100)
out, counts = forecast_models(tasks, shared, ExecutionConfig(jobs={jobs}, cache={cache!r}),
                              quiet=True)
print("counts", counts.computed, counts.cached, counts.failed)
"""


def _start(cache: Path, jobs: int) -> subprocess.Popen:
    code = _LONG_RUN.format(tests=str(REPO / "tests"), jobs=jobs, cache=str(cache))
    return subprocess.Popen([sys.executable, "-c", textwrap.dedent(code)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def _entries_when_some_are_cached(cache: Path, proc: subprocess.Popen) -> int:
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        time.sleep(0.2)
        try:
            with ForecastCache.open_readonly(cache) or _Empty() as c:
                if c.entries() >= 10:
                    return c.entries()
        except Exception:  # the file is still being created
            pass
    proc.kill()
    raise AssertionError("the run never wrote to its cache")


class _Empty:
    def __enter__(self):
        return self

    def __exit__(self, *exc):
        return False

    def entries(self) -> int:
        return 0


def _finish_and_compare(cache: Path, killed_entries: int) -> None:
    resumed = _start(cache, jobs=1)
    out, err = resumed.communicate(timeout=120)
    assert resumed.returncode == 0, err
    computed, cached, failed = (int(x) for x in out.split()[1:])
    assert failed == 0 and computed + cached == 40
    assert cached >= killed_entries  # everything committed before the kill was kept
    with ForecastCache.open(cache) as c:
        assert c.conn.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
        assert c.entries() == 40


def test_run_killed_with_sigkill_leaves_a_consistent_cache_and_resumes(tmp_path):
    proc = _start(tmp_path, jobs=2)
    seen = _entries_when_some_are_cached(tmp_path, proc)
    workers = [int(p) for p in subprocess.run(
        ["ps", "-o", "pid=", "--ppid", str(proc.pid)], capture_output=True, text=True
    ).stdout.split()]
    assert len(workers) == 2
    os.kill(proc.pid, signal.SIGKILL)
    proc.communicate(timeout=30)
    assert proc.returncode == -signal.SIGKILL
    with ForecastCache.open(tmp_path) as c:  # opens without a "damaged" rebuild
        left = c.entries()
    assert seen <= left < 40
    _finish_and_compare(tmp_path, left)
    # the workers of the killed run did not outlive it
    for pid in workers:
        stat = Path(f"/proc/{pid}/stat")
        assert not stat.exists() or stat.read_text().split()[2] == "Z", pid


def test_run_interrupted_with_ctrl_c_stops_and_resumes(tmp_path):
    proc = _start(tmp_path, jobs=2)
    _entries_when_some_are_cached(tmp_path, proc)
    os.kill(proc.pid, signal.SIGINT)
    _, err = proc.communicate(timeout=30)
    assert proc.returncode != 0 and "KeyboardInterrupt" in err
    with ForecastCache.open(tmp_path) as c:
        left = c.entries()
    assert 10 <= left < 40
    _finish_and_compare(tmp_path, left)


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
