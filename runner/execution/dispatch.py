"""Forecasts for the per-series model tasks of a run: cache look-up, execution, cache fill.

:func:`forecast_models` looks every task up in the forecast cache (:mod:`runner.execution.cache`),
runs the rest (:mod:`runner.execution.engines`: in process, on local worker processes or on dask),
stores each success in the cache as soon as it arrives, and shows progress
(:mod:`runner.execution.progress`).

Tasks with the same cache key in one run (the same forecaster on identical training data, for
example two series with the same history) are computed once and count as cached.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

from runner.config import ExecutionConfig
from runner.execution.engines import execute, not_run
from runner.execution.progress import Progress
from runner.execution.tasks import ModelTask, SharedData, TaskOutcome


@dataclass
class EngineCounts:
    """How the model tasks of a run were served; the four counts add up to the task count.

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


def forecast_models(
    tasks: Sequence[ModelTask],
    shared: SharedData,
    execution: ExecutionConfig,
    *,
    use_cache: bool = True,
    jobs: int | None = None,
    quiet: bool = False,
    cache_path: str | Path | None | _FromConfig = FROM_CONFIG,
    on_done: Callable[[TaskOutcome], None] | None = None,
) -> tuple[list[TaskOutcome], EngineCounts]:
    """One outcome per task, in task order, and the computed / cached / failed counts.

    ``cache_path`` is the cache folder (``None``: no cache; by default ``execution.cache``,
    relative to the current directory). ``use_cache=False`` (``--no-cache``) neither reads nor
    writes it. ``jobs`` overrides ``execution.jobs``. With ``on_error: stop`` the list still has
    one outcome per task; tasks that did not run have reason ``not-run``. ``on_done`` is called
    with each computed outcome as it arrives (in completion order).
    """
    if isinstance(cache_path, _FromConfig):
        cache_path = execution.cache_folder()
    n = len(tasks)
    outcomes: list[TaskOutcome | None] = [None] * n
    counts = EngineCounts()
    cache = None
    keys: list[bytes] = []
    todo: list[int] = list(range(n))
    twins: dict[int, list[int]] = {}  # position run -> later positions with the same key
    cached_failures = 0
    if use_cache and cache_path is not None and n:
        from runner.execution.cache import ForecastCache, outcome_from_row, task_keys

        cache = ForecastCache.open(cache_path)
        keys = task_keys(tasks, shared)
        found = cache.lookup(keys)
        first: dict[bytes, int] = {}
        todo = []
        for pos, key in enumerate(keys):
            row = found.get(key)
            if row is not None:
                outcome = outcome_from_row(tasks[pos].index, row, shared.horizon,
                                           len(shared.levels))
                if outcome is not None:
                    outcomes[pos] = outcome
                    cached_failures += not outcome.ok
                    continue
            if key in first:
                twins.setdefault(first[key], []).append(pos)
            else:
                first[key] = pos
                todo.append(pos)
    position = {tasks[p].index: p for p in todo}
    progress = Progress(n, cached=n - len(todo) - sum(map(len, twins.values())), quiet=quiet)
    progress.failed = cached_failures
    kinds: dict[int, tuple[str, str]] = {}

    def done(outcome: TaskOutcome) -> None:
        pos = position[outcome.index]
        _normalise_info(outcome)
        if cache is not None:
            f = tasks[pos].forecaster
            if f not in kinds:
                from runner.forecasters.registry import identity

                spec = shared.forecasters[f]
                kinds[f] = (spec.kind, identity(spec))
            cache.add(keys[pos], kinds[f][0], kinds[f][1], outcome, shared.horizon,
                      len(shared.levels))
        progress.task_done(outcome.ok)
        for _ in twins.get(pos, ()):
            progress.task_done(outcome.ok)
        if on_done is not None:
            on_done(outcome)

    try:
        ran = execute(
            [tasks[p] for p in todo],
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
        if cache is not None:
            cache.close()
    for pos, outcome in zip(todo, ran):
        outcomes[pos] = outcome
        for twin in twins.get(pos, ()):
            outcomes[twin] = _twin_of(outcome, tasks[twin].index)
    final = [o if o is not None else not_run(t.index) for t, o in zip(tasks, outcomes)]
    for o in final:
        if o.reason == "not-run":
            counts.not_run += 1
        elif not o.ok:
            counts.failed += 1
        elif o.cached:
            counts.cached += 1
        else:
            counts.computed += 1
    return final, counts


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
