"""The leaderboard: one row per dataset and forecaster, ranked on the config's metric.

Per forecaster and metric, the task scores are averaged within each fold, that is each origin
time of the dataset (over the series that have it), and the leaderboard gives the mean and the
sample standard deviation of those fold means, so the spread says how much the score moves
from one forecast origin to the next. Undefined task scores (NaN) are left out of a fold's mean
and reported as warnings during the run.

No forecaster gains rank by failing. A forecaster is ``complete`` when none of its tasks
failed. Complete forecasters rank first, by the rank metric; those with failed tasks follow,
by the rank metric among themselves. The relative score ``<rank_by>_rel`` and every
significance column compare a forecaster with the reference on the tasks both completed (and
both scored), never a forecaster's surviving folds with the reference's full set.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from runner.scoring import metrics as M
from runner.scoring.results import DatasetResult, Evaluation, ForecasterResult
from runner.windows.plan import DatasetPlan

#: Float format of every number written to leaderboard.csv (fixed, so reruns are byte-equal).


def _fold_mean_sd(values: np.ndarray, groups: np.ndarray) -> tuple[float, float]:
    ok = ~np.isnan(values)
    if not ok.any():
        return float("nan"), float("nan")
    g, inv = np.unique(groups[ok], return_inverse=True)
    sums = np.bincount(inv, weights=values[ok], minlength=len(g))
    counts = np.bincount(inv, minlength=len(g))
    fold_means = sums / counts
    sd = float(np.std(fold_means, ddof=1)) if len(fold_means) > 1 else float("nan")
    return float(fold_means.mean()), sd


def _rank_order(
    values: np.ndarray, names: list[str], column: str, complete: np.ndarray | None = None
) -> np.ndarray:
    """1-based ranks: complete forecasters first, then best first by the metric's direction,
    NaN last, ties by name."""
    mi = M.info(column)
    key = values.copy()
    if mi.better == "higher":
        key = -key
    elif mi.better == "abs":
        key = np.abs(key)
    elif mi.better == "target":
        key = np.abs(key - mi.target)
    key = np.where(np.isnan(key), np.inf, key)
    first = np.ones(len(names), dtype=bool) if complete is None else np.asarray(complete, bool)
    order = sorted(range(len(names)), key=lambda i: (not first[i], key[i], names[i]))
    ranks = np.empty(len(names), dtype=np.int64)
    ranks[order] = np.arange(1, len(names) + 1)
    return ranks


def _shared_tasks(
    r: ForecasterResult, ref: ForecasterResult, rank_by: str, keep: np.ndarray,
    failed: np.ndarray, ref_failed: np.ndarray,
) -> np.ndarray:
    """Tasks among ``keep`` that both ``r`` and the reference completed (``failed`` /
    ``ref_failed``: their failed-task masks) and have a rank-metric score for."""
    score = r.scores[rank_by].per_task
    ref_score = ref.scores[rank_by].per_task
    return keep & ~failed & ~ref_failed & ~np.isnan(score) & ~np.isnan(ref_score)


def _relative(
    r: ForecasterResult, ref: ForecasterResult, origin: np.ndarray, rank_by: str,
    both: np.ndarray,
) -> float:
    """Rank metric of ``r`` over the reference's, both as fold means over the shared tasks
    ``both`` (:func:`_shared_tasks`).

    NaN when there is no shared task, or the reference's mean is 0 or undefined.
    """
    if not both.any():
        return float("nan")
    value, _ = _fold_mean_sd(r.scores[rank_by].per_task[both], origin[both])
    ref_value, _ = _fold_mean_sd(ref.scores[rank_by].per_task[both], origin[both])
    if M.info(rank_by).better == "abs":
        value, ref_value = abs(value), abs(ref_value)
    if not (np.isfinite(value) and np.isfinite(ref_value)) or ref_value == 0:
        return float("nan")
    return float(value / ref_value)


def _versus_reference(
    r: ForecasterResult, ref: ForecasterResult, dr: DatasetResult, rank_by: str, horizon: int,
    step: int, both: np.ndarray,
) -> dict[str, object]:
    from runner.scoring.significance import compare_blocks

    score = r.scores[rank_by].per_task
    ref_score = ref.scores[rank_by].per_task
    if not both.any():
        return {"win_share": np.nan, "dm_better": np.nan, "dm_worse": np.nan,
                "wilcoxon_p": np.nan, "significant": False}
    assert r.versus_reference is not None
    c = compare_blocks(
        score[both], ref_score[both], r.versus_reference[both], dr.plan.series[both],
        dr.plan.fold[both], horizon, step=step,
    )
    return {"win_share": c.win_share, "dm_better": c.dm_better, "dm_worse": c.dm_worse,
            "wilcoxon_p": c.wilcoxon_p, "significant": bool(c.significant)}


def _origin_spacing(ev: Evaluation, dp: DatasetPlan) -> int:
    """Steps between successive origins, which sets how many test blocks overlap.

    ``step`` for origins that follow a rule; for a list of origins, its closest two.
    """
    w = ev.plan.config.windows
    if w.origins is not None and len(dp.origins) > 1:
        return int(np.diff(dp.origins).min())
    return w.step or ev.plan.config.horizon


def _summaries(column: str) -> tuple[str, ...]:
    """The leaderboard columns of a metric: mean and sd over folds, and for a root metric
    (RMSE, RMSSE) also the pooled figure."""
    if M.metric_of(column).reduction == "root_mean":
        return ("mean", "sd", "pooled")
    return ("mean", "sd")


def _pooled_root(per_task: np.ndarray) -> float:
    """The root of the mean square over every scored (task, step): sqrt(mean(per_task ** 2)).

    Each task's root metric is the root of the mean over its ``horizon`` steps, so the mean of
    the squared task scores is the mean over all steps, as a cross-validated RMSE is pooled
    (Hyndman & Athanasopoulos, FPP2 section 3.4). With horizon 1 a task's RMSE is its absolute
    error, and only this pooled figure is an RMSE of the run.
    """
    done = per_task[np.isfinite(per_task)]
    return float(np.sqrt(np.mean(done**2))) if done.size else float("nan")


def build_leaderboard(ev: Evaluation) -> pd.DataFrame:
    """The leaderboard as a DataFrame in its fixed row and column order."""
    rows = [row for dr in ev.datasets for row in dataset_rows(ev, dr)]
    return pd.DataFrame(rows, columns=board_columns(ev))


def board_columns(ev: Evaluation) -> list[str]:
    """The leaderboard's columns, in order."""
    cfg = ev.plan.config
    head = ["dataset", "rank", "forecaster", "kind", "role", "series", "folds", "tasks", "failed",
            "complete"]
    cols = M.columns(cfg.metrics, tuple(cfg.intervals))
    metric_cols = [f"{c}_{s}" for c in cols for s in _summaries(c)]
    tail = [f"{cfg.rank_by}_rel", "win_share", "dm_better", "dm_worse", "wilcoxon_p",
            "beats_reference"]
    return head + metric_cols + tail


