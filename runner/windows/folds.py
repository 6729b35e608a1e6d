"""Rolling origins: pure functions from a time axis and a window scheme to folds.

Vocabulary (castgrid's contract):

* Positions ``0, 1, 2, ...`` number the steps of a dataset's time axis, from the dataset's
  first time (see :mod:`runner.windows.axis`); every series of the dataset shares it.
* An **origin** is the position (time) of the last observation a forecaster is trained on.
  The forecast made at origin ``o`` is scored on the test block ``o + gap + 1 ...
  o + gap + horizon``; nothing after ``o`` is given to the forecaster.
* A **fold** is one origin: fold k is the same calendar period for every series.

The origin rule, ``align="start"`` (the default): the first origin is the position where
``train`` observations of the dataset's time axis fit (``train - 1``), later origins follow
every ``step`` while a full test block still fits before the dataset's last time. Appending
observations therefore never moves an existing origin; a new origin appears once a full test
block fits after it. Origins may instead be given as a list, or as a first origin and ``step``.
A series uses the origins it has data for: at least ``train`` observations up to the origin
and a full test block after it. ``folds`` keeps the dataset's latest N origins.

``align="end"`` ties the origins to each series' own last observation: the last origin
leaves exactly ``horizon`` observations after it (after ``gap``), earlier origins step back by
``step`` while the training part is at least ``train`` long, and ``folds`` keeps each series'
latest N. Those origins move whenever data is appended.

``expanding``: training starts at the series' first observation; ``sliding``: training is the
``train`` observations up to the origin.

Example (common practice): 100 observations, sliding, train 50, horizon 10, step 10 gives
origins 49, 59, 69, 79, 89 (training ends at 50, 60, 70, 80, 90): five folds, and the first
50 observations are never a test block.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Scheme:
    """A window scheme with every length resolved to a count of observations."""

    kind: str  # "expanding" | "sliding"
    train: int
    horizon: int
    step: int
    gap: int = 0
    folds: int | None = None
    align: str = "end"

    @property
    def min_length(self) -> int:
        """The shortest series that yields at least one fold."""
        return self.train + self.gap + self.horizon

    def check(self) -> None:
        """Raise ``ValueError`` for lengths no window scheme can have."""
        if self.train < 1 or self.horizon < 1 or self.step < 1 or self.gap < 0:
            raise ValueError(f"invalid window scheme {self}")


def anchored_origins(span: int, scheme: Scheme, first: int | None = None) -> np.ndarray:
    """Origins on a time axis of ``span`` positions, oldest first (int64 positions).

    The first origin is ``first`` (default ``train - 1``: where ``train`` observations of the
    axis fit); later ones follow every ``step`` while a full test block (``gap`` then
    ``horizon`` positions) still fits inside the axis. ``folds`` is not applied here.
    """
    scheme.check()
    start = scheme.train - 1 if first is None else int(first)
    last = span - 1 - scheme.gap - scheme.horizon
    if last < start or start < 0:
        return np.empty(0, dtype=np.int64)
    return start + scheme.step * np.arange((last - start) // scheme.step + 1, dtype=np.int64)


def usable_origins(
    origins: np.ndarray, first: np.ndarray, last: np.ndarray, scheme: Scheme
) -> tuple[np.ndarray, np.ndarray]:
    """Per series, the index range ``[lo, hi)`` of the sorted ``origins`` it has data for.

    ``first`` and ``last`` are each series' first and last positions on the axis. A series
    can use an origin when it has at least ``train`` observations up to it and a full test
    block after it.
    """
    lo = np.searchsorted(origins, first + scheme.train - 1, side="left")
    hi = np.searchsorted(origins, last - scheme.gap - scheme.horizon, side="right")
    return lo, np.maximum(hi, lo)


def bounds_at(origins: np.ndarray, first: np.ndarray | int, scheme: Scheme) -> np.ndarray:
    """Folds at the given origins of series starting at ``first``, relative to each series.

    ``origins`` and ``first`` (broadcast) are axis positions. Returns int64 rows
    ``train_start, train_end, test_start, test_end`` (half-open indices into the series'
    values).
    """
    ends = np.asarray(origins, dtype=np.int64) - first + 1
    starts = ends - scheme.train if scheme.kind == "sliding" else np.zeros_like(ends)
    test_start = ends + scheme.gap
    return np.stack([starts, ends, test_start, test_start + scheme.horizon], axis=1)


def fold_bounds(n: int, scheme: Scheme) -> np.ndarray:
    """Folds of one series of ``n`` observations on its own, oldest first.

    Returns an int64 array of shape ``(folds, 4)``: ``train_start, train_end, test_start,
    test_end`` (half-open, ``values[train_start:train_end]`` is the training slice). An empty
    ``(0, 4)`` array means the series is too short for the scheme. With ``align="start"``
    these are the origins of a dataset made of this one series.
    """
    scheme.check()
    last_origin = n - scheme.horizon - scheme.gap
    if last_origin < scheme.train:
        return np.empty((0, 4), dtype=np.int64)
    if scheme.align == "end":
        count = (last_origin - scheme.train) // scheme.step + 1
        ends = last_origin - scheme.step * np.arange(count - 1, -1, -1, dtype=np.int64)
    else:
        ends = anchored_origins(n, scheme) + 1
    if scheme.folds is not None:
        ends = ends[-scheme.folds :]
    return bounds_at(ends - 1, 0, scheme)
