"""Forecasting every task of a plan and scoring it: the computational core of a run.

A dataset read with ``missing: interpolate`` keeps its missing values as NaN. Every forecaster
sees its training slice filled from that slice alone (:mod:`runner.forecasters.gaps`), and a
missing actual in a test block is not scored: it is left out of every metric's mean, and the
run reports how many there were (a note on stderr and ``unscored_actuals`` in the manifest).

Memory bounded by the chunk, not by the number of series
--------------------------------------------------------
The per-series models and the models trained across series run first, through the engine, for
the whole plan (a fit costs far more than its forecast takes to keep). Everything else goes a
chunk of ``execution.chunk`` series at a time (every task of a series in the same chunk):
training-slice statistics, benchmarks, derived candidates, scores. A chunk's forecasts are
handed to a sink (the results writer streams them to forecasts.parquet) and dropped; what is
kept for the whole run is small: per task, each metric's score, the rank metric's mean loss
(the significance tests' input) and whether it failed; per step, the sums and counts of the
losses (:attr:`runner.scoring.metrics.Scored.step_sum`). Per-task numbers are computed row by
row, so they, and the leaderboard built from them, are the same whatever the chunk size.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field, replace
from functools import cached_property
from typing import Any

import numpy as np

from runner.config import ForecasterSpec
from runner.execution.dispatch import EngineCounts, forecast_models
from runner.execution.model_tasks import build_model_tasks
from runner.execution.panel_tasks import build_panel_tasks, panel_results, panel_rows
from runner.execution.tasks import ModelTask, TaskOutcome
from runner.forecasters.recorded import recorded_forecasts
from runner.forecasters.registry import build, is_vectorised
from runner.forecasters.slices import SliceSummary, summarise
from runner.scoring import metrics as M
from runner.scoring.derived import add_derived_dataset
from runner.windows.plan import DatasetPlan, Plan


class Sparse(Sequence):
    """A per-task list that is mostly one value (``None`` reasons, empty messages), holding
    only the other entries: the failures of a million tasks cost what the failures cost."""

    def __init__(self, n: int, entries: dict[int, Any], default: Any) -> None:
        self.n, self.entries, self.default = n, entries, default

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, i: Any) -> Any:
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(self.n))]
        if i < 0:
            i += self.n
        if not 0 <= i < self.n:
            raise IndexError(i)
        return self.entries.get(i, self.default)


@dataclass
class ForecasterResult:
    """Forecasts and scores of one forecaster on every task of one dataset (task order).

    After a run of more than one chunk, ``point``, ``lower`` and ``upper`` are None (the
    forecasts went to the sink chunk by chunk) and ``reason`` / ``message`` are :class:`Sparse`.
    """

    spec: ForecasterSpec
    point: np.ndarray | None  # (n, H), NaN rows for failed tasks
    lower: np.ndarray | None  # (levels, n, H)
    upper: np.ndarray | None
    reason: Sequence[str | None]  # None where the task succeeded
    message: Sequence[str]
    scores: dict[str, M.Scored] = field(default_factory=dict)
    #: per task, the mean over the steps of the rank metric's pointwise loss, NaN when any
    #: step's loss is not finite: all the significance tests need of the losses
    loss_mean: np.ndarray | None = None
    info: list[dict] = field(default_factory=list)

    @cached_property
    def failed(self) -> np.ndarray:
        """Boolean mask of failed tasks."""
        if isinstance(self.reason, Sparse):
            out = np.zeros(len(self.reason), dtype=bool)
            out[[i for i, r in self.reason.entries.items() if r is not None]] = True
            return out
        return np.array([r is not None for r in self.reason], dtype=bool)


@dataclass
class DatasetResult:
    """Everything computed for one dataset (``actual`` and ``summary`` only when it was one
    chunk)."""

    plan: DatasetPlan
    actual: np.ndarray | None  # (n, H)
    results: list[ForecasterResult]
    summary: SliceSummary | None
    warnings: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    #: missing actuals in the test blocks (not scored); each (series, time) counted once
    unscored_actuals: int = 0


@dataclass
class Chunk:
    """One chunk of a dataset's series, forecast and scored: what a sink receives.

    ``plan`` holds the chunk's tasks only; ``tasks`` is their place among the dataset's tasks.
    """

    dataset: int
    plan: DatasetPlan
    tasks: slice
    actual: np.ndarray  # (n, H)
    results: list[ForecasterResult]  # in the order of the dataset's forecasters
    summary: SliceSummary


#: What :func:`evaluate` hands each chunk to (the results writer streams its forecasts).
Sink = Callable[[Chunk], None]


@dataclass
class Evaluation:
    """The outcome of forecasting and scoring a whole plan."""

    plan: Plan
    datasets: list[DatasetResult]
    counts: EngineCounts
    stopped: bool = False


def _baseline_result(
    spec: ForecasterSpec, dp: DatasetPlan, summary: SliceSummary, horizon: int,
    levels: tuple[float, ...],
) -> ForecasterResult:
    model = build(spec)
    # Forecast through the gap (if any) and keep the last ``horizon`` steps: the scored block.
    gap = int(dp.test_starts[0] - dp.ends[0]) if dp.n_tasks else 0
    b = model.forecast_many(
        dp.panel.values, dp.starts, dp.ends, horizon + gap,
        season=dp.panel.season, levels=levels, summary=summary,
    )
    b.point, b.lower, b.upper = b.point[:, gap:], b.lower[:, :, gap:], b.upper[:, :, gap:]
    reason = [None if ok else "too-short" for ok in b.ok]
    message = ["" if ok else b.message for ok in b.ok]
    return ForecasterResult(spec, b.point, b.lower, b.upper, reason, message)


def _few(names: list[str], show: int = 3) -> str:
    more = f" and {len(names) - show} more" if len(names) > show else ""
    return ", ".join(names[:show]) + more


def _undefined_warnings(
    dp: DatasetPlan, hits: dict[str, list[tuple[str, np.ndarray, int]]], cols: list[str]
) -> list[str]:
    """One warning per kind of undefined score: which metrics, how many scores, where.

    ``hits``: per metric column, (forecaster, series with an undefined score, how many
    scores) for each forecaster with any, in the dataset's forecaster order. A constant series
    makes every scaled metric undefined for every forecaster at once; a line per forecaster and
    metric would bury the other messages. Metrics undefined for the same series and
    forecasters share a line.
    """
    kinds: dict[tuple[tuple[int, ...], tuple[str, ...]], list[tuple[str, int]]] = {}
    for col in cols:
        found = hits.get(col, [])
        if found:
            series = tuple(np.unique(np.concatenate([s for _, s, _ in found])).tolist())
            key = (series, tuple(name for name, _, _ in found))
            kinds.setdefault(key, []).append((col, sum(n for _, _, n in found)))
    lines = []
    for (series, forecasters), metrics in kinds.items():
        names = [dp.panel.keys[i] for i in series]
        what = _few([col for col, _ in metrics], show=len(metrics))
        lines.append(
            f"dataset {dp.panel.name}: {what} undefined (zero or undefined denominator) in "
            f"{sum(n for _, n in metrics)} score(s): {len(names)} series ({_few(names)}), "
            f"{len(forecasters)} forecaster(s) ({_few(list(forecasters))}); left out of the means"
        )
    return lines


def series_chunks(dp: DatasetPlan, size: int) -> Iterator[slice]:
    """Ranges of the dataset's tasks covering ``size`` series each (the last fewer); every
    task of a series falls in one range (tasks are ordered by series)."""
    n = dp.n_tasks
    if n == 0:
        yield slice(0, 0)
        return
    firsts = np.r_[0, np.flatnonzero(np.diff(dp.series)) + 1]
    for i in range(0, len(firsts), max(1, size)):
        hi = int(firsts[i + size]) if i + size < len(firsts) else n
        yield slice(int(firsts[i]), hi)


def _chunk_plan(dp: DatasetPlan, tasks: slice) -> DatasetPlan:
    if tasks == slice(0, dp.n_tasks):
        return dp
    return replace(dp, series=dp.series[tasks], fold=dp.fold[tasks], origin=dp.origin[tasks],
                   starts=dp.starts[tasks], ends=dp.ends[tasks],
                   test_starts=dp.test_starts[tasks])


def _chunk_result(r: ForecasterResult, tasks: slice) -> ForecasterResult:
    """The tasks ``tasks`` of a result computed for the whole dataset."""
    assert r.point is not None and r.lower is not None and r.upper is not None
    return ForecasterResult(
        r.spec, r.point[tasks], r.lower[:, tasks], r.upper[:, tasks], list(r.reason[tasks]),
        list(r.message[tasks]), info=list(r.info[tasks]) if r.info else [],
    )


@dataclass
class _Kept:
    """What is kept of one forecaster's chunks for the whole run (see the module doc)."""

    spec: ForecasterSpec
    n: int = 0
    per_task: dict[str, list[np.ndarray]] = field(default_factory=dict)
    undefined: dict[str, list[np.ndarray]] = field(default_factory=dict)
    step_sum: dict[str, np.ndarray] = field(default_factory=dict)
    step_count: dict[str, np.ndarray] = field(default_factory=dict)
    loss_mean: list[np.ndarray] = field(default_factory=list)
    reason: dict[int, str] = field(default_factory=dict)
    message: dict[int, str] = field(default_factory=dict)
    info: list[dict] = field(default_factory=list)

    def add(self, r: ForecasterResult) -> None:
        for col, sc in r.scores.items():
            self.per_task.setdefault(col, []).append(sc.per_task)
            self.undefined.setdefault(col, []).append(sc.undefined)
            assert sc.step_sum is not None and sc.step_count is not None
            if col in self.step_sum:
                self.step_sum[col] = self.step_sum[col] + sc.step_sum
                self.step_count[col] = self.step_count[col] + sc.step_count
            else:
                self.step_sum[col], self.step_count[col] = sc.step_sum, sc.step_count
        assert r.loss_mean is not None
        self.loss_mean.append(r.loss_mean)
        for t in np.flatnonzero(r.failed):
            self.reason[self.n + int(t)] = r.reason[t]  # type: ignore[assignment]
            self.message[self.n + int(t)] = r.message[t]
        self.info.extend(r.info)
        self.n += len(r.reason)

    def result(self) -> ForecasterResult:
        scores = {
            col: M.Scored(
                np.concatenate(parts), M.per_step_from(col, self.step_sum[col],
                                                       self.step_count[col]),
                np.concatenate(self.undefined[col]), self.step_sum[col], self.step_count[col],
            )
            for col, parts in self.per_task.items()
        }
        return ForecasterResult(
            self.spec, None, None, None, Sparse(self.n, self.reason, None),
            Sparse(self.n, self.message, ""), scores, np.concatenate(self.loss_mean),
            self.info if len(self.info) == self.n else [],
        )


