"""Forecasts for the model tasks of a run: cache look-up, execution, cache fill.

:func:`forecast_models` looks every task up in the forecast cache (:mod:`runner.execution.cache`),
runs the rest (:mod:`runner.execution.engines`: in process, on local worker processes or on dask),
stores each success in the cache as soon as it arrives, and shows progress
(:mod:`runner.execution.progress`).

Tasks with the same cache key in one run (the same forecaster on identical training data, for
example two series with the same history) are computed once and count as cached.

The tasks are per-series (:class:`~runner.execution.tasks.ModelTask`) or panel tasks (one fit
per dataset and origin, :class:`~runner.execution.panel_tasks.PanelTask`), which go through the
same cache and engines; a panel outcome holds one row per series it forecast.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from runner.config import ExecutionConfig
from runner.execution.engines import execute, not_run
from runner.execution.progress import Progress
from runner.execution.tasks import ModelTask, SharedData, Task, TaskOutcome


@dataclass
class EngineCounts:
    """How the model tasks of a run were served; the four counts add up to the task count.

    Counted in (series, fold) tasks: a panel task counts once per series it forecasts.

    ``computed``: forecast in this run; ``cached``: forecasts served from the cache (or from an
    identical task of this run); ``failed``: any failure reason but ``not-run``, including
    failures the cache remembered (``error``, ``invalid-output``: see
    :mod:`runner.execution.cache`);
    ``not_run``: skipped after an earlier failure with ``on_error: stop``.
    """

    computed: int = 0
    cached: int = 0
    failed: int = 0
    not_run: int = 0

    def __add__(self, other: EngineCounts) -> EngineCounts:
        return EngineCounts(self.computed + other.computed, self.cached + other.cached,
                            self.failed + other.failed, self.not_run + other.not_run)


class _FromConfig:
    def __repr__(self) -> str:
        return "<execution.cache>"


#: Default of ``cache_path``: take the folder from ``execution.cache`` (relative to the cwd).
FROM_CONFIG = _FromConfig()


def _normalise_info(outcome: TaskOutcome) -> None:
    # The cache keeps info as JSON; pass fresh outcomes through the same form so that a
    # computed and a cached outcome of one task are equal.
    from runner.execution.cache import info_json

    outcome.info = json.loads(info_json(outcome.info))


@dataclass
class _Lookup:
    """What the cache already knows about a run's tasks, and what is left to compute.

    ``todo`` lists the positions to run; ``twins`` maps a position that runs to the later
    positions with the same key (served from its outcome).
    """

    outcomes: list[TaskOutcome | None]
    keys: list[bytes] = field(default_factory=list)
    todo: list[int] = field(default_factory=list)
    twins: dict[int, list[int]] = field(default_factory=dict)
    cached_failures: int = 0


def _rows(task: Task, shared: SharedData) -> int | None:
    """Series in the task's outcome arrays: None for a per-series task (1-D arrays)."""
    if isinstance(task, ModelTask):
        return None
    from runner.execution.panel_tasks import panel_rows

    return panel_rows(task, shared)


def _look_up(cache: Any, tasks: Sequence[Task], shared: SharedData) -> _Lookup:
    from runner.execution.cache import outcome_from_row, task_keys

    n = len(tasks)
    found_all = _Lookup([None] * n)
    if cache is None:
        found_all.todo = list(range(n))
        return found_all
    found_all.keys = keys = task_keys(tasks, shared)
    found = cache.lookup(keys)
    first: dict[bytes, int] = {}
    for pos, key in enumerate(keys):
        row = found.get(key)
        if row is not None:
            outcome = outcome_from_row(tasks[pos].index, row, shared.horizon, len(shared.levels),
                                       _rows(tasks[pos], shared))
            if outcome is not None:
                found_all.outcomes[pos] = outcome
                found_all.cached_failures += not outcome.ok
                continue
        if key in first:
            found_all.twins.setdefault(first[key], []).append(pos)
        else:
            first[key] = pos
            found_all.todo.append(pos)
    return found_all


