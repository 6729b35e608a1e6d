"""A dataset's tasks in chunks of series, and what is kept of the chunks for the whole run.

A chunk holds every task of its series (a selection looks at its series' earlier folds, and a
series' scores are one row block), so chunks are ranges of series (:func:`series_chunks`).
What outlives a chunk (:class:`Gathered`, :class:`Tally`) is small: per task, each metric's
score, the rank metric's difference from the reference and the failures; per step, the running
sums and counts of the losses; per dataset, the undefined scores and missing actuals.
Per-task numbers are computed row by row and the per-step sums are carried from one chunk to
the next in task order (:func:`runner.scoring.metrics.score_tasks`), so every number is the
same bits whatever the chunk size.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field, replace

import numpy as np

from runner.config import ForecasterSpec
from runner.scoring import metrics as M
from runner.scoring.results import Chunk, ForecasterResult, Sparse
from runner.windows.plan import DatasetPlan


def series_chunks(dp: DatasetPlan, size: int) -> Iterator[slice]:
    """Ranges of the dataset's tasks covering ``size`` series each (the last fewer); every
    task of a series falls in one range (tasks are ordered by series). A dataset without
    tasks is one empty range."""
    n = dp.n_tasks
    if n == 0:
        yield slice(0, 0)
        return
    firsts = np.r_[0, np.flatnonzero(np.diff(dp.series)) + 1]
    size = max(1, size)
    for i in range(0, len(firsts), size):
        hi = int(firsts[i + size]) if i + size < len(firsts) else n
        yield slice(int(firsts[i]), hi)


def chunk_plan(dp: DatasetPlan, tasks: slice) -> DatasetPlan:
    """The plan of the tasks ``tasks`` of ``dp`` (``dp`` itself when that is all of them)."""
    if tasks == slice(0, dp.n_tasks):
        return dp
    return replace(dp, series=dp.series[tasks], fold=dp.fold[tasks], origin=dp.origin[tasks],
                   starts=dp.starts[tasks], ends=dp.ends[tasks],
                   test_starts=dp.test_starts[tasks])


def cut(r: ForecasterResult, tasks: slice) -> ForecasterResult:
    """The tasks ``tasks`` of a result computed for the whole dataset (models, recorded
    forecasts); the arrays are views."""
    assert r.point is not None and r.lower is not None and r.upper is not None
    return ForecasterResult(
        r.spec, r.point[tasks], r.lower[:, tasks], r.upper[:, tasks], list(r.reason[tasks]),
        list(r.message[tasks]), info=list(r.info[tasks]) if r.info else [],
    )


@dataclass
class Gathered:
    """What is kept of one forecaster's chunks for the whole run (see the module doc): the
    per-task arrays are allocated for the dataset's ``total`` tasks at once and filled chunk
    by chunk (no list of parts to join at the end, which would hold them twice)."""

    spec: ForecasterSpec
    total: int
    n: int = 0
    per_task: dict[str, np.ndarray] = field(default_factory=dict)
    undefined: dict[str, np.ndarray] = field(default_factory=dict)
    last: dict[str, M.Scored] = field(default_factory=dict)
    versus_reference: np.ndarray | None = None
    reason: dict[int, str] = field(default_factory=dict)
    message: dict[int, str] = field(default_factory=dict)
    info: list[dict] = field(default_factory=list)

    def add(self, r: ForecasterResult) -> None:
        """Keep the scores and failures of the next chunk's result (in task order)."""
        lo, hi = self.n, self.n + len(r.reason)
        for col, sc in r.scores.items():
            if col not in self.per_task:
                self.per_task[col] = np.empty(self.total)
                self.undefined[col] = np.empty(self.total, dtype=bool)
            self.per_task[col][lo:hi] = sc.per_task
            self.undefined[col][lo:hi] = sc.undefined
            self.last[col] = sc  # its step sums run over every chunk so far
        assert r.versus_reference is not None
        if self.versus_reference is None:
            self.versus_reference = np.empty(self.total)
        self.versus_reference[lo:hi] = r.versus_reference
        for t in np.flatnonzero(r.failed):
            self.reason[lo + int(t)] = r.reason[t]  # type: ignore[assignment]
            self.message[lo + int(t)] = r.message[t]
        self.info.extend(r.info)
        self.n = hi

    def carry(self) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """The per-step sums and counts so far, per metric column: where the next chunk's
        sums start."""
        out = {}
        for col, sc in self.last.items():
            assert sc.step_sum is not None and sc.step_count is not None
            out[col] = (sc.step_sum, sc.step_count)
        return out

    def result(self) -> ForecasterResult:
        """The forecaster's result over every chunk added (no forecasts)."""
        assert self.n == self.total and self.versus_reference is not None
        scores = {
            col: M.Scored(per_task, self.last[col].per_step, self.undefined[col],
                          self.last[col].step_sum, self.last[col].step_count)
            for col, per_task in self.per_task.items()
        }
        return ForecasterResult(
            self.spec, None, None, None, Sparse(self.n, self.reason, None),
            Sparse(self.n, self.message, ""), scores, self.versus_reference,
            self.info if len(self.info) == self.n else [],
        )


