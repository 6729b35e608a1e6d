"""Forecasting every task of a plan and scoring it: the computational core of a run.

:func:`evaluate` goes in two steps. First the forecasts that need the engine (cache, workers,
fault isolation) are made for the whole plan: per-series models and models trained across
series, and forecasts read from files (a fit costs far more than its forecast takes to keep).
Then each dataset is forecast and scored a chunk of ``execution.chunk`` series at a time
(:mod:`runner.scoring.chunks`): training-slice statistics, benchmarks, derived candidates,
scores. A chunk's forecasts are handed to a sink (the results writer streams them to
forecasts.parquet) and dropped, so the memory a run needs grows with the chunk, not with the
number of series; what is kept is what the leaderboard, the horizon table and the
significance tests are built from, and it is the same whatever the chunk size.

A dataset read with ``missing: interpolate`` keeps its missing values as NaN. Every forecaster
sees its training slice filled from that slice alone (:mod:`runner.forecasters.gaps`), and a
missing actual in a test block is not scored: it is left out of every metric's mean, and the
run reports how many there were (a note in :attr:`DatasetResult.notes`, which the command line
prints, and ``unscored_actuals`` in the manifest).
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import TypeVar

import numpy as np

from runner.config import ForecasterSpec
from runner.execution.dispatch import EngineCounts, forecast_models
from runner.execution.engines import usable_cores
from runner.execution.model_tasks import build_model_tasks
from runner.execution.panel_tasks import build_panel_tasks, panel_results, panel_rows
from runner.execution.tasks import ModelTask, TaskOutcome
from runner.forecasters.gaps import SliceFill
from runner.forecasters.recorded import recorded_forecasts
from runner.forecasters.registry import build, is_vectorised
from runner.forecasters.slices import SliceSummary, summarise
from runner.scoring import metrics as M
from runner.scoring.chunks import Gathered, Tally, chunk_plan, cut, series_chunks
from runner.scoring.derived import add_derived_dataset
from runner.scoring.results import (
    Chunk,
    DatasetResult,
    Evaluation,
    ForecasterResult,
    Sink,
    Sparse,
)
from runner.scoring.significance import block_differences
from runner.windows.plan import DatasetPlan, Plan

__all__ = ["Chunk", "DatasetResult", "Evaluation", "ForecasterResult", "Sink", "Sparse",
           "evaluate", "series_chunks"]

#: Forecaster index -> its result, for one dataset.
Results = dict[int, ForecasterResult]
T = TypeVar("T")
R = TypeVar("R")


def evaluate(
    plan: Plan, *, use_cache: bool = True, jobs: int | None = None, quiet: bool = False,
    sink: Sink | None = None,
) -> Evaluation:
    """Forecast every (dataset, series, forecaster, fold) task of ``plan`` and score it.

    ``sink`` receives each chunk of series, forecast and scored, before its forecasts are
    dropped (see the module doc). A dataset of one chunk keeps its forecasts in the result,
    as a run kept in memory wants them. ``quiet`` silences the engine's progress line; notes
    and warnings are returned in the :class:`DatasetResult`, never printed.
    """
    whole, counts, stopped = _engine_forecasts(plan, use_cache, jobs, quiet)
    datasets = [_evaluate_dataset(plan, d, whole[d], sink) for d in range(len(plan.datasets))]
    return Evaluation(plan, datasets, counts, stopped)


# ------------------------------------------------------------ step 1: the engine's forecasts


def _engine_forecasts(
    plan: Plan, use_cache: bool, jobs: int | None, quiet: bool
) -> tuple[list[Results], EngineCounts, bool]:
    """Every forecast that is made for the whole plan at once: recorded candidates,
    per-series models and models trained across series (through the engine)."""
    per_dataset: list[Results] = [{} for _ in plan.datasets]
    for rec in recorded_forecasts(plan):  # forecasts read from files: no fit, no task
        per_dataset[rec.dataset][rec.forecaster] = ForecasterResult(
            plan.forecasters[rec.forecaster], rec.point, rec.lower, rec.upper, rec.reason,
            rec.message)
    model_tasks, shared = build_model_tasks(plan)
    counts, stopped = EngineCounts(), False
    if model_tasks:
        outcomes, counts = forecast_models(
            model_tasks, shared, plan.config.execution, use_cache=use_cache, jobs=jobs,
            quiet=quiet, cache_path=plan.config.execution.cache_folder(),
        )
        by_index = {o.index: o for o in outcomes}
        stopped = len(by_index) < len(model_tasks) or any(
            o.reason == "not-run" for o in outcomes
        )
        grouped: dict[tuple[int, int], list[ModelTask]] = {}
        for task in model_tasks:
            grouped.setdefault((task.dataset, task.forecaster), []).append(task)
        for (d, f), tasks in grouped.items():
            per_dataset[d][f] = _model_result(plan, plan.forecasters[f], tasks, by_index)
    panel_tasks = build_panel_tasks(plan, first_index=len(model_tasks))
    if panel_tasks:
        counts, stopped = _panel_forecasts(plan, panel_tasks, shared, per_dataset, counts,
                                           stopped, use_cache, jobs, quiet)
    return per_dataset, counts, stopped


def _model_result(
    plan: Plan, spec: ForecasterSpec, tasks: list[ModelTask], by_index: dict[int, TaskOutcome],
) -> ForecasterResult:
    """One per-series model's result on one dataset from the engine's outcomes (a task
    without an outcome did not run: the run stopped at an earlier failure)."""
    n, horizon, n_levels = len(tasks), plan.config.horizon, len(plan.config.intervals)
    point = np.full((n, horizon), np.nan)
    lower = np.full((n_levels, n, horizon), np.nan)
    upper = np.full((n_levels, n, horizon), np.nan)
    reason: list[str | None] = []
    message: list[str] = []
    info: list[dict] = []
    for t, task in enumerate(tasks):
        o = by_index.get(task.index)
        if o is None:
            reason.append("not-run")
            message.append("the run stopped at an earlier failure (on_error: stop)")
            info.append({})
            continue
        reason.append(o.reason)
        message.append(o.message)
        info.append(o.info)
        if o.ok:
            point[t] = o.point
            if n_levels:
                lower[:, t] = o.lower
                upper[:, t] = o.upper
    return ForecasterResult(spec, point, lower, upper, reason, message, info=info)


def _panel_forecasts(
    plan: Plan, panel_tasks: list, shared: object, per_dataset: list[Results],
    counts: EngineCounts, stopped: bool, use_cache: bool, jobs: int | None, quiet: bool,
) -> tuple[EngineCounts, bool]:
    """Models trained across series: one task per (dataset, forecaster, origin), through the
    same engine; their results go into ``per_dataset``."""
    panel_out: list[TaskOutcome] = []
    if stopped:  # on_error: stop, and a per-series task failed: no panel task runs
        counts.not_run += sum(panel_rows(t, shared) for t in panel_tasks)
    else:
        execution = plan.config.execution
        panel_out, panel_counts = forecast_models(
            panel_tasks, shared, execution, use_cache=use_cache, jobs=jobs, quiet=quiet,
            cache_path=execution.cache_folder(), label="panel fits",
        )
        counts = counts + panel_counts
        stopped = any(o.reason == "not-run" for o in panel_out)
    for (d, f), pr in panel_results(plan, panel_tasks, panel_out, shared).items():
        per_dataset[d][f] = ForecasterResult(
            plan.forecasters[f], pr.point, pr.lower, pr.upper, pr.reason, pr.message,
            info=pr.info,
        )
    return counts, stopped


# ------------------------------------------------------ step 2: chunk by chunk of series


def _evaluate_dataset(plan: Plan, d: int, whole: Results, sink: Sink | None) -> DatasetResult:
    """Forecast and score dataset ``d`` chunk by chunk, handing each chunk to ``sink``;
    ``whole`` holds the engine's results for the whole dataset."""
    dp = plan.datasets[d]
    cols = M.columns(plan.config.metrics, tuple(plan.config.intervals))
    spans = list(series_chunks(dp, plan.config.execution.chunk))
    gathered = {f: Gathered(plan.forecasters[f], dp.n_tasks) for f in dp.forecasters}
    tally = Tally(cols)
    chunk: Chunk | None = None
    fill = SliceFill(dp.panel.values)  # what it derives from the whole panel, derived once
    with ThreadPoolExecutor(_threads(len(dp.forecasters)),
                            thread_name_prefix="castgrid-scoring") as pool:
        for tasks in spans:
            sub, summary, results = _forecast_chunk(plan, dp, fill, tasks, whole, pool)
            carry = {f: gathered[f].carry() for f in dp.forecasters}
            actual = _score_chunk(plan, sub, summary, results, carry, pool)
            chunk = Chunk(d, sub, tasks, actual, results, summary)
            if sink is not None:
                sink(chunk)
            tally.add(chunk)
            for f, r in zip(dp.forecasters, results):
                gathered[f].add(r)
    assert chunk is not None  # series_chunks yields at least one range
    if len(spans) == 1:  # one chunk: everything as computed, forecasts included
        result = DatasetResult(dp, chunk.actual, chunk.results, chunk.summary)
    else:
        ordered = [gathered[f].result() for f in dp.forecasters]
        result = DatasetResult(dp, None, ordered, None)
    result.unscored_actuals = tally.unscored
    result.notes = tally.notes(dp)
    result.warnings = tally.warnings(dp, [plan.forecasters[f].name for f in dp.forecasters])
    return result