def _counts(
    outcomes: Sequence[TaskOutcome], tasks: Sequence[Task], shared: SharedData
) -> EngineCounts:
    counts = EngineCounts()
    for o, t in zip(outcomes, tasks):
        n = _rows(t, shared) or 1
        if o.reason == "not-run":
            counts.not_run += n
        elif not o.ok:
            counts.failed += n
        elif o.cached:
            counts.cached += n
        else:
            counts.computed += n
    return counts


def forecast_models(
    tasks: Sequence[Task],
    shared: SharedData,
    execution: ExecutionConfig,
    *,
    use_cache: bool = True,
    jobs: int | None = None,
    quiet: bool = False,
    cache_path: str | Path | None | _FromConfig = FROM_CONFIG,
    on_done: Callable[[TaskOutcome], None] | None = None,
    label: str = "model tasks",
) -> tuple[list[TaskOutcome], EngineCounts]:
    """One outcome per task, in task order, and the computed / cached / failed counts.

    ``cache_path`` is the cache folder (``None``: no cache; by default ``execution.cache``,
    relative to the current directory). ``use_cache=False`` (``--no-cache``) neither reads nor
    writes it. ``jobs`` overrides ``execution.jobs``. With ``on_error: stop`` the list still has
    one outcome per task; tasks that did not run have reason ``not-run``. ``on_done`` is called
    with each computed outcome as it arrives (in completion order). ``label`` names the tasks
    in the progress line.
    """
    if isinstance(cache_path, _FromConfig):
        cache_path = execution.cache_folder()
    cache = None
    if use_cache and cache_path is not None and tasks:
        from runner.execution.cache import ForecastCache

        cache = ForecastCache.open(cache_path)
    try:
        found = _look_up(cache, tasks, shared)
        position = {tasks[p].index: p for p in found.todo}
        served = len(tasks) - len(found.todo) - sum(map(len, found.twins.values()))
        progress = Progress(len(tasks), cached=served, quiet=quiet, label=label)
        progress.failed = found.cached_failures
        identities: dict[int, tuple[str, str]] = {}

        def done(outcome: TaskOutcome) -> None:
            pos = position[outcome.index]
            _normalise_info(outcome)
            if cache is not None:
                f = tasks[pos].forecaster
                if f not in identities:
                    from runner.forecasters.registry import identity

                    spec = shared.forecasters[f]
                    identities[f] = (spec.kind, identity(spec))
                kind, ident = identities[f]
                cache.add(found.keys[pos], kind, ident, outcome, shared.horizon,
                          len(shared.levels))
            for _ in range(1 + len(found.twins.get(pos, ()))):
                progress.task_done(outcome.ok)
            if on_done is not None:
                on_done(outcome)

        try:
            ran = execute(
                [tasks[p] for p in found.todo],
                shared,
                jobs=jobs if jobs is not None else execution.jobs,
                engine=execution.engine,
                address=execution.address,
                fit_timeout=execution.fit_timeout,
                on_error=execution.on_error,
                on_done=done,
            )
        finally:
            progress.close()
    finally:
        if cache is not None:
            cache.close()
    outcomes = found.outcomes
    for pos, outcome in zip(found.todo, ran):
        outcomes[pos] = outcome
        for twin in found.twins.get(pos, ()):
            outcomes[twin] = _twin_of(outcome, tasks[twin].index)
    final = [o if o is not None else not_run(t.index) for t, o in zip(tasks, outcomes)]
    return final, _counts(final, tasks, shared)


def _twin_of(outcome: TaskOutcome, index: int) -> TaskOutcome:
    """The outcome of a task with the same key as the one that ran (shares its arrays' values)."""
    return TaskOutcome(
        index,
        None if outcome.point is None else outcome.point.copy(),
        None if outcome.lower is None else outcome.lower.copy(),
        None if outcome.upper is None else outcome.upper.copy(),
        reason=outcome.reason,
        message=outcome.message,
        info=json.loads(json.dumps(outcome.info)),
        seconds=outcome.seconds,
        cached=outcome.ok,
    )
