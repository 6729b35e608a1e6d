"""Tasks of models trained across series: one (dataset, forecaster, origin) each, as plain data.

A :class:`PanelTask` names a dataset, a forecaster and one of the dataset's origins (by its
index in :attr:`runner.windows.plan.DatasetPlan.origins`). What it indexes travels once per run
with :class:`~runner.execution.tasks.SharedData`: the dataset's values and covariates (already
there for the per-series tasks) and a :class:`PanelLayout` (keys, offsets, time-axis positions,
times, the series that have each origin).

Leak-proof by construction: :func:`panel_inputs` is the only place that builds what a panel
forecaster sees, and it selects rows by their position on the dataset's time axis, ``position
<= origin`` for every series at once (and, with sliding windows, ``position > origin - train``).
The only rows after the origin it hands out are the known-in-advance covariates of the
forecast period of the series being forecast, given to ``predict``. The cache key of a panel
task (:mod:`runner.execution.cache_keys`) is a digest of exactly what this function returns.

The outcome of a panel task is a :class:`~runner.execution.tasks.TaskOutcome` whose arrays
have one row per series forecast at that origin (``point`` of shape ``(series, horizon)``,
``lower`` / ``upper`` of shape ``(levels, series, horizon)``); :func:`panel_results` maps the
rows back to the (series, fold) tasks of the plan.
"""

from __future__ import annotations

import time
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from runner.execution.engines import not_run
from runner.execution.tasks import SharedData, TaskOutcome, error_outcome, failed
from runner.forecasters.contract import PanelHistory, as_panel_forecast, bad_rows

if TYPE_CHECKING:
    from runner.windows.plan import Plan

#: The message of a series whose row of a panel forecast is NaN or infinite.
BAD_ROW_MESSAGE = "the panel forecaster returned NaN or infinite forecasts for this series"


@dataclass(frozen=True)
class PanelTask:
    """Fit one panel forecaster on every series of one dataset up to one origin and forecast
    the series that have that origin.

    ``fold`` indexes the dataset's origins (``DatasetPlan.origins``, oldest first).
    """

    index: int
    forecaster: int
    dataset: int
    fold: int


@dataclass
class PanelLayout:
    """What the panel tasks of one dataset index into, beside its values and covariates.

    ``positions`` is each value's position on the dataset's time axis; ``window`` the training
    length of sliding windows (None: expanding, from each series' first observation);
    ``targets[ptr[k]:ptr[k + 1]]`` the series (ascending) that have origin ``origins[k]``, in
    the order of the plan's tasks at that fold.
    """

    keys: tuple[str, ...]
    offsets: np.ndarray
    positions: np.ndarray
    times: np.ndarray
    covariate_names: tuple[str, ...]
    attributes: dict[str, np.ndarray]
    season: int
    frequency: str | None
    window: int | None
    gap: int
    origins: np.ndarray
    ptr: np.ndarray
    targets: np.ndarray
    first: np.ndarray = field(init=False)

    def __post_init__(self) -> None:
        self.first = self.positions[self.offsets[:-1]]

    def fold_targets(self, fold: int) -> np.ndarray:
        """The series (indices into the dataset) forecast at origin ``fold``."""
        return self.targets[self.ptr[fold] : self.ptr[fold + 1]]


def panel_layouts(plan: Plan) -> list[PanelLayout | None]:
    """A layout for every dataset of ``plan`` that has a panel forecaster (else None)."""
    from runner.forecasters.registry import is_panel
    from runner.windows.axis import time_axis

    out: list[PanelLayout | None] = []
    sliding = plan.config.windows.scheme == "sliding"
    for dp in plan.datasets:
        if not any(is_panel(plan.forecasters[f]) for f in dp.forecasters) or not dp.n_tasks:
            out.append(None)
            continue
        panel = dp.panel
        positions = time_axis(panel).positions
        order = np.argsort(dp.fold, kind="stable")  # tasks are by series: stays ascending
        ptr = np.searchsorted(dp.fold[order], np.arange(len(dp.origins) + 1))
        # The origin of a task is the position of its last training value, for every target.
        if not np.array_equal(positions[dp.ends[order] - 1], dp.origins[dp.fold[order]]):
            raise AssertionError("the plan's training ends are not at their origins")
        out.append(PanelLayout(
            keys=tuple(panel.keys),
            offsets=np.asarray(panel.offsets, dtype=np.int64),
            positions=np.asarray(positions, dtype=np.int64),
            times=panel.times,
            covariate_names=tuple(panel.covariate_names),
            # numpy text (not object) arrays: their bytes, hashed into cache keys, are the texts
            attributes={k: np.asarray(v, dtype=str) for k, v in panel.attributes.items()},
            season=int(panel.season),
            frequency=panel.frequency,
            window=int(dp.ends[0] - dp.starts[0]) if sliding else None,
            gap=int(dp.test_starts[0] - dp.ends[0]),
            origins=np.asarray(dp.origins, dtype=np.int64),
            ptr=ptr.astype(np.int64),
            targets=dp.series[order].astype(np.int64),
        ))
    return out


