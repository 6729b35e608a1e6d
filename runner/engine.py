"""Forecasts for the per-series model tasks of a run: cache look-up, execution, cache fill.

(First version: no cache, serial execution; the engine issue fills in the rest.)
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from .config import ExecutionConfig
from .parallel import execute
from .tasks import ModelTask, SharedData, TaskOutcome


@dataclass
class EngineCounts:
    """How the model tasks of a run were served."""

    computed: int = 0
    cached: int = 0
    failed: int = 0


def forecast_models(
    tasks: Sequence[ModelTask],
    shared: SharedData,
    execution: ExecutionConfig,
    *,
    use_cache: bool = True,
    jobs: int | None = None,
    quiet: bool = False,
) -> tuple[list[TaskOutcome], EngineCounts]:
    """One outcome per task, in task order, and the computed / cached / failed counts."""
    outcomes = execute(
        tasks,
        shared,
        jobs=jobs if jobs is not None else execution.jobs,
        engine=execution.engine,
        address=execution.address,
        fit_timeout=execution.fit_timeout,
        on_error=execution.on_error,
    )
    counts = EngineCounts(computed=len(outcomes), failed=sum(not o.ok for o in outcomes))
    return outcomes, counts
