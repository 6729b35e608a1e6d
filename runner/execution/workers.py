"""Worker processes supervised by this process: a stuck fit costs its worker, a dying worker
costs only the task it ran, and the data of a run travels to each worker once.

A worker process runs :func:`worker_main`.
"""

from __future__ import annotations

import os
import pickle
import signal
import subprocess
import sys
import tempfile
import time
from collections import deque
from collections.abc import Callable, Sequence
from multiprocessing.connection import Connection, wait
from pathlib import Path
from typing import Any

from runner.execution.serial import timeout_outcome
from runner.execution.tasks import SharedData, Task, TaskOutcome, failed, run_task

#: Largest number of tasks sent to a worker at once. Outcomes stream back one by one, so the
#: batch size only bounds the dispatch overhead and the imbalance at the end of a run.
MAX_BATCH = 32
#: Slack on top of ``fit_timeout`` before a worker is killed (pickling, pipe transfer).
TIMEOUT_SLACK = 0.25
#: How long a new worker may take to load the run's data and import the forecasters.
START_TIMEOUT = 300.0
#: Environment of worker processes: one BLAS/OpenMP thread each, since the workers themselves
#: are the parallelism (more threads would oversubscribe the cores and slow every fit).
WORKER_ENV = {
    "OMP_NUM_THREADS": "1",
    "OPENBLAS_NUM_THREADS": "1",
    "MKL_NUM_THREADS": "1",
    "VECLIB_MAXIMUM_THREADS": "1",
    "NUMEXPR_NUM_THREADS": "1",
}

OnDone = Callable[[TaskOutcome], None]




def write_data_file(shared: SharedData, folder: str) -> str:
    """Pickle the run's data (and this process's import path) once, for workers to load."""
    path = os.path.join(folder, "shared.pickle")
    with open(path, "wb") as fh:
        pickle.dump((list(sys.path), shared), fh, protocol=pickle.HIGHEST_PROTOCOL)
    return path


def _signal_name(code: int) -> str:
    try:
        return signal.Signals(-code).name
    except ValueError:
        return f"signal {-code}"


#: How a worker process starts (``-m runner.execution.workers`` would import this module twice,
#: since the package imports it).
_WORKER_BOOT = (
    "import sys; from runner.execution.workers import worker_main; "
    "worker_main(int(sys.argv[1]), int(sys.argv[2]), sys.argv[3])"
)


class _Worker:
    """One supervised worker process and the batch it is running."""

    def __init__(self, data_file: str) -> None:
        to_child_r, to_child_w = os.pipe()
        from_child_r, from_child_w = os.pipe()
        env = dict(os.environ)
        env.update(WORKER_ENV)
        # The runner package must be importable in the worker even when it is not installed.
        root = str(Path(__file__).resolve().parent.parent)
        env["PYTHONPATH"] = os.pathsep.join(p for p in (root, env.get("PYTHONPATH")) if p)
        try:
            self.proc = subprocess.Popen(
                [sys.executable, "-c", _WORKER_BOOT, str(to_child_r), str(from_child_w),
                 data_file],
                pass_fds=(to_child_r, from_child_w),
                stdin=subprocess.DEVNULL,
                # What a plugin prints must not mix with the leaderboard on stdout.
                stdout=2,
                env=env,
                close_fds=True,
            )
        finally:
            os.close(to_child_r)
            os.close(from_child_w)
        self.inbox = Connection(from_child_r, writable=False)
        self.outbox = Connection(to_child_w, readable=False)
        self.ready = False
        self.started = time.monotonic()
        self.batch: deque[int] = deque()  # positions of the tasks sent and not yet returned
        self.deadline = float("inf")

    def send(self, message: Any) -> None:
        self.outbox.send_bytes(pickle.dumps(message, protocol=pickle.HIGHEST_PROTOCOL))

    def death(self) -> str:
        """Why the process ended, for the failure message."""
        code = self.proc.wait()
        if code < 0:
            return f"killed by {_signal_name(code)}"
        return f"exit code {code}"

    def kill(self) -> None:
        if self.proc.poll() is None:
            self.proc.kill()
        self.proc.wait()
        self.inbox.close()
        self.outbox.close()


