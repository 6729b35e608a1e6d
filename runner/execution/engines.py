"""Running model tasks (per series, and panel tasks): in this process, on local worker processes,
or on dask.

Three ways, one result: every way produces the same :class:`~runner.execution.tasks.TaskOutcome`
for the same task, since every fit goes through :func:`runner.execution.tasks.run_task` (a
per-series task, or a panel task: one fit per dataset and origin on every series).

* ``jobs=1``: one task after another. Built-in forecasters run in this process; a fit past
  ``fit_timeout`` is stopped by a ``SIGALRM`` timer that raises inside it (this stops Python
  code and sleeps, not a fit stuck inside a C extension). Plugin forecasters (``kind:
  plugin`` and ``panel_plugin``) are code castgrid does not know, so they run in one
  supervised worker process, as with ``jobs >= 2``: a plugin that ends its process
  (``os._exit``, a crash in C code) or hangs in C code costs its task (reason ``crash`` or
  ``timeout``), never the run. In-process guards cannot do this: ``os._exit`` skips
  ``atexit`` handlers and ``finally`` blocks, so the run would end with its results unwritten
  and whatever exit code the plugin chose.
* ``jobs >= 2``, engine ``local``: worker processes supervised by this process. The data of the
  run (:class:`~runner.execution.tasks.SharedData`) is pickled once into a temporary file that each
  worker loads once at start; tasks then travel in batches, and each outcome comes back as soon as
  its task is done. The supervisor knows which task every worker is running, so a fit past
  ``fit_timeout`` gets its worker killed (reason ``timeout``) and a worker that dies fails only
  the task it was running (reason ``crash``); either way a fresh worker takes over the rest of
  the batch.
* engine ``dask``: batches are dask tasks on a ``dask.distributed`` cluster (``address``, or a
  local cluster on 127.0.0.1 when it is None). The data is scattered to every dask worker once;
  on the dask worker each batch runs in the same supervised worker process as above, so a stuck
  or crashing fit neither hangs nor kills the dask worker.

Why not a joblib/loky pool: a loky executor marks every task in flight as failed when one worker
dies, and it cannot stop one stuck task; both faults must cost only the task that caused them.

The three ways live in :mod:`runner.execution.serial`, :mod:`runner.execution.workers` and
:mod:`runner.execution.dask_cluster`; ``execution.engine`` and ``jobs`` choose among them here.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from functools import partial

from runner.config.model import check_jobs
from runner.execution.tasks import SharedData, Task, TaskOutcome, failed
from runner.forecasters.registry import PANEL_PLUGIN, PLUGIN

OnDone = Callable[[TaskOutcome], None]


def usable_cores() -> int:
    """The cores this process may use (its CPU affinity where the system has one)."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # not on Linux
        return max(1, os.cpu_count() or 1)


def resolve_jobs(jobs: int) -> int:
    """Worker count for ``jobs`` (``-1`` = every core this process may use)."""
    if jobs == -1:
        return usable_cores()
    return check_jobs(jobs)


def not_run(index: int) -> TaskOutcome:
    """The outcome of a task skipped because the run stopped at an earlier failure."""
    return failed(index, "not-run", "the run stopped at an earlier failure (on_error: stop)")


def execute(
    tasks: Sequence[Task],
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
            from runner.execution.dask_cluster import run_dask

            run_dask(tasks, shared, n_jobs, address, fit_timeout, stop, on_done, results)
        elif n_jobs == 1 or len(tasks) == 1:
            _one_at_a_time(tasks, shared, fit_timeout, stop, on_done, results)
        else:
            from runner.execution.workers import run_workers

            run_workers(tasks, shared, n_jobs, fit_timeout, stop, on_done, results)
    return [o if o is not None else not_run(t.index) for t, o in zip(tasks, results)]


def _one_at_a_time(
    tasks: Sequence[Task],
    shared: SharedData,
    fit_timeout: float,
    stop: bool,
    on_done: OnDone | None,
    results: list[TaskOutcome | None],
) -> None:
    """``jobs=1``: built-in forecasters in this process, then plugins in one worker process."""
    from runner.execution.serial import run_serial
    from runner.execution.workers import run_workers

    plugin = [shared.forecasters[t.forecaster].kind in (PLUGIN, PANEL_PLUGIN) for t in tasks]
    parts = (
        ([i for i, p in enumerate(plugin) if not p], run_serial),
        ([i for i, p in enumerate(plugin) if p], partial(run_workers, jobs=1)),
    )
    for positions, runner in parts:
        if not positions:
            continue
        part_results: list[TaskOutcome | None] = [None] * len(positions)
        runner([tasks[i] for i in positions], shared, fit_timeout=fit_timeout, stop=stop,
               on_done=on_done, results=part_results)
        for i, outcome in zip(positions, part_results):
            results[i] = outcome
        if stop and any(o is not None and not o.ok for o in part_results):
            return