def _model_results(
    plan: Plan, use_cache: bool, jobs: int | None, quiet: bool
) -> tuple[list[dict[int, ForecasterResult]], EngineCounts, bool]:
    """Every forecast that is not computed chunk by chunk: recorded candidates, per-series
    models and models trained across series (through the engine, for the whole plan)."""
    cfg = plan.config
    horizon, levels = cfg.horizon, tuple(cfg.intervals)
    per_dataset: list[dict[int, ForecasterResult]] = [{} for _ in plan.datasets]
    for rec in recorded_forecasts(plan):  # forecasts read from files: no fit, no task
        per_dataset[rec.dataset][rec.forecaster] = ForecasterResult(
            plan.forecasters[rec.forecaster], rec.point, rec.lower, rec.upper, rec.reason,
            rec.message)
    model_tasks, shared = build_model_tasks(plan)

    # Per-series models: through the engine (cache, workers, fault isolation).
    counts = EngineCounts()
    stopped = False
    if model_tasks:
        outcomes, counts = forecast_models(
            model_tasks, shared, cfg.execution, use_cache=use_cache, jobs=jobs, quiet=quiet,
            cache_path=cfg.execution.cache_folder(),
        )
        by_index = {o.index: o for o in outcomes}
        stopped = len(by_index) < len(model_tasks) or any(
            o.reason == "not-run" for o in outcomes
        )
        n_levels = len(levels)
        grouped: dict[tuple[int, int], list[ModelTask]] = {}
        for task in model_tasks:
            grouped.setdefault((task.dataset, task.forecaster), []).append(task)
        for (d, f), tasks in grouped.items():
            n = len(tasks)
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
            per_dataset[d][f] = ForecasterResult(
                plan.forecasters[f], point, lower, upper, reason, message, info=info
            )

    # Models trained across series: one task per (dataset, forecaster, origin), same engine.
    panel_tasks = build_panel_tasks(plan, first_index=len(model_tasks))
    if panel_tasks:
        panel_out: list[TaskOutcome] = []
        if stopped:  # on_error: stop, and a per-series task failed: no panel task runs
            counts.not_run += sum(panel_rows(t, shared) for t in panel_tasks)
        else:
            panel_out, panel_counts = forecast_models(
                panel_tasks, shared, cfg.execution, use_cache=use_cache, jobs=jobs,
                quiet=quiet, cache_path=cfg.execution.cache_folder(), label="panel fits",
            )
            counts = counts + panel_counts
            stopped = any(o.reason == "not-run" for o in panel_out)
        for (d, f), pr in panel_results(plan, panel_tasks, panel_out, shared).items():
            per_dataset[d][f] = ForecasterResult(
                plan.forecasters[f], pr.point, pr.lower, pr.upper, pr.reason, pr.message,
                info=pr.info,
            )
    return per_dataset, counts, stopped