def build_panel_tasks(plan: Plan, first_index: int = 0) -> list[PanelTask]:
    """One task per (dataset, panel forecaster, origin) of ``plan``, numbered from
    ``first_index`` (so that they never share an index with the per-series tasks)."""
    from runner.forecasters.registry import is_panel

    tasks: list[PanelTask] = []
    for d, dp in enumerate(plan.datasets):
        for f in dp.forecasters:
            if not is_panel(plan.forecasters[f]):
                continue
            for k in range(len(dp.origins)):
                tasks.append(PanelTask(first_index + len(tasks), f, d, k))
    return tasks


def panel_inputs(
    layout: PanelLayout,
    values: np.ndarray,
    covariates: np.ndarray | None,
    fold: int,
    steps: int,
) -> tuple[PanelHistory, np.ndarray, np.ndarray | None]:
    """What a panel forecaster is given at origin ``fold``: the history record for ``fit``, and
    the ``series`` and forecast-period ``covariates`` for ``predict`` (``steps`` rows each).

    Pass ``covariates=None`` for a forecaster that is not given covariates. Every array is a
    fresh copy, so a forecaster that writes into its input cannot damage the run's data.
    """
    o = int(layout.origins[fold])
    pos = layout.positions
    keep = pos <= o
    if layout.window is not None:
        keep &= pos > o - layout.window
    rows = np.flatnonzero(keep)
    owner = np.searchsorted(layout.offsets, rows, side="right") - 1
    counts = np.bincount(owner, minlength=len(layout.keys))
    present = np.flatnonzero(counts)
    offsets = np.zeros(len(present) + 1, dtype=np.int64)
    np.cumsum(counts[present], out=offsets[1:])
    where = np.full(len(layout.keys), -1, dtype=np.int64)
    where[present] = np.arange(len(present), dtype=np.int64)
    targets = layout.fold_targets(fold)
    series = where[targets]
    # the flat row of each target's origin; its forecast period follows it
    at_origin = layout.offsets[targets] + (o - layout.first[targets])
    cov = None if covariates is None else np.array(covariates[rows], dtype=np.float64)
    future = None
    if covariates is not None:
        future = np.array(covariates[at_origin[:, None] + np.arange(1, steps + 1)[None, :]],
                          dtype=np.float64)
    names = layout.covariate_names if cov is not None else ()
    history = PanelHistory(
        values=np.array(values[rows], dtype=np.float64),
        offsets=offsets,
        keys=tuple(layout.keys[i] for i in present),
        positions=pos[rows].copy(),
        times=layout.times[rows].copy(),
        covariates=cov,
        covariate_names=names,
        static=_static(cov, offsets, names),
        attributes={k: v[present].copy() for k, v in layout.attributes.items()},
        origin=o,
        origin_time=layout.times[at_origin[0]] if len(targets) else None,
        season=layout.season,
        frequency=layout.frequency,
    )
    return history, series, future


def _static(cov: np.ndarray | None, offsets: np.ndarray, names: tuple[str, ...]
            ) -> dict[str, np.ndarray]:
    """Covariate columns constant within every series of the record, one value per series."""
    if cov is None or not names or len(offsets) < 2:
        return {}
    lo = np.minimum.reduceat(cov, offsets[:-1], axis=0)
    hi = np.maximum.reduceat(cov, offsets[:-1], axis=0)
    same = np.all(lo == hi, axis=0)
    return {names[c]: lo[:, c].copy() for c in np.flatnonzero(same)}


