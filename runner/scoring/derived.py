"""Computing derived candidates from the forecasts of a run, and what the selections chose.

:func:`add_derived_dataset` runs, chunk by chunk of series, once every baseline and model
forecast of the chunk is known and before anything is scored. It computes each derived
candidate (:mod:`runner.forecasters.derived`) per task (series, fold) from its components'
point forecasts of the same run: nothing is refitted, so adding one to a config whose model
forecasts are cached computes no forecast.

- ``combination``: the mean or median of the components' forecasts, step by step; a task where
  any component failed is failed (``component-failed``, naming the component), so the fair
  ranking applies to it as to any forecaster. No prediction intervals (see
  :class:`runner.forecasters.derived.Combination`).
- ``best_so_far``: per task, the forecast of the listed forecaster with the best mean rank
  metric on the same series at earlier folds only; the fallback where there is none
  (:class:`runner.forecasters.derived.BestSoFar`). Each task's choice is kept in the result's
  ``info`` (``chosen``, ``basis``), and :func:`selection_frame` counts them.

A component that does not apply to a dataset (a default seasonal benchmark on a dataset with
season 1) fails every task that needs it, with reason ``component-missing``.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from runner.config import ForecasterSpec
from runner.forecasters.derived import COMPUTE_ORDER, components
from runner.forecasters.registry import is_derived
from runner.forecasters.slices import SliceSummary
from runner.scoring import metrics as M
from runner.scoring.results import Evaluation, ForecasterResult
from runner.windows.plan import DatasetPlan, Plan

#: ``basis`` of a selection's task: chosen on the series' earlier folds, or the fallback.
HISTORY, FALLBACK = "history", "fallback"
#: Columns of selection.csv.
SELECTION_COLUMNS = ["dataset", "selector", "chosen", "basis", "tasks", "failed"]


class _Missing:
    """Stands in for a component that does not apply to the dataset: every task fails."""

    def __init__(self, name: str, dataset: str, n: int, horizon: int) -> None:
        self.point = np.full((n, horizon), np.nan)
        self.reason: list[str | None] = ["component-missing"] * n
        self.message = [f"component {name} does not apply to dataset {dataset}"] * n
        self.failed = np.ones(n, dtype=bool)


def add_derived_dataset(
    plan: Plan, dp: DatasetPlan, summary: SliceSummary, results: dict[int, ForecasterResult]
) -> None:
    """Add the result of every derived candidate of dataset ``dp`` to ``results``
    (forecaster index -> result), computed from the results already there. ``dp`` and
    ``summary`` may hold any subset of the dataset's tasks that keeps every task of a series
    (a chunk of series: a selection looks at its series' earlier folds)."""

    horizon, n_levels = plan.config.horizon, len(plan.config.intervals)
    derived = [f for f in dp.forecasters if is_derived(plan.forecasters[f])]
    if not derived:
        return
    known = {plan.forecasters[f].name: r for f, r in results.items()}
    derived.sort(key=lambda f: COMPUTE_ORDER.index(plan.forecasters[f].kind))
    for f in derived:
        spec = plan.forecasters[f]
        names = components(spec)
        if spec.kind == "best_so_far":
            names.append(spec.params.get("fallback") or dp.reference)
        parts = {
            name: known[name] if name in known
            else _Missing(name, dp.panel.name, dp.n_tasks, horizon)
            for name in names
        }
        if spec.kind == "combination":
            point, reason, message, info = _combine(spec, parts)
        else:
            point, reason, message, info = _select(
                spec, parts, dp, summary, plan.config.rank_by, horizon
            )
        nan_bounds = np.full((n_levels, dp.n_tasks, horizon), np.nan)
        result = ForecasterResult(
            spec, point, nan_bounds, nan_bounds.copy(), reason, message, info=info
        )
        results[f] = result
        known[spec.name] = result


def _task_failed(r) -> np.ndarray:
    """Tasks a component cannot serve: failed, or (defensively) without a finite forecast."""
    return r.failed | ~np.isfinite(r.point).all(axis=1)


def _combine(
    spec: ForecasterSpec, parts: dict
) -> tuple[np.ndarray, list[str | None], list[str], list[dict]]:
    names = components(spec)
    stack = np.stack([parts[n].point for n in names])  # (k, n, H)
    bad = np.stack([_task_failed(parts[n]) for n in names])  # (k, n)
    ok = ~bad.any(axis=0)
    point = np.full(stack.shape[1:], np.nan)
    pool = np.mean if spec.params.get("how", "mean") == "mean" else np.median
    point[ok] = pool(stack[:, ok], axis=0)
    reason: list[str | None] = []
    message: list[str] = []
    for t in range(len(ok)):
        if ok[t]:
            reason.append(None)
            message.append("")
            continue
        which = [n for i, n in enumerate(names) if bad[i, t]]
        missing = [n for n in which if parts[n].reason[t] == "component-missing"]
        if missing:
            reason.append("component-missing")
            message.append(parts[missing[0]].message[t])
            continue
        why = ", ".join(f"{n} ({parts[n].reason[t] or 'no finite forecast'})" for n in which)
        reason.append("component-failed")
        message.append(f"component {why} failed on this task")
    return point, reason, message, [{} for _ in range(len(ok))]


def _badness(scores: np.ndarray, rank_by: str) -> np.ndarray:
    """Rank-metric scores turned so that lower is better (the leaderboard's direction)."""
    mi = M.info(rank_by)
    if mi.better == "higher":
        return -scores
    if mi.better == "abs":
        return np.abs(scores)
    if mi.better == "target":
        return np.abs(scores - mi.target)
    return scores


def task_scores(
    point: np.ndarray, dp: DatasetPlan, summary: SliceSummary, rank_by: str, horizon: int
) -> np.ndarray:
    """Per-task scores of the rank metric for the point forecasts ``point`` (n, H), computed as
    :func:`runner.scoring.metrics.score_tasks` scores them for the leaderboard."""
    steps = np.arange(horizon)
    actual = dp.panel.values[dp.test_starts[:, None] + steps[None, :]]
    mase_scale = M.scale_mase(summary.seasonal_abs, summary.length, dp.panel.season)
    rmsse_scale = M.scale_rmsse(summary.diff_sq, summary.length)
    none = np.empty((0, *point.shape))
    return M.score_tasks(
        [rank_by], actual, point, none, none, (), mase_scale, rmsse_scale
    )[rank_by].per_task


def choices(
    badness: np.ndarray, failed: np.ndarray, series: np.ndarray, test_starts: np.ndarray,
    ends: np.ndarray, horizon: int,
) -> np.ndarray:
    """Index of the forecaster each task chooses (into the rows of ``badness``), -1 where there
    is nothing to choose from (the fallback).

    ``badness`` (k, n): each candidate's rank-metric score per task, lower is better (NaN where
    undefined); ``failed`` (k, n). A task's history is the tasks of its series whose whole test
    block ends at or before its origin (``test_starts + horizon <= ends``); a candidate that
    failed in that history is not eligible; eligible candidates compare their mean badness over
    the history tasks where all of them are defined; a tie goes to the lower index.
    """
    n = badness.shape[1]
    out = np.full(n, -1, dtype=np.int64)
    if n == 0:
        return out
    # Tasks by series, then chronologically: a task's history is then a prefix of its series.
    order = np.lexsort((test_starts, series))
    s, block_end, end = series[order], test_starts[order] + horizon, ends[order]
    first = np.searchsorted(s, s, side="left")  # position of the series' first task
    # per task, how many tasks of its series ended by its origin (one sorted search for all
    # series at once: series * big + time is sorted because times are below big)
    big = int(max(block_end.max(), end.max())) + 1
    known = np.searchsorted(s * big + block_end, s * big + end, side="right") - first
    bad, fail = badness[:, order], failed[:, order]
    # tasks with the same history length are chosen together, vectorised over their series
    for c in np.unique(known[known > 0]):
        rows = np.flatnonzero(known == c)
        hist = first[rows, None] + np.arange(c)[None, :]  # (m, c) positions of the history
        b = bad[:, hist]  # (k, m, c)
        eligible = ~fail[:, hist].any(axis=2)  # (k, m): no failure in the history
        common = (np.isfinite(b) | ~eligible[:, :, None]).all(axis=0)  # (m, c)
        used = common.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            means = np.where(common[None], b, 0.0).sum(axis=2) / used
        means = np.where(eligible, means, np.inf)
        best = np.argmin(means, axis=0)  # the first of equal means: listed first wins
        ok = eligible.any(axis=0) & (used > 0)
        out[order[rows[ok]]] = best[ok]
    return out


def _select(
    spec: ForecasterSpec, parts: dict, dp: DatasetPlan, summary: SliceSummary, rank_by: str,
    horizon: int,
) -> tuple[np.ndarray, list[str | None], list[str], list[dict]]:
    names = components(spec)
    fallback = spec.params.get("fallback") or dp.reference
    failed = np.stack([_task_failed(parts[n]) for n in names])
    scores = np.stack([task_scores(parts[n].point, dp, summary, rank_by, horizon) for n in names])
    pick = choices(_badness(scores, rank_by), failed, dp.series, dp.test_starts, dp.ends, horizon)
    point = np.full((dp.n_tasks, horizon), np.nan)
    reason: list[str | None] = []
    message: list[str] = []
    info: list[dict] = []
    unusable = {name: _task_failed(r) for name, r in parts.items()}
    for t, i in enumerate(pick):
        name = names[i] if i >= 0 else fallback
        basis = HISTORY if i >= 0 else FALLBACK
        info.append({"chosen": name, "basis": basis})
        r = parts[name]
        if unusable[name][t]:
            if r.reason[t] == "component-missing":
                reason.append("component-missing")
                message.append(r.message[t])
            else:
                reason.append("component-failed")
                message.append(f"chosen component {name} ({basis}) failed on this task "
                               f"({r.reason[t] or 'no finite forecast'})")
            continue
        point[t] = r.point[t]
        reason.append(None)
        message.append("")
    return point, reason, message, info


def selection_frame(ev: Evaluation) -> pd.DataFrame | None:
    """How often each ``best_so_far`` candidate chose each forecaster: one row per dataset,
    selector, chosen forecaster and basis (``history`` or ``fallback``), with the tasks and how
    many of them failed; None when the run has no selection."""
    rows = []
    selectors = 0
    for dr in ev.datasets:
        for r in dr.results:
            if r.spec.kind != "best_so_far":
                continue
            selectors += 1
            counts: dict[tuple[str, str], list[int]] = {}
            for info, failed in zip(r.info, r.failed):
                tally = counts.setdefault((info["chosen"], info["basis"]), [0, 0])
                tally[0] += 1
                tally[1] += int(failed)
            # chosen on history first, then the fallback; most chosen first, ties by name
            order = sorted(counts, key=lambda cb: (cb[1] != HISTORY, -counts[cb][0], cb[0]))
            for chosen, basis in order:
                tasks, failed = counts[(chosen, basis)]
                rows.append({"dataset": dr.plan.panel.name, "selector": r.spec.name,
                             "chosen": chosen, "basis": basis, "tasks": tasks, "failed": failed})
    if not selectors:
        return None
    return pd.DataFrame(rows, columns=SELECTION_COLUMNS)


def selection_lines(frame: pd.DataFrame | None) -> list[str]:
    """One line per dataset and selector for the terminal: what it chose, how often."""
    if frame is None:
        return []
    lines = []
    for (dataset, selector), block in frame.groupby(["dataset", "selector"], sort=False):
        chosen = block[block["basis"] == HISTORY]
        fallback = block[block["basis"] == FALLBACK]
        parts = [f"{c} {t}" for c, t in zip(chosen["chosen"], chosen["tasks"])]
        text = ", ".join(parts) if parts else "nothing (no earlier fold to choose on)"
        if len(fallback):
            text += "; fallback " + ", ".join(
                f"{c} {t}" for c, t in zip(fallback["chosen"], fallback["tasks"]))
        failed = int(block["failed"].sum())
        tail = f", {failed} failed" if failed else ""
        lines.append(f"{selector} on {dataset} ({int(block['tasks'].sum())} tasks{tail}): "
                     f"chose {text}")
    return lines