@dataclass
class Tally:
    """A dataset's missing actuals and undefined scores, counted chunk by chunk."""

    cols: list[str]
    unscored: int = 0
    unscored_series: int = 0
    #: per metric column and forecaster: the series with an undefined score (one array per
    #: chunk) and how many scores
    hits: dict[str, dict[str, tuple[list[np.ndarray], int]]] = field(default_factory=dict)

    def add(self, chunk: Chunk) -> None:
        """Count the chunk's missing actuals (each (series, time) once) and undefined scores."""
        missing = np.isnan(chunk.actual)
        if missing.any():
            steps = np.arange(missing.shape[1])
            cells = (chunk.plan.test_starts[:, None] + steps[None, :])[missing]
            self.unscored += len(np.unique(cells))
            self.unscored_series += len(np.unique(chunk.plan.series[missing.any(axis=1)]))
        for r in chunk.results:
            for col in self.cols:
                u = r.scores[col].undefined
                if u.any():
                    per_name = self.hits.setdefault(col, {})
                    parts, total = per_name.get(r.spec.name, ([], 0))
                    parts.append(np.unique(chunk.plan.series[u]))
                    per_name[r.spec.name] = (parts, total + int(u.sum()))

    def notes(self, dp: DatasetPlan) -> list[str]:
        """The note on missing actuals (none when there were none)."""
        if not self.unscored:
            return []
        return [f"dataset {dp.panel.name}: {self.unscored} missing actual(s) in the test "
                f"blocks of {self.unscored_series} series are not scored (left out of every "
                "metric's mean)"]

    def warnings(self, dp: DatasetPlan, names: list[str]) -> list[str]:
        """One warning per kind of undefined score: which metrics, how many scores, where.

        ``names``: the dataset's forecasters in order. A constant series makes every scaled
        metric undefined for every forecaster at once; a line per forecaster and metric would
        bury the other messages. Metrics undefined for the same series and forecasters share a
        line.
        """
        kinds: dict[tuple[tuple[int, ...], tuple[str, ...]], list[tuple[str, int]]] = {}
        for col in self.cols:
            per_name = self.hits.get(col)
            if not per_name:
                continue
            found = [(name, *per_name[name]) for name in names if name in per_name]
            series = tuple(np.unique(np.concatenate([a for _, p, _ in found for a in p]))
                           .tolist())
            key = (series, tuple(name for name, _, _ in found))
            kinds.setdefault(key, []).append((col, sum(n for _, _, n in found)))
        lines = []
        for (series, forecasters), metrics in kinds.items():
            keys = [dp.panel.keys[i] for i in series]
            what = _few([col for col, _ in metrics], show=len(metrics))
            lines.append(
                f"dataset {dp.panel.name}: {what} undefined (zero or undefined denominator) in "
                f"{sum(n for _, n in metrics)} score(s): {len(keys)} series ({_few(keys)}), "
                f"{len(forecasters)} forecaster(s) ({_few(list(forecasters))}); left out of "
                "the means"
            )
        return lines


def _few(names: list[str], show: int = 3) -> str:
    more = f" and {len(names) - show} more" if len(names) > show else ""
    return ", ".join(names[:show]) + more
