"""What a run computes, as data: one forecaster's results on a dataset, a dataset's results,
a chunk of series handed to a sink, and the whole evaluation.

:mod:`runner.scoring.evaluate` fills these; the leaderboard, the results writer and the
report read them.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

import numpy as np

from runner.config import ForecasterSpec
from runner.execution.dispatch import EngineCounts
from runner.forecasters.slices import SliceSummary
from runner.scoring import metrics as M
from runner.windows.plan import DatasetPlan, Plan


class Sparse(Sequence):
    """A per-task list that is mostly one value (``None`` reasons, empty messages), holding
    only the other entries: the failures of a million tasks cost what the failures cost.

    >>> s = Sparse(4, {2: "too-short"}, None)
    >>> list(s), s[-2]
    ([None, None, 'too-short', None], 'too-short')
    """

    def __init__(self, n: int, entries: dict[int, Any], default: Any) -> None:
        self.n, self.entries, self.default = n, entries, default

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, i: Any) -> Any:
        if isinstance(i, slice):
            return [self[j] for j in range(*i.indices(self.n))]
        i = int(i)
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
    #: per task, this forecaster's rank-metric loss minus the reference's, averaged over the
    #: steps both have a loss for (NaN when there is none): all that the significance tests
    #: need of the losses (:func:`runner.scoring.significance.block_differences`)
    versus_reference: np.ndarray | None = None
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


#: What :func:`runner.scoring.evaluate.evaluate` hands each chunk to (the results writer
#: streams its forecasts).
Sink = Callable[[Chunk], None]


@dataclass
class Evaluation:
    """The outcome of forecasting and scoring a whole plan."""

    plan: Plan
    datasets: list[DatasetResult]
    counts: EngineCounts
    stopped: bool = False
