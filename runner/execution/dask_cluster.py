"""Running task batches on a ``dask.distributed`` cluster; on each dask worker the batch runs in a
supervised worker process (:mod:`runner.execution.workers`), so a stuck or crashing fit neither
hangs nor kills the dask worker."""

from __future__ import annotations

import os
import pickle
import sys
import tempfile
import threading
from collections.abc import Sequence

from runner.execution.tasks import SharedData, Task, TaskOutcome, failed
from runner.execution.workers import MAX_BATCH, OnDone, _Supervisor

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
    run_id: str, blob: bytes, batch: list[Task], fit_timeout: float
) -> list[TaskOutcome]:
    """On a dask worker: run one batch in this thread's supervised worker process."""
    supervisor = _dask_supervisor(run_id, blob, fit_timeout)
    supervisor.tasks = batch
    out: list[TaskOutcome | None] = [None] * len(batch)

    def emit(pos: int, outcome: TaskOutcome) -> None:
        out[pos] = outcome

    supervisor.run(range(len(batch)), False, emit)
    return [o for o in out if o is not None]


def run_dask(
    tasks: Sequence[Task],
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