class _Supervisor:
    """Runs task positions on ``jobs`` worker processes, replacing any worker that fails."""

    def __init__(
        self, tasks: Sequence[Task], data_file: str, jobs: int, fit_timeout: float
    ) -> None:
        self.tasks = tasks
        self.data_file = data_file
        self.jobs = jobs
        self.fit_timeout = fit_timeout
        self.workers: list[_Worker] = []
        self.failed_starts = 0

    def _spawn(self) -> _Worker:
        worker = _Worker(self.data_file)
        self.workers.append(worker)
        return worker

    def _retire(self, worker: _Worker) -> None:
        worker.kill()
        self.workers.remove(worker)

    def close(self) -> None:
        """Stop every worker process."""
        for worker in list(self.workers):
            try:
                if worker.proc.poll() is None and worker.ready:
                    worker.send(("stop",))
            except OSError:
                pass
            self._retire(worker)

    def run(
        self,
        positions: Sequence[int],
        stop: bool,
        emit: Callable[[int, TaskOutcome], None],
    ) -> bool:
        """Run the tasks at ``positions``; ``emit(pos, outcome)`` for each. False if stopped."""
        queue: deque[int] = deque(positions)
        total = len(queue)
        done = 0
        while done < total:
            # Keep as many workers as there is work for (replacing any that were lost).
            busy = sum(1 for w in self.workers if w.batch)
            while len(self.workers) < min(self.jobs, busy + len(queue)):
                self._spawn()
            now = time.monotonic()
            # Smaller batches as the queue drains, so no worker is left with a long tail.
            size = max(1, min(MAX_BATCH, len(queue) // (2 * self.jobs)))
            for worker in self.workers:
                if worker.ready and not worker.batch and queue:
                    batch = [queue.popleft() for _ in range(min(size, len(queue)))]
                    worker.batch.extend(batch)
                    worker.send(("batch", [self.tasks[p] for p in batch]))
                    worker.deadline = now + self.fit_timeout + TIMEOUT_SLACK
            deadline = min(
                w.deadline if w.ready else w.started + max(START_TIMEOUT, self.fit_timeout)
                for w in self.workers
            )
            for conn in wait([w.inbox for w in self.workers], max(0.0, deadline - now)):
                worker = next((w for w in self.workers if w.inbox is conn), None)
                if worker is None:  # retired earlier in this round
                    continue
                try:
                    kind, payload = pickle.loads(worker.inbox.recv_bytes())
                except (EOFError, OSError):
                    done += self._lost(worker, queue, emit, None)
                    continue
                if kind == "ready":
                    worker.ready = True
                    self.failed_starts = 0
                else:
                    pos = worker.batch.popleft()
                    if payload.index != self.tasks[pos].index:
                        raise RuntimeError("worker returned an outcome for the wrong task")
                    worker.deadline = (
                        time.monotonic() + self.fit_timeout + TIMEOUT_SLACK
                        if worker.batch else float("inf")
                    )
                    emit(pos, payload)
                    done += 1
                    if stop and not payload.ok:
                        return False
            now = time.monotonic()
            for worker in list(self.workers):
                if worker.ready and worker.batch and now > worker.deadline:
                    done += self._lost(worker, queue, emit, "timeout")
                elif not worker.ready and now > worker.started + max(
                    START_TIMEOUT, self.fit_timeout
                ):
                    self._retire(worker)
                    raise RuntimeError(
                        f"a worker process did not start within {START_TIMEOUT:g} s"
                    )
        return True

    def _lost(
        self,
        worker: _Worker,
        queue: deque[int],
        emit: Callable[[int, TaskOutcome], None],
        reason: str | None,
    ) -> int:
        """A worker timed out or died: fail its current task, requeue the rest, replace it."""
        was_ready = worker.ready
        if reason == "timeout":
            worker.kill()
        why = worker.death()
        self._retire(worker)
        if not worker.batch:
            if not was_ready:
                self.failed_starts += 1
                if self.failed_starts >= 3:
                    raise RuntimeError(f"worker processes die while starting ({why})")
            return 0
        pos = worker.batch.popleft()
        task = self.tasks[pos]
        if reason == "timeout":
            outcome = timeout_outcome(task.index, self.fit_timeout, self.fit_timeout)
        else:
            outcome = failed(
                task.index, "crash", f"the worker process running this task died ({why})"
            )
        queue.extendleft(reversed(worker.batch))
        emit(pos, outcome)
        return 1


def run_workers(
    tasks: Sequence[Task],
    shared: SharedData,
    jobs: int,
    fit_timeout: float,
    stop: bool,
    on_done: OnDone | None,
    results: list[TaskOutcome | None],
) -> None:
    def emit(pos: int, outcome: TaskOutcome) -> None:
        results[pos] = outcome
        if on_done is not None:
            on_done(outcome)

    with tempfile.TemporaryDirectory(prefix="castgrid-run-") as folder:
        supervisor = _Supervisor(tasks, write_data_file(shared, folder), jobs, fit_timeout)
        try:
            supervisor.run(range(len(tasks)), stop, emit)
        finally:
            supervisor.close()


def _set_parent_death_signal() -> None:
    """Ask Linux to kill this worker when its parent dies (a killed run leaves no orphans)."""
    if not sys.platform.startswith("linux"):
        return
    try:
        import ctypes

        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        libc.prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG
    except (OSError, AttributeError):
        pass


def worker_main(read_fd: int, write_fd: int, data_file: str) -> None:
    """The loop of a worker process: load the data once, then run batches until told to stop."""
    # Ctrl-C reaches the whole process group; the parent decides what happens to the run.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _set_parent_death_signal()
    inbox = Connection(read_fd, writable=False)
    outbox = Connection(write_fd, readable=False)
    with open(data_file, "rb") as fh:
        parent_path, shared = pickle.load(fh)
    for entry in parent_path:
        if entry not in sys.path and (entry == "" or os.path.isdir(entry)):
            sys.path.append(entry)
    _preload(shared)

    def send(message: Any) -> None:
        outbox.send_bytes(pickle.dumps(message, protocol=pickle.HIGHEST_PROTOCOL))

    try:
        send(("ready", os.getpid()))
        while True:
            try:
                message = pickle.loads(inbox.recv_bytes())
            except EOFError:
                return
            if message[0] == "stop":
                return
            for task in message[1]:
                outcome = run_task(task, shared)
                try:
                    data = pickle.dumps(("outcome", outcome), protocol=pickle.HIGHEST_PROTOCOL)
                except Exception as exc:  # e.g. an info_ a plugin filled with unpicklable things
                    data = pickle.dumps(("outcome", failed(
                        task.index, "error",
                        f"the outcome cannot be sent back ({type(exc).__name__}: {exc})",
                        outcome.seconds,
                    )))
                outbox.send_bytes(data)
    except BrokenPipeError:  # the parent has gone away; nothing left to report to
        return


def _preload(shared: SharedData) -> None:
    """Import every forecaster's module now, so import time never counts toward a timeout."""
    from runner.errors import PluginError
    from runner.forecasters.registry import entry_of, load_entry

    for spec in shared.forecasters:
        try:
            load_entry(entry_of(spec))
        except (PluginError, KeyError, AssertionError):
            pass  # the task itself will report it

