"""Rolling-origin folds: a pure function from a series length and a window scheme to index ranges.

The fold rule (castgrid's contract):

* ``align="end"``: the last origin leaves exactly ``horizon`` observations after it (after
  ``gap``); earlier origins step back by ``step`` while the training part is at least
  ``train`` long.
* ``align="start"``: the first origin is at ``train``; later origins step forward by ``step``
  while a full test block still fits.
* ``folds`` keeps the latest N origins.
* ``expanding``: training starts at the first observation; ``sliding``: training is the
  ``train`` observations just before the origin.

Example (common practice): 100 observations, sliding, train 50, horizon 10, step 10 gives
origins 50, 60, 70, 80, 90: five folds, and the first 50 observations are never a test block.
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


def fold_bounds(n: int, scheme: Scheme) -> np.ndarray:
    """Folds of a series of ``n`` observations, oldest first.

    Returns an int64 array of shape ``(folds, 4)``: ``train_start, train_end, test_start,
    test_end`` (half-open, ``values[train_start:train_end]`` is the training slice). An empty
    ``(0, 4)`` array means the series is too short for the scheme.
    """
    if scheme.train < 1 or scheme.horizon < 1 or scheme.step < 1 or scheme.gap < 0:
        raise ValueError(f"invalid window scheme {scheme}")
    last_origin = n - scheme.horizon - scheme.gap
    if last_origin < scheme.train:
        return np.empty((0, 4), dtype=np.int64)
    if scheme.align == "end":
        count = (last_origin - scheme.train) // scheme.step + 1
        origins = last_origin - scheme.step * np.arange(count - 1, -1, -1, dtype=np.int64)
    else:
        count = (last_origin - scheme.train) // scheme.step + 1
        origins = scheme.train + scheme.step * np.arange(count, dtype=np.int64)
    if scheme.folds is not None:
        origins = origins[-scheme.folds :]
    starts = origins - scheme.train if scheme.kind == "sliding" else np.zeros_like(origins)
    test_start = origins + scheme.gap
    return np.stack([starts, origins, test_start, test_start + scheme.horizon], axis=1)
