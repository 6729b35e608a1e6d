"""Running the per-series model tasks: in this process, on local worker processes, or on dask.

Three ways, one result: every way produces the same :class:`~runner.tasks.TaskOutcome` for the
same task, since every fit goes through :func:`runner.tasks.run_model_task`.

* ``jobs=1``: in this process, one task after another. A fit past ``fit_timeout`` is stopped by a
  ``SIGALRM`` timer that raises inside it; this stops Python code and sleeps, not a fit stuck
  inside a C extension, and a fit that kills the process takes the run with it. Use ``jobs >= 2``
  (worker processes) for full isolation.
* ``jobs >= 2``, engine ``local``: worker processes supervised by this process. The data of the
  run (:class:`~runner.tasks.SharedData`) is pickled once into a temporary file that each worker
  loads once at start; tasks then travel in batches, and each outcome comes back as soon as its
  task is done. The supervisor knows which task every worker is running, so a fit past
  ``fit_timeout`` gets its worker killed (reason ``timeout``) and a worker that dies fails only
  the task it was running (reason ``crash``); either way a fresh worker takes over the rest of
  the batch.
* engine ``dask``: batches are dask tasks on a ``dask.distributed`` cluster (``address``, or a
  local cluster on 127.0.0.1 when it is None). The data is scattered to every dask worker once;
  on the dask worker each batch runs in the same supervised worker process as above, so a stuck
  or crashing fit neither hangs nor kills the dask worker.

Why not a joblib/loky pool: a loky executor marks every task in flight as failed when one worker
dies, and it cannot stop one stuck task; both faults must cost only the task that caused them.

A worker process runs :func:`worker_main`.
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

from .tasks import ModelTask, SharedData, TaskOutcome, failed, run_model_task

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


def resolve_jobs(jobs: int) -> int:
    """Worker count for ``jobs`` (``-1`` = every core this process may use)."""
    if jobs == -1:
        try:
            return max(1, len(os.sched_getaffinity(0)))
        except AttributeError:  # not on Linux
            return max(1, os.cpu_count() or 1)
    if jobs < 1:
        raise ValueError(f"jobs: expected a worker count >= 1 or -1, got {jobs}")
    return jobs


def not_run(index: int) -> TaskOutcome:
    """The outcome of a task skipped because the run stopped at an earlier failure."""
    return failed(index, "not-run", "the run stopped at an earlier failure (on_error: stop)")


def execute(
    tasks: Sequence[ModelTask],
    shared: SharedData,
    *,
    jobs: int = 1,
    engine: str = "local",
    address: str | None = None,
    fit_timeout: float = 120.0,
    on_error: str = "record",
    on_done: OnDone | None = None,
) -> list[TaskOutcome]:
    """Run ``tasks`` and return one outcome per task, in the order of ``tasks``.

    ``on_done`` is called in this process with each outcome as soon as it is known (in
    completion order). With ``on_error="stop"`` no new task starts after the first failure,
    tasks in flight are stopped, and every task that did not finish gets reason ``not-run``.
    ``jobs=-1`` means every core; ``engine="dask"`` runs on ``address`` (or a local cluster
    with ``jobs`` workers when ``address`` is None).
    """
    if engine not in ("local", "dask"):
        raise ValueError(f"engine: expected local or dask, got {engine!r}")
    if on_error not in ("record", "stop"):
        raise ValueError(f"on_error: expected record or stop, got {on_error!r}")
    n_jobs = resolve_jobs(jobs)
    results: list[TaskOutcome | None] = [None] * len(tasks)
    stop = on_error == "stop"
    if tasks:
        if engine == "dask":
            _run_dask(tasks, shared, n_jobs, address, fit_timeout, stop, on_done, results)
        elif n_jobs == 1 or len(tasks) == 1:
            _run_serial(tasks, shared, fit_timeout, stop, on_done, results)
        else:
            _run_local(tasks, shared, n_jobs, fit_timeout, stop, on_done, results)
    return [o if o is not None else not_run(t.index) for t, o in zip(tasks, results)]


# ----------------------------------------------------------------------------- in this process


class _FitTimeout(BaseException):
    """Raised inside a fit by the timer; a BaseException so ``except Exception`` won't eat it."""


def _timeout_outcome(index: int, fit_timeout: float, seconds: float) -> TaskOutcome:
    return failed(
        index, "timeout", f"fit took longer than fit_timeout ({fit_timeout:g} s) and was stopped",
        seconds,
    )


def run_with_timer(task: ModelTask, shared: SharedData, fit_timeout: float) -> TaskOutcome:
    """:func:`run_model_task` stopped by ``SIGALRM`` after ``fit_timeout`` seconds.

    Only in the main thread of a POSIX process (elsewhere the task runs without a timer). The
    timer re-fires every half second, so a fit that swallows the first interruption is
    interrupted again.
    """
    in_main = threading.current_thread() is threading.main_thread()
    if not hasattr(signal, "setitimer") or not in_main:
        return run_model_task(task, shared)
    armed = [True]

    def _alarm(signum: int, frame: Any) -> None:
        if armed[0]:
            raise _FitTimeout

    t0 = time.perf_counter()
    previous = signal.signal(signal.SIGALRM, _alarm)
    try:
        try:
            signal.setitimer(signal.ITIMER_REAL, fit_timeout, 0.5)
            return run_model_task(task, shared)
        finally:
            armed[0] = False
            signal.setitimer(signal.ITIMER_REAL, 0)
    except _FitTimeout:
        return _timeout_outcome(task.index, fit_timeout, time.perf_counter() - t0)
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