def panel_rows(task: PanelTask, shared: SharedData) -> int:
    """How many series the task forecasts (the rows of its outcome's arrays)."""
    layout = shared.panels[task.dataset]
    return int(layout.ptr[task.fold + 1] - layout.ptr[task.fold])


def run_panel_task(task: PanelTask, shared: SharedData) -> TaskOutcome:
    """Fit a fresh panel forecaster on every series up to the task's origin and forecast the
    series that have it; never raises."""
    # Imported here so that worker processes pay for the registry only when they run a task.
    from runner.forecasters.registry import accepts_covariates, build

    t0 = time.perf_counter()
    spec = shared.forecasters[task.forecaster]
    layout = shared.panels[task.dataset]
    steps = layout.gap + shared.horizon
    try:
        model = build(spec)
        cov = shared.covariates[task.dataset] if accepts_covariates(spec) else None
        history, series, future = panel_inputs(
            layout, shared.values[task.dataset], cov, task.fold, steps
        )
        fitted = model.fit(history)
        if fitted is None:
            fitted = model
        predict_kwargs: dict[str, Any] = {"series": series, "levels": shared.levels}
        if future is not None:
            predict_kwargs["covariates"] = future
        raw = fitted.predict(steps, **predict_kwargs)
    except Exception as exc:
        return error_outcome(task.index, exc, time.perf_counter() - t0)
    try:
        fc = as_panel_forecast(raw, len(series), steps, shared.levels)
    except ValueError as exc:
        return failed(task.index, "invalid-output", str(exc), time.perf_counter() - t0)
    n, h = len(series), shared.horizon
    scored = slice(steps - h, steps)  # the gap's steps are not scored
    lower = np.full((len(shared.levels), n, h), np.nan)
    upper = np.full((len(shared.levels), n, h), np.nan)
    for i, level in enumerate(shared.levels):
        if level in fc.lower and level in fc.upper:
            lower[i] = fc.lower[level][:, scored]
            upper[i] = fc.upper[level][:, scored]
    point = np.ascontiguousarray(fc.point[:, scored])
    point[bad_rows(fc)] = np.nan  # a row with any non-finite step fails its series
    info = dict(getattr(fitted, "info_", None) or {})
    return TaskOutcome(task.index, point, lower, upper, info=info,
                       seconds=time.perf_counter() - t0)


@dataclass
class PanelResult:
    """Forecasts of one panel forecaster on every (series, fold) task of one dataset, in the
    plan's task order (the arrays of :class:`runner.scoring.evaluate.ForecasterResult`)."""

    point: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    reason: list[str | None]
    message: list[str]
    info: list[dict]


def panel_results(
    plan: Plan,
    tasks: Sequence[PanelTask],
    outcomes: Sequence[TaskOutcome],
    shared: SharedData,
) -> dict[tuple[int, int], PanelResult]:
    """Map each panel outcome's rows back to the (series, fold) tasks of the plan.

    A failed origin (an exception, a wrong shape, a timeout, a crash, not run) fails the task
    of every series at that origin with its reason and message; a NaN row fails its series
    only (reason ``invalid-output``).
    """
    h, n_levels = shared.horizon, len(shared.levels)
    by_index = {o.index: o for o in outcomes}
    out: dict[tuple[int, int], PanelResult] = {}
    for task in tasks:
        dp = plan.datasets[task.dataset]
        key = (task.dataset, task.forecaster)
        if key not in out:
            n = dp.n_tasks
            out[key] = PanelResult(
                np.full((n, h), np.nan), np.full((n_levels, n, h), np.nan),
                np.full((n_levels, n, h), np.nan), [None] * n, [""] * n, [{} for _ in range(n)],
            )
        res = out[key]
        rows = np.flatnonzero(dp.fold == task.fold)  # ascending series: the targets' order
        o = by_index.get(task.index) or not_run(task.index)
        for j, t in enumerate(rows):
            res.info[t] = o.info
            if not o.ok:
                res.reason[t], res.message[t] = o.reason, o.message
                continue
            assert o.point is not None and o.lower is not None and o.upper is not None
            if not np.all(np.isfinite(o.point[j])):
                res.reason[t], res.message[t] = "invalid-output", BAD_ROW_MESSAGE
                continue
            res.point[t] = o.point[j]
            if n_levels:
                res.lower[:, t] = o.lower[:, j]
                res.upper[:, t] = o.upper[:, j]
    return out