def _score_chunk(
    plan: Plan, d: int, dp: DatasetPlan, tasks: slice, whole: dict[int, ForecasterResult],
) -> Chunk:
    """Forecast (benchmarks, derived candidates) and score the tasks ``tasks`` of dataset
    ``d``; the other forecasters' results are cut from ``whole``."""
    cfg = plan.config
    horizon, levels = cfg.horizon, tuple(cfg.intervals)
    sub = _chunk_plan(dp, tasks)
    summary = summarise(sub.panel.values, sub.starts, sub.ends, sub.panel.season)
    results: dict[int, ForecasterResult] = {}
    for f in dp.forecasters:
        spec = plan.forecasters[f]
        if is_vectorised(spec):
            results[f] = _baseline_result(spec, sub, summary, horizon, levels)
        elif f in whole:
            results[f] = whole[f] if sub is dp else _chunk_result(whole[f], tasks)
    add_derived_dataset(plan, sub, summary, results)  # combinations, selections
    # Scores: computed from the forecasts at every run, so a new metric never refits. Missing
    # actuals stay NaN: the metrics leave them out (never filled from anything).
    steps = np.arange(horizon)
    actual = sub.panel.values[sub.test_starts[:, None] + steps[None, :]]
    mase_scale = M.scale_mase(summary.seasonal_abs, summary.length, sub.panel.season)
    rmsse_scale = M.scale_rmsse(summary.diff_sq, summary.length)
    cols = M.columns(cfg.metrics, levels)
    ordered = [results[f] for f in dp.forecasters]
    for r in ordered:
        assert r.point is not None
        r.scores = M.score_tasks(
            cols, actual, r.point, r.lower, r.upper, levels, mase_scale, rmsse_scale
        )
        loss = M.pointwise_loss(cfg.rank_by, actual, r.point, mase_scale, rmsse_scale)
        if loss is None:
            r.loss_mean = np.full(sub.n_tasks, np.nan)
        else:
            with np.errstate(invalid="ignore"):
                r.loss_mean = np.where(np.isfinite(loss).all(axis=1), loss.mean(axis=1), np.nan)
    return Chunk(d, sub, tasks, actual, ordered, summary)


