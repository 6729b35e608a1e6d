"""Running the per-series model tasks (serial for now; the engine issue adds workers)."""

from __future__ import annotations

from collections.abc import Callable, Sequence

from .tasks import ModelTask, SharedData, TaskOutcome, run_model_task


def execute(
    tasks: Sequence[ModelTask],
    shared: SharedData,
    *,
    jobs: int = 1,
    engine: str = "local",
    address: str | None = None,
    fit_timeout: float = 120.0,
    on_error: str = "record",
    on_done: Callable[[TaskOutcome], None] | None = None,
) -> list[TaskOutcome]:
    """Run ``tasks`` and return one outcome per task, in the order of ``tasks``."""
    out = []
    for task in tasks:
        outcome = run_model_task(task, shared)
        if on_done is not None:
            on_done(outcome)
        out.append(outcome)
        if on_error == "stop" and not outcome.ok:
            break
    return out
