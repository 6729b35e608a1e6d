"""Forecasting every task of a plan and scoring it: the computational core of a run.

A dataset read with ``missing: interpolate`` keeps its missing values as NaN. Every forecaster
sees its training slice filled from that slice alone (:mod:`runner.forecasters.gaps`), and a
missing actual in a test block is not scored: it is left out of every metric's mean, and the
run reports how many there were (a note on stderr and ``unscored_actuals`` in the manifest).
"""

from __future__ import annotations

import sys
from dataclasses import dataclass, field

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
from runner.scoring.derived import add_derived
from runner.windows.plan import DatasetPlan, Plan


@dataclass
class ForecasterResult:
    """Forecasts and scores of one forecaster on every task of one dataset (task order)."""

    spec: ForecasterSpec
    point: np.ndarray  # (n, H), NaN rows for failed tasks
    lower: np.ndarray  # (levels, n, H)
    upper: np.ndarray
    reason: list[str | None]  # None where the task succeeded
    message: list[str]
    scores: dict[str, M.Scored] = field(default_factory=dict)
    loss: np.ndarray | None = None  # (n, H) pointwise loss of the rank metric
    info: list[dict] = field(default_factory=list)

    @property
    def failed(self) -> np.ndarray:
        """Boolean mask of failed tasks."""
        return np.array([r is not None for r in self.reason], dtype=bool)


@dataclass
class DatasetResult:
    """Everything computed for one dataset."""

    plan: DatasetPlan
    actual: np.ndarray  # (n, H)
    results: list[ForecasterResult]
    summary: SliceSummary
    warnings: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    @property
    def unscored_actuals(self) -> int:
        """Missing actuals in the test blocks (not scored); each (series, time) counted once."""
        missing = np.isnan(self.actual)
        if not missing.any():
            return 0
        steps = np.arange(self.actual.shape[1])
        return int(len(np.unique((self.plan.test_starts[:, None] + steps[None, :])[missing])))


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
    dp: DatasetPlan, ordered: list[ForecasterResult], cols: list[str]
) -> list[str]:
    """One warning per kind of undefined score: which metrics, how many scores, where.

    A constant series makes every scaled metric undefined for every forecaster at once; a line
    per forecaster and metric would bury the other messages. Metrics undefined for the same
    series and forecasters share a line.
    """
    kinds: dict[tuple[tuple[int, ...], tuple[str, ...]], list[tuple[str, int]]] = {}
    for col in cols:
        hits = [(r.spec.name, r.scores[col].undefined) for r in ordered
                if col in r.scores and r.scores[col].undefined.any()]  # fmt: skip
        if hits:
            series = tuple(np.unique(np.concatenate([dp.series[u] for _, u in hits])).tolist())
            key = (series, tuple(name for name, _ in hits))
            kinds.setdefault(key, []).append((col, sum(int(u.sum()) for _, u in hits)))
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


def evaluate(
    plan: Plan, *, use_cache: bool = True, jobs: int | None = None, quiet: bool = False
) -> Evaluation:
    """Forecast every (dataset, series, forecaster, fold) task of ``plan`` and score it."""
    cfg = plan.config
    horizon, levels = cfg.horizon, tuple(cfg.intervals)
    steps = np.arange(horizon)
    summaries = [
        summarise(dp.panel.values, dp.starts, dp.ends, dp.panel.season) for dp in plan.datasets
    ]
    per_dataset: list[dict[int, ForecasterResult]] = [{} for _ in plan.datasets]

    # Baselines: vectorised over all tasks of a dataset at once, in this process.
    for d, dp in enumerate(plan.datasets):
        for f in dp.forecasters:
            spec = plan.forecasters[f]
            if is_vectorised(spec):
                per_dataset[d][f] = _baseline_result(spec, dp, summaries[d], horizon, levels)
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

    add_derived(plan, summaries, per_dataset)  # combinations, selections: from the forecasts

    # Scores: computed from the forecasts at every run, so a new metric never refits.
    cols = M.columns(cfg.metrics, levels)
    results = []
    for d, dp in enumerate(plan.datasets):
        s = summaries[d]
        # missing actuals stay NaN: the metrics leave them out (never filled from a forecast's
        # own training slice, nor from anything else)
        actual = dp.panel.values[dp.test_starts[:, None] + steps[None, :]]
        mase_scale = M.scale_mase(s.seasonal_abs, s.length, dp.panel.season)
        rmsse_scale = M.scale_rmsse(s.diff_sq, s.length)
        ordered = [per_dataset[d][f] for f in dp.forecasters]
        for r in ordered:
            r.scores = M.score_tasks(
                cols, actual, r.point, r.lower, r.upper, levels, mase_scale, rmsse_scale
            )
            r.loss = M.pointwise_loss(cfg.rank_by, actual, r.point, mase_scale, rmsse_scale)
        warnings = _undefined_warnings(dp, ordered, cols)
        result = DatasetResult(dp, actual, ordered, s, warnings)
        if result.unscored_actuals:
            hit = np.isnan(actual).any(axis=1)
            result.notes.append(
                f"dataset {dp.panel.name}: {result.unscored_actuals} missing actual(s) in the "
                f"test blocks of {len(np.unique(dp.series[hit]))} series are not scored (left "
                "out of every metric's mean)"
            )
        if not quiet:
            for note in result.notes:
                print(f"castgrid: note: {note}", file=sys.stderr)
            for w in warnings:
                print(f"castgrid: warning: {w}", file=sys.stderr)
        results.append(result)
    return Evaluation(plan, results, counts, stopped)
