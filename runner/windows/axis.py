"""A dataset's time axis: every step from its first time to its last, numbered 0, 1, 2, ...

All series of a dataset share one step (the loader checks it: one frequency for dates, one
common difference for whole numbers), so every time of every series has one position on a
single axis that starts at the dataset's first time. Origins are positions on that axis, which
is what makes fold k the same calendar period for every series.

For calendar frequencies (months, quarters, business days, ...) the axis is the frequency's
grid of timestamps; for fixed-length steps (hours, days, minutes, whole numbers) it is
``first + position * step``. Series whose times are all on the step but offset from each
other (hourly series at :00 and at :30) share no axis; that is a :class:`DataError`.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd
import pandas.tseries.offsets as poff
from pandas.tseries.frequencies import to_offset

from runner.data import Panel
from runner.errors import DataError

_DAY_NS = 86_400 * 10**9


@dataclass(frozen=True)
class TimeAxis:
    """Positions of a panel's rows on its dataset's time axis.

    ``positions[r]`` is the position of row ``r`` of the panel's flat arrays; ``span`` is the
    number of positions from the dataset's first time to its last (both included).
    """

    positions: np.ndarray
    span: int
    is_date: bool
    first: int  # the first time, as int64 (nanoseconds for dates)
    unit: int  # fixed step length (0 for a calendar grid)
    grid: np.ndarray | None  # calendar grid of int64 timestamps, position -> time

    def position_of(self, value: int | str) -> int | None:
        """The position of one time given in a config (an integer or a date text).

        None when the time is not on the axis: between two steps, before the first time or
        after the last. Raises ``ValueError`` when ``value`` is the wrong kind of time for the
        dataset (a whole number for dates, or the other way round).
        """
        if self.is_date:
            if isinstance(value, int):
                raise ValueError("expected a date, the dataset's times are dates")
            t = int(pd.Timestamp(value).as_unit("ns").value)
        else:
            if not isinstance(value, int):
                raise ValueError("expected a whole number, the dataset's times are whole numbers")
            t = int(value)
        if self.grid is not None:
            pos = int(np.searchsorted(self.grid, t))
            return pos if pos < len(self.grid) and self.grid[pos] == t else None
        rel = t - self.first
        if rel < 0 or rel % self.unit:
            return None
        pos = rel // self.unit
        return pos if pos < self.span else None

    def time_text(self, position: int) -> str:
        """The time at ``position`` as messages show it (ISO date, or a whole number)."""
        if self.grid is not None:
            return _text(int(self.grid[position]), self.is_date)
        return _text(self.first + position * self.unit, self.is_date)


def time_axis(panel: Panel) -> TimeAxis:
    """Place every row of ``panel`` on its dataset's time axis."""
    is_date = panel.times.dtype.kind == "M"
    t = panel.times.view(np.int64) if is_date else np.asarray(panel.times, dtype=np.int64)
    if not len(t):
        return TimeAxis(np.zeros(0, np.int64), 0, is_date, 0, 1, None)
    lo, hi = int(t.min()), int(t.max())
    unit = _fixed_step(panel) if is_date else max(int(panel.step), 1)
    if unit:
        rel = t - lo
        off = np.flatnonzero(rel % unit)
        if len(off):
            j = int(off[0])
            i = int(np.searchsorted(panel.offsets, j, side="right")) - 1
            raise DataError(
                f"{panel.path}: dataset {panel.name!r}: series {panel.keys[i]!r} is not on the "
                f"dataset's time grid (time {_text(t[j], is_date)} is not a whole number of "
                f"steps from the first time {_text(lo, is_date)}); all series must share one "
                "grid so that they share forecast origins"
            )
        return TimeAxis(rel // unit, (hi - lo) // unit + 1, is_date, lo, unit, None)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        offset = to_offset(panel.frequency)
    grid = pd.date_range(start=pd.Timestamp(lo), end=pd.Timestamp(hi), freq=offset,
                         unit="ns").asi8.astype(np.int64)
    # the loader has checked that every time is on this grid
    return TimeAxis(np.searchsorted(grid, t).astype(np.int64), len(grid), True, lo, 0, grid)


def _fixed_step(panel: Panel) -> int:
    """Step length in nanoseconds for fixed-length frequencies (hours, days); 0 for calendars."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        offset = to_offset(panel.frequency)
    if type(offset) is poff.Day:
        return int(offset.n) * _DAY_NS
    if isinstance(offset, poff.Tick):
        return int(offset.nanos)
    return 0


def _text(t: int, is_date: bool) -> str:
    if not is_date:
        return str(int(t))
    stamp = np.asarray([t], dtype=np.int64).view("datetime64[ns]")
    return str(np.datetime_as_string(stamp, unit="D" if t % _DAY_NS == 0 else "s")[0])