def evaluate(
    plan: Plan, *, use_cache: bool = True, jobs: int | None = None, quiet: bool = False,
    sink: Sink | None = None,
) -> Evaluation:
    """Forecast every (dataset, series, forecaster, fold) task of ``plan`` and score it.

    Chunk by chunk of ``execution.chunk`` series (see the module doc); ``sink`` receives each
    chunk before its forecasts are dropped. A dataset of one chunk keeps its forecasts in the
    result, as a plain in-memory run wants them.
    """
    cfg = plan.config
    cols = M.columns(cfg.metrics, tuple(cfg.intervals))
    whole, counts, stopped = _model_results(plan, use_cache, jobs, quiet)
    results = []
    for d, dp in enumerate(plan.datasets):
        spans = list(series_chunks(dp, cfg.execution.chunk))
        kept = {f: _Kept(plan.forecasters[f]) for f in dp.forecasters}
        hits: dict[str, list[tuple[str, np.ndarray, int]]] = {}
        unscored = hit_series = 0
        last: Chunk | None = None
        for tasks in spans:
            chunk = _score_chunk(plan, d, dp, tasks, whole[d])
            if sink is not None:
                sink(chunk)
            missing = np.isnan(chunk.actual)
            if missing.any():
                steps = np.arange(missing.shape[1])
                cells = (chunk.plan.test_starts[:, None] + steps[None, :])[missing]
                unscored += len(np.unique(cells))
                hit_series += len(np.unique(chunk.plan.series[missing.any(axis=1)]))
            for f, r in zip(dp.forecasters, chunk.results):
                for col in cols:
                    u = r.scores[col].undefined
                    if u.any():
                        hits.setdefault(col, []).append(
                            (r.spec.name, np.unique(chunk.plan.series[u]), int(u.sum())))
                if len(spans) > 1:
                    kept[f].add(r)
            last = chunk
        assert last is not None
        if len(spans) == 1:  # one chunk: everything as computed, forecasts included
            ordered, actual = last.results, last.actual
            summary = last.summary
        else:
            ordered = [kept[f].result() for f in dp.forecasters]
            actual, summary = None, None
        merged = _merge_hits(hits, [r.spec.name for r in ordered])
        warnings = _undefined_warnings(dp, merged, cols)
        result = DatasetResult(dp, actual, ordered, summary, warnings,
                               unscored_actuals=unscored)
        if unscored:
            result.notes.append(
                f"dataset {dp.panel.name}: {unscored} missing actual(s) in the "
                f"test blocks of {hit_series} series are not scored (left "
                "out of every metric's mean)"
            )
        if not quiet:
            for note in result.notes:
                print(f"castgrid: note: {note}", file=sys.stderr)
            for w in warnings:
                print(f"castgrid: warning: {w}", file=sys.stderr)
        results.append(result)
    return Evaluation(plan, results, counts, stopped)


def _merge_hits(
    hits: dict[str, list[tuple[str, np.ndarray, int]]], order: list[str]
) -> dict[str, list[tuple[str, np.ndarray, int]]]:
    """Chunks' undefined-score hits summed per metric and forecaster, in forecaster order."""
    out: dict[str, list[tuple[str, np.ndarray, int]]] = {}
    for col, found in hits.items():
        per_name: dict[str, tuple[list[np.ndarray], int]] = {}
        for name, series, n in found:
            parts, total = per_name.get(name, ([], 0))
            per_name[name] = (parts + [series], total + n)
        out[col] = [(name, np.concatenate(per_name[name][0]), per_name[name][1])
                    for name in order if name in per_name]
    return out