#: Forecast values (tasks x horizon) of a chunk below which its forecasters are computed one
#: after the other: for small arrays, handing work to threads costs more than it saves.
THREADED_VALUES = 100_000


def _threads(n_forecasters: int) -> int:
    """Threads for the per-forecaster work of a chunk: numpy releases Python's lock inside
    its array loops, so the forecasters of a large chunk are computed side by side."""
    return max(1, min(n_forecasters, usable_cores(), 4))


def _each(pool: ThreadPoolExecutor, size: int, work: Callable[[T], R], items: list[T]
          ) -> list[R]:
    """``work`` of each item, in order: on the pool's threads when the chunk has ``size``
    values or more, else here. Each item's work reads shared arrays and writes its own, so
    the results are the same bits either way."""
    if size < THREADED_VALUES or len(items) < 2:
        return [work(x) for x in items]
    return list(pool.map(work, items))


def _forecast_chunk(
    plan: Plan, dp: DatasetPlan, fill: SliceFill, tasks: slice, whole: Results,
    pool: ThreadPoolExecutor,
) -> tuple[DatasetPlan, SliceSummary, list[ForecasterResult]]:
    """The forecasts of the tasks ``tasks`` of ``dp``: benchmarks and derived candidates
    computed here (``fill``: the panel's values), the engine's results cut from ``whole``;
    in the dataset's forecaster order, with the chunk's plan and training-slice statistics."""
    horizon, levels = plan.config.horizon, tuple(plan.config.intervals)
    sub = chunk_plan(dp, tasks)
    summary = summarise(fill, sub.starts, sub.ends, sub.panel.season)
    benchmarks = [f for f in dp.forecasters if is_vectorised(plan.forecasters[f])]
    made = dict(zip(benchmarks, _each(pool, sub.n_tasks * horizon, lambda f: _baseline_result(
        plan.forecasters[f], sub, fill, summary, horizon, levels), benchmarks)))
    results: Results = {}
    for f in dp.forecasters:
        if f in made:
            results[f] = made[f]
        elif f in whole:
            results[f] = whole[f] if sub is dp else cut(whole[f], tasks)
    add_derived_dataset(plan, sub, summary, results)  # combinations, selections
    return sub, summary, [results[f] for f in dp.forecasters]


