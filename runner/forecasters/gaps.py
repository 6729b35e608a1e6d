"""Filling the missing values of a training slice from that slice's own values, and nothing else.

With ``missing: interpolate`` a dataset keeps its missing values as NaN (the loader inserts the
missing times, and fills nothing). Each forecaster then sees its training slice with the gaps
filled from the values inside the slice:

* a gap between two observed values of the slice: the straight line between those two
  neighbours (linear interpolation; every step is equally long on the time axis);
* a gap at the end of the slice: the last observed value carried forward;
* a gap at the start of the slice: the first observed value carried backward;
* a slice without any observed value stays all NaN (the caller fails that task).

Filling the whole series once at load time instead would let a value after a forecast origin
reach the forecast: the gap just before the origin would be interpolated towards the first test
value. Filling per slice guarantees that nothing from after the slice's end is used.

:func:`fill_slice` fills one slice (the per-series models); :class:`SliceFill` fills many slices
of one flat array at once (the vectorised benchmarks and the scaled metrics). Both apply the
same rule with the same arithmetic, so a benchmark and a model see identical training values.
"""

from __future__ import annotations

import numpy as np


class SliceFill:
    """Values of a flat array with its gaps filled, slice by slice, from each slice alone.

    ``take(idx, starts, ends)`` returns ``values[idx]`` where each position ``idx`` is read as
    part of the slice ``values[starts:ends]`` (the three broadcast together): a NaN there is
    filled by the rule of this module using only the values of that slice.

    >>> f = SliceFill(np.array([1.0, np.nan, 3.0, np.nan, 7.0]))
    >>> f.take(np.arange(4), 0, 4).tolist()        # slice [0, 4): the last gap carries 3 forward
    [1.0, 2.0, 3.0, 3.0]
    >>> f.take(np.arange(1, 5), 1, 5).tolist()     # slice [1, 5): the first gap takes 3
    [3.0, 3.0, 5.0, 7.0]
    """

    def __init__(self, values: np.ndarray) -> None:
        self.values = np.asarray(values, dtype=np.float64)
        known = ~np.isnan(self.values)
        self.has_gaps = not bool(known.all())
        #: observed values before each position (n + 1,), for :meth:`observed`; only with gaps
        self._known_before: np.ndarray | None = None
        if self.has_gaps:
            self._known_before = np.concatenate([[0], np.cumsum(known, dtype=np.int64)])
        if self.has_gaps:
            n = len(self.values)
            pos = np.arange(n, dtype=np.int64)
            # nearest observed position at or before / at or after each position
            self._prev = np.maximum.accumulate(np.where(known, pos, -1))
            after = np.where(known, pos, n)
            self._next = np.minimum.accumulate(after[::-1])[::-1]

    def observed(self, starts: np.ndarray, ends: np.ndarray) -> np.ndarray:
        """How many values of each slice ``[starts, ends)`` are observed (not missing).

        >>> SliceFill(np.array([1.0, np.nan, 3.0])).observed(np.array([0, 1]), np.array([3, 2]))
        array([2, 0])
        """
        if self._known_before is None:
            return np.asarray(ends) - np.asarray(starts)
        return self._known_before[ends] - self._known_before[starts]

    def take(self, idx: np.ndarray, starts: np.ndarray | int, ends: np.ndarray | int) -> np.ndarray:
        """Filled values at flat positions ``idx``, each read inside ``[starts, ends)``."""
        idx = np.asarray(idx, dtype=np.int64)
        out = self.values[idx]
        if not self.has_gaps:
            return out
        gap = np.isnan(out)
        if not gap.any():
            return out
        starts = np.broadcast_to(np.asarray(starts, dtype=np.int64), idx.shape)[gap]
        ends = np.broadcast_to(np.asarray(ends, dtype=np.int64), idx.shape)[gap]
        i = idx[gap]
        p, q = self._prev[i], self._next[i]
        has_p, has_q = p >= starts, q < ends
        # Values are read only where the neighbour lies inside the slice (clip keeps the
        # index valid for the others, whose value is never selected).
        vp = self.values[np.clip(p, 0, len(self.values) - 1)]
        vq = self.values[np.clip(q, 0, len(self.values) - 1)]
        with np.errstate(invalid="ignore", divide="ignore"):
            line = vp + (vq - vp) * ((i - p) / (q - p))
        filled = np.where(
            has_p & has_q, line, np.where(has_p, vp, np.where(has_q, vq, np.nan))
        )
        out[gap] = filled
        return out


def fill_slice(y: np.ndarray) -> np.ndarray:
    """A copy of the training slice ``y`` with its gaps filled from its own values.

    >>> fill_slice(np.array([np.nan, 2.0, np.nan, 4.0, np.nan])).tolist()
    [2.0, 2.0, 3.0, 4.0, 4.0]
    """
    y = np.array(y, dtype=np.float64)
    if y.ndim != 1 or not np.isnan(y).any():
        return y
    return SliceFill(y).take(np.arange(len(y)), 0, len(y))


def observed_count(y: np.ndarray) -> int:
    """How many values of ``y`` are observed (not NaN)."""
    return int(np.count_nonzero(~np.isnan(np.asarray(y, dtype=np.float64))))