def _run_serial(
    tasks: Sequence[ModelTask],
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


# ----------------------------------------------------------------------------- worker processes


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


#: How a worker process starts (``-m runner.parallel`` would import this module twice, since
#: the package imports it).
_WORKER_BOOT = (
    "import sys; from runner.parallel import worker_main; "
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
        self, tasks: Sequence[ModelTask], data_file: str, jobs: int, fit_timeout: float
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
            outcome = _timeout_outcome(task.index, self.fit_timeout, self.fit_timeout)
        else:
            outcome = failed(
                task.index, "crash", f"the worker process running this task died ({why})"
            )
        queue.extendleft(reversed(worker.batch))
        emit(pos, outcome)
        return 1


def _run_local(
    tasks: Sequence[ModelTask],
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
                outcome = run_model_task(task, shared)
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
    from .errors import PluginError
    from .registry import entry_of, load_entry

    for spec in shared.forecasters:
        try:
            load_entry(entry_of(spec))
        except (PluginError, KeyError, AssertionError):
            pass  # the task itself will report it


# ----------------------------------------------------------------------------- dask


#: On a dask worker: (run id, thread id) -> supervisor of this thread's worker process.
_DASK_POOLS: dict[tuple[str, int], tuple[_Supervisor, str]] = {}
_DASK_LOCK = threading.Lock()


def _dask_supervisor(run_id: str, blob: bytes, fit_timeout: float) -> _Supervisor:
    key = (run_id, threading.get_ident())
    with _DASK_LOCK:
        for old in [k for k in _DASK_POOLS if k[0] != run_id]:
            _dask_close_one(old)
        if key not in _DASK_POOLS:
            folder = tempfile.mkdtemp(prefix="castgrid-dask-")
            data_file = os.path.join(folder, "shared.pickle")
            with open(data_file, "wb") as fh:
                fh.write(blob)
            _DASK_POOLS[key] = (_Supervisor([], data_file, 1, fit_timeout), folder)
        return _DASK_POOLS[key][0]


def _dask_close_one(key: tuple[str, int]) -> None:
    import shutil

    supervisor, folder = _DASK_POOLS.pop(key)
    supervisor.close()
    shutil.rmtree(folder, ignore_errors=True)


def dask_cleanup(run_id: str) -> int:
    """On a dask worker: stop the worker processes of ``run_id``; returns how many."""
    with _DASK_LOCK:
        keys = [k for k in _DASK_POOLS if k[0] == run_id]
        for key in keys:
            _dask_close_one(key)
    return len(keys)


def dask_batch(
    run_id: str, blob: bytes, batch: list[ModelTask], fit_timeout: float
) -> list[TaskOutcome]:
    """On a dask worker: run one batch in this thread's supervised worker process."""
    supervisor = _dask_supervisor(run_id, blob, fit_timeout)
    supervisor.tasks = batch
    out: list[TaskOutcome | None] = [None] * len(batch)

    def emit(pos: int, outcome: TaskOutcome) -> None:
        out[pos] = outcome

    supervisor.run(range(len(batch)), False, emit)
    return [o for o in out if o is not None]


def _run_dask(
    tasks: Sequence[ModelTask],
    shared: SharedData,
    jobs: int,
    address: str | None,
    fit_timeout: float,
    stop: bool,
    on_done: OnDone | None,
    results: list[TaskOutcome | None],
) -> None:
    import logging
    import uuid

    from distributed import Client, LocalCluster, as_completed

    cluster = None
    if address:
        client = Client(address, timeout="30s")
    else:
        cluster = LocalCluster(
            n_workers=jobs, threads_per_worker=1, processes=True, host="127.0.0.1",
            dashboard_address="127.0.0.1:0", silence_logs=logging.ERROR,
        )
        client = Client(cluster)
    run_id = uuid.uuid4().hex
    try:
        blob = pickle.dumps((list(sys.path), shared), protocol=pickle.HIGHEST_PROTOCOL)
        [blob_future] = client.scatter([blob], broadcast=True, hash=False)
        threads = max(1, sum(client.nthreads().values()))
        size = max(1, min(MAX_BATCH, len(tasks) // (4 * threads)))
        starts = range(0, len(tasks), size)
        futures = {
            client.submit(
                dask_batch, run_id, blob_future, list(tasks[s : s + size]), fit_timeout,
                pure=False, key=f"castgrid-batch-{run_id}-{s}",
            ): s
            for s in starts
        }
        stopped = False
        for future in as_completed(futures):
            s = futures[future]
            if stopped:
                continue
            try:
                outs = future.result()
            except Exception as exc:  # the dask worker itself was lost: fail only this batch
                outs = [
                    failed(t.index, "crash", f"the dask worker running this task was lost "
                           f"({type(exc).__name__}: {exc})")
                    for t in tasks[s : s + size]
                ]
            for k, outcome in enumerate(outs):
                results[s + k] = outcome
                if on_done is not None:
                    on_done(outcome)
                if stop and not outcome.ok:
                    stopped = True
                    break
            if stopped:
                client.cancel([f for f in futures if not f.done()])
    finally:
        try:
            client.run(dask_cleanup, run_id)
        except Exception:  # cleanup is best effort; the worker processes exit with their parent
            pass
        client.close()
        if cluster is not None:
            cluster.close()