def _baseline_result(
    spec: ForecasterSpec, dp: DatasetPlan, fill: SliceFill, summary: SliceSummary,
    horizon: int, levels: tuple[float, ...],
) -> ForecasterResult:
    model = build(spec)
    # Forecast through the gap (if any) and keep the last ``horizon`` steps: the scored block.
    gap = int(dp.test_starts[0] - dp.ends[0]) if dp.n_tasks else 0
    b = model.forecast_many(
        fill, dp.starts, dp.ends, horizon + gap,
        season=dp.panel.season, levels=levels, summary=summary,
    )
    b.point, b.lower, b.upper = b.point[:, gap:], b.lower[:, :, gap:], b.upper[:, :, gap:]
    if b.ok.all():  # the usual case: no per-task list to build
        return ForecasterResult(spec, b.point, b.lower, b.upper, Sparse(len(b.ok), {}, None),
                                Sparse(len(b.ok), {}, ""))
    reason = [None if ok else "too-short" for ok in b.ok]
    message = ["" if ok else b.message for ok in b.ok]
    return ForecasterResult(spec, b.point, b.lower, b.upper, reason, message)


def _score_chunk(
    plan: Plan, sub: DatasetPlan, summary: SliceSummary, results: list[ForecasterResult],
    carry: dict[int, dict[str, tuple[np.ndarray, np.ndarray]]], pool: ThreadPoolExecutor,
) -> np.ndarray:
    """Score every result of a chunk (in place) and return the chunk's actuals (n, H).

    Scores are computed from the forecasts at every run, so a new metric never refits.
    Missing actuals stay NaN: the metrics leave them out (never filled from anything).
    ``carry``: per forecaster index, the per-step sums of the chunks before.
    """
    cfg = plan.config
    levels = tuple(cfg.intervals)
    steps = np.arange(cfg.horizon)
    actual = sub.panel.values[sub.test_starts[:, None] + steps[None, :]]
    mase_scale = M.scale_mase(summary.seasonal_abs, summary.length, sub.panel.season)
    rmsse_scale = M.scale_rmsse(summary.diff_sq, summary.length)
    cols = M.columns(cfg.metrics, levels)

    def score(pair: tuple[int, ForecasterResult]) -> np.ndarray:
        f, r = pair
        assert r.point is not None
        r.scores = M.score_tasks(cols, actual, r.point, r.lower, r.upper, levels, mase_scale,
                                 rmsse_scale, carry=carry[f])
        loss = M.pointwise_loss(cfg.rank_by, actual, r.point, mase_scale, rmsse_scale)
        return np.full(r.point.shape, np.nan) if loss is None else loss

    losses = _each(pool, actual.size, score, list(zip(sub.forecasters, results)))
    ref = next((i for i, r in enumerate(results) if r.spec.name == sub.reference), None)
    for r, loss in zip(results, losses):
        r.versus_reference = (np.full(sub.n_tasks, np.nan) if ref is None
                              else block_differences(loss, losses[ref]))
    return actual
