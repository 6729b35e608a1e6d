"""Worker processes supervised by this process: a stuck fit costs its worker, a dying worker
costs only the task it ran, and the data of a run travels to each worker once.

On Linux, when this process runs a single thread, a worker is a fork of it: it starts at once,
with the libraries the forecasters need already imported (loaded here once, before the first
fork) and the run's data in memory, shared until written. Elsewhere, or when threads are running
(forking a process with several threads may copy a lock held by another thread), a worker is a
new interpreter that loads the run's data from a file written once and runs :func:`worker_main`.
Both run the same loop, :func:`_serve`.
"""

from __future__ import annotations

import os
import pickle
import signal
import subprocess
import sys
import tempfile
import threading
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


def can_fork() -> bool:
    """Whether workers are started as forks of this process (Linux, one thread running)."""
    return sys.platform.startswith("linux") and threading.active_count() == 1


def flush_before_fork() -> None:
    """Flush stdout and stderr: what is buffered in this process must not be written twice,
    once by it and once by the fork about to be made."""
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.flush()
        except (OSError, ValueError, AttributeError):
            pass


class _Forked:
    """A forked worker process, with the part of ``subprocess.Popen``'s interface used here."""

    def __init__(self, pid: int) -> None:
        self.pid = pid
        self.returncode: int | None = None

    def _reap(self, flags: int) -> None:
        try:
            pid, status = os.waitpid(self.pid, flags)
        except ChildProcessError:  # reaped elsewhere: its status is lost
            self.returncode = 255
            return
        if pid:
            self.returncode = os.waitstatus_to_exitcode(status)

    def poll(self) -> int | None:
        if self.returncode is None:
            self._reap(os.WNOHANG)
        return self.returncode

    def wait(self) -> int:
        if self.returncode is None:
            self._reap(0)
        assert self.returncode is not None
        return self.returncode

    def kill(self) -> None:
        if self.returncode is None:
            try:
                os.kill(self.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass


def _fork(shared: SharedData, to_child_r: int, from_child_w: int, drop: list[int]) -> _Forked:
    """Fork a worker that serves tasks on the two pipe ends; ``drop`` are this process's ends."""
    flush_before_fork()
    pid = os.fork()
    if pid:
        return _Forked(pid)
    code = 0
    try:  # the child: never returns into the caller's code
        keep = {0, 1, 2, to_child_r, from_child_w}
        # Pipe ends of this process and of sibling workers must close here, or a worker's death
        # would not reach the supervisor as the end of its pipe.
        for fd in drop + _open_fds():
            if fd not in keep:
                try:
                    os.close(fd)
                except OSError:
                    pass
        devnull = os.open(os.devnull, os.O_RDONLY)
        os.dup2(devnull, 0)
        os.close(devnull)
        os.dup2(2, 1)  # what a plugin prints must not mix with the leaderboard on stdout
        signal.signal(signal.SIGALRM, signal.SIG_DFL)
        signal.signal(signal.SIGTERM, signal.SIG_DFL)
        limits = _blas_one_thread()  # the libraries are loaded already: env vars come too late
        with limits:
            _serve(to_child_r, from_child_w, shared)
    except BaseException:
        code = 1
        try:
            import traceback

            traceback.print_exc()
        except BaseException:
            pass
    finally:
        os._exit(code)


def _open_fds() -> list[int]:
    try:
        return [int(name) for name in os.listdir("/proc/self/fd")]
    except OSError:
        return []


def _blas_one_thread() -> Any:
    from runner.execution.serial import _blas_one_thread as limit

    return limit()


class _Worker:
    """One supervised worker process and the batch it is running.

    A fork of this process when ``shared`` is given, else a new interpreter that loads
    ``data_file``.
    """

    def __init__(self, data_file: str | None, shared: SharedData | None = None,
                 siblings: Sequence[_Worker] = ()) -> None:
        to_child_r, to_child_w = os.pipe()
        from_child_r, from_child_w = os.pipe()
        if shared is not None:
            drop = [to_child_w, from_child_r]
            for w in siblings:
                drop.extend((w.inbox.fileno(), w.outbox.fileno()))
            try:
                self.proc: Any = _fork(shared, to_child_r, from_child_w, drop)
            finally:
                os.close(to_child_r)
                os.close(from_child_w)
            self._connect(from_child_r, to_child_w)
            return
        assert data_file is not None
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
        self._connect(from_child_r, to_child_w)

    def _connect(self, from_child_r: int, to_child_w: int) -> None:
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
    """Runs task positions on ``jobs`` worker processes, replacing any worker that fails.

    Workers are forks of this process (:func:`can_fork`) when ``shared`` is given, else new
    interpreters loading ``data_file`` (written from ``shared`` into ``folder`` when needed).
    """

    def __init__(
        self, tasks: Sequence[Task], data_file: str | None, jobs: int, fit_timeout: float,
        *, shared: SharedData | None = None, folder: str | None = None,
    ) -> None:
        self.tasks = tasks
        self.data_file = data_file
        self.jobs = jobs
        self.fit_timeout = fit_timeout
        self.workers: list[_Worker] = []
        self.failed_starts = 0
        self.shared = shared
        self.folder = folder

    def _spawn(self) -> _Worker:
        if self.shared is not None and can_fork():
            _preload(self.shared)  # once: every fork then starts with the libraries loaded
            worker = _Worker(None, self.shared, self.workers)
        else:
            if self.data_file is None:
                assert self.shared is not None and self.folder is not None
                self.data_file = write_data_file(self.shared, self.folder)
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
                # The next batch goes out while the worker still has tasks in hand, so it never
                # waits for this process between batches (a round trip per batch, longer on a
                # busy machine, would leave the worker idle).
                if worker.ready and queue and len(worker.batch) <= size // 2:
                    batch = [queue.popleft() for _ in range(min(size, len(queue)))]
                    if not worker.batch:  # idle until now: the clock starts with this batch
                        worker.deadline = now + self.fit_timeout + TIMEOUT_SLACK
                    worker.batch.extend(batch)
                    worker.send(("batch", [self.tasks[p] for p in batch]))
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
        # the data file is written only if a worker has to be a new interpreter
        supervisor = _Supervisor(tasks, None, jobs, fit_timeout, shared=shared, folder=folder)
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
    with open(data_file, "rb") as fh:
        parent_path, shared = pickle.load(fh)
    for entry in parent_path:
        if entry not in sys.path and (entry == "" or os.path.isdir(entry)):
            sys.path.append(entry)
    _preload(shared)
    _serve(read_fd, write_fd, shared)


def _serve(read_fd: int, write_fd: int, shared: SharedData) -> None:
    """Say ready, then run the batches that arrive on ``read_fd`` until told to stop."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _set_parent_death_signal()
    inbox = Connection(read_fd, writable=False)
    outbox = Connection(write_fd, readable=False)

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
    from runner.forecasters.models import load_fitting_libraries
    from runner.forecasters.registry import entry_of, load_entry

    entries = []
    for spec in shared.forecasters:
        try:
            entries.append(entry_of(spec))
            load_entry(entries[-1])
        except (PluginError, KeyError, AssertionError):
            pass  # the task itself will report it
    load_fitting_libraries(entries)  # the models import statsmodels only when they fit