def dataset_rows(
    ev: Evaluation, dr: DatasetResult, keep: np.ndarray | None = None
) -> list[dict[str, object]]:
    """The leaderboard rows of one dataset, ranked, over the tasks ``keep`` selects.

    ``keep`` is a boolean mask over the dataset's (series, fold) tasks; None takes them all
    (the leaderboard). A subset (the tasks of one segment's series) gives that subset's
    leaderboard by the same rules: fold means and sds over its tasks, ``complete`` when none
    of its tasks failed, the relative score and every significance column on its tasks both
    the forecaster and the reference completed, and ranks within it.
    """
    cfg = ev.plan.config
    cols = M.columns(cfg.metrics, tuple(cfg.intervals))
    rank_by = cfg.rank_by
    dp = dr.plan
    keep = np.ones(dp.n_tasks, dtype=bool) if keep is None else np.asarray(keep, dtype=bool)
    origin = dp.origin[keep]
    ref = next(r for r in dr.results if r.spec.name == dp.reference)
    # each result's failed mask once: the property rebuilds it from the reasons at every call
    failed_of = [r.failed for r in dr.results]
    ref_failed = ref.failed
    block = []
    for r, r_failed in zip(dr.results, failed_of):
        ok = ~r_failed & keep
        failed = r_failed & keep
        row: dict[str, object] = {
            "dataset": dp.panel.name,
            "forecaster": r.spec.name,
            "kind": r.spec.kind,
            "role": r.spec.role,
            "series": int(len(np.unique(dp.series[ok]))),
            "folds": int(len(np.unique(dp.origin[ok]))),
            "tasks": int(ok.sum()),
            "failed": int(failed.sum()),
            "complete": not bool(failed.any()),
        }
        for col in cols:
            per_task = r.scores[col].per_task[keep]
            mean, sd = _fold_mean_sd(per_task, origin)
            row[f"{col}_mean"], row[f"{col}_sd"] = mean, sd
            if M.metric_of(col).reduction == "root_mean":
                row[f"{col}_pooled"] = _pooled_root(per_task)
        block.append(row)
    for row, r, r_failed in zip(block, dr.results, failed_of):
        both = _shared_tasks(r, ref, rank_by, keep, r_failed, ref_failed)
        rel = _relative(r, ref, dp.origin, rank_by, both)
        row[f"{rank_by}_rel"] = rel
        if r is ref:
            row.update(win_share=np.nan, dm_better=np.nan, dm_worse=np.nan,
                       wilcoxon_p=np.nan)
            row["beats_reference"] = False
            continue
        vs = _versus_reference(r, ref, dr, rank_by, cfg.horizon, _origin_spacing(ev, dp), both)
        significant = vs.pop("significant")
        row.update(vs)
        row["beats_reference"] = bool(
            np.isfinite(rel) and rel < 1.0 and significant and row["failed"] == 0
        )
    ranks = _rank_order(
        np.array([b[f"{rank_by}_mean"] for b in block], dtype=float),
        [str(b["forecaster"]) for b in block],
        rank_by,
        np.array([b["complete"] for b in block], dtype=bool),
    )
    for b, rank in zip(block, ranks):
        b["rank"] = int(rank)
    return sorted(block, key=lambda b: b["rank"])
