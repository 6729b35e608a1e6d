"""One (dataset, series, forecaster, fold) task for the per-series forecasters, as plain data.

Tasks and their outcomes are small records that cross process boundaries. The data they index
(``SharedData``) is shipped to each worker once per run, never per task, and a task never
raises: whatever goes wrong is returned as an outcome with a reason and a message. The tasks of
models trained across series (one per dataset, forecaster and origin) are
:class:`runner.execution.panel_tasks.PanelTask`; :func:`run_task` runs either kind.
"""

from __future__ import annotations

import time
import traceback
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Union

import numpy as np

from runner.config import ForecasterSpec
from runner.forecasters.contract import as_forecast
from runner.forecasters.gaps import fill_slice, observed_count

if TYPE_CHECKING:
    from runner.execution.panel_tasks import PanelLayout, PanelTask


@dataclass(frozen=True)
class ModelTask:
    """Fit one forecaster on ``values[start:end]`` of one dataset and forecast ``horizon`` steps.

    ``test_start`` is the index of the first scored step (``end + gap``); the forecaster
    forecasts ``gap + horizon`` steps and is given the covariates of all of them. The target
    values after ``end`` are never given to the forecaster.
    """

    index: int
    forecaster: int
    dataset: int
    start: int
    end: int
    test_start: int
    season: int


@dataclass
class SharedData:
    """Everything the tasks of one run index into; built once in the parent process."""

    values: list[np.ndarray]
    covariates: list[np.ndarray | None]
    forecasters: list[ForecasterSpec]
    horizon: int
    levels: tuple[float, ...]
    #: per dataset, what its panel tasks index into (None when it has no panel forecaster)
    panels: list[PanelLayout | None] = field(default_factory=list)


#: A task of either kind: per series (one fit per series and fold) or panel (one per origin).
Task = Union[ModelTask, "PanelTask"]


@dataclass
class TaskOutcome:
    """What a task produced: forecasts, or a failure reason and message. Never an exception.

    ``lower`` and ``upper`` have one row per interval level (NaN where the forecaster gives no
    interval). ``reason`` is None on success, else one of ``error``, ``invalid-output``,
    ``timeout``, ``crash``, ``too-short``, ``not-run`` (skipped after ``on_error: stop``).
    """

    index: int
    point: np.ndarray | None
    lower: np.ndarray | None
    upper: np.ndarray | None
    reason: str | None = None
    message: str = ""
    info: dict[str, Any] = field(default_factory=dict)
    seconds: float = 0.0
    cached: bool = False

    @property
    def ok(self) -> bool:
        """True when the task produced forecasts."""
        return self.reason is None


def failed(index: int, reason: str, message: str, seconds: float = 0.0) -> TaskOutcome:
    """A failed outcome."""
    return TaskOutcome(index, None, None, None, reason=reason, message=message, seconds=seconds)


def training_values(task: ModelTask, shared: SharedData) -> np.ndarray:
    """The training values ``task``'s forecaster sees: a fresh copy of its slice, with missing
    values filled from the slice alone (:func:`runner.forecasters.gaps.fill_slice`).

    The cache key hashes exactly these values, so a cached forecast is one made from what the
    forecaster would see now.
    """
    return fill_slice(shared.values[task.dataset][task.start : task.end])


def error_outcome(index: int, exc: BaseException, seconds: float) -> TaskOutcome:
    """The failed outcome of a task whose forecaster raised ``exc`` (reason ``error``): the
    exception's type and message, and the file and line it was raised at."""
    last = traceback.extract_tb(exc.__traceback__)[-1:]
    where = f" at {last[0].filename.rsplit('/', 1)[-1]}:{last[0].lineno}" if last else ""
    return failed(index, "error", f"{type(exc).__name__}: {exc}{where}", seconds)


def run_task(task: Task, shared: SharedData) -> TaskOutcome:
    """Run a per-series or a panel task; never raises."""
    if isinstance(task, ModelTask):
        return run_model_task(task, shared)
    from runner.execution.panel_tasks import run_panel_task

    return run_panel_task(task, shared)


def task_slices(
    task: ModelTask, shared: SharedData, with_covariates: bool
) -> tuple[np.ndarray, np.ndarray | None, np.ndarray | None]:
    """Training values (filled, a copy), training and future covariates (views) of ``task``.

    The future covariates run from the end of training to the end of the test block: with a
    ``gap`` the forecaster forecasts through the gap, and only the last ``horizon`` steps are
    scored.
    """
    y = training_values(task, shared)
    cov = shared.covariates[task.dataset] if with_covariates else None
    if cov is None:
        return y, None, None
    return y, cov[task.start : task.end], cov[task.end : task.test_start + shared.horizon]


def lead_steps(task: ModelTask, horizon: int) -> int:
    """Steps a forecaster must forecast: through the gap, then the ``horizon`` scored steps."""
    return task.test_start - task.end + horizon


def run_model_task(task: ModelTask, shared: SharedData) -> TaskOutcome:
    """Fit a fresh forecaster on the task's training slice and forecast; never raises."""
    # Imported here so that worker processes pay for the registry only when they run a task.
    from runner.forecasters.registry import accepts_covariates, build

    t0 = time.perf_counter()
    spec = shared.forecasters[task.forecaster]
    try:
        model = build(spec)
        uses_cov = accepts_covariates(spec)
        # y is a copy, so a forecaster that writes into its input cannot damage the shared data
        y, cov_train, cov_test = task_slices(task, shared, uses_cov)
        if len(y) and observed_count(y) == 0:
            return failed(
                task.index, "too-short",
                "the training slice has no observed value (every one is missing)",
                time.perf_counter() - t0,
            )
        fit_kwargs: dict[str, Any] = {"season": task.season}
        predict_kwargs: dict[str, Any] = {"levels": shared.levels}
        if cov_train is not None:
            fit_kwargs["covariates"] = np.array(cov_train)
            predict_kwargs["covariates"] = np.array(cov_test)
        fitted = model.fit(y, **fit_kwargs)
        if fitted is None:
            fitted = model
        steps = lead_steps(task, shared.horizon)
        raw = fitted.predict(steps, **predict_kwargs)
    except Exception as exc:
        return error_outcome(task.index, exc, time.perf_counter() - t0)
    try:
        fc = as_forecast(raw, steps, shared.levels)
    except ValueError as exc:
        return failed(task.index, "invalid-output", str(exc), time.perf_counter() - t0)
    n_levels = len(shared.levels)
    lower = np.full((n_levels, shared.horizon), np.nan)
    upper = np.full((n_levels, shared.horizon), np.nan)
    scored = slice(steps - shared.horizon, steps)  # the gap's steps are not scored
    for i, level in enumerate(shared.levels):
        if level in fc.lower and level in fc.upper:
            lower[i] = fc.lower[level][scored]
            upper[i] = fc.upper[level][scored]
    info = dict(getattr(fitted, "info_", None) or {})
    return TaskOutcome(
        task.index, fc.point[scored], lower, upper, info=info,
        seconds=time.perf_counter() - t0,
    )
