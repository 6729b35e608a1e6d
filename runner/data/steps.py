"""Placing every time on the dataset's step axis, and checking that it fits.

Dates use a frequency (given or inferred, :mod:`runner.data.frequency`): fixed-length steps
(hours, naive days) count from each series' first time, calendar steps (months, business days)
are positions on the frequency's grid of timestamps. Whole-number times use their common
difference. A time off the axis, or a series observed at a coarser step than the others, is a
:class:`~runner.errors.DataError`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import pandas.tseries.offsets as poff

from runner.config import DatasetConfig
from runner.data.frequency import infer_frequency
from runner.data.messages import Source
from runner.data.panel import DAY_NS
from runner.data.rows import Rows


@dataclass
class StepAxis:
    """Step positions of times: ``pos`` per row (one apart = one step), and times back.

    Either arithmetic (fixed-length steps of ``unit``, counted from each series' first time)
    or a calendar ``grid`` of every valid timestamp from the panel's first to its last.
    """

    unit: int
    first: np.ndarray | None = None
    grid: np.ndarray | None = None
    pos: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))

    def times(self, sid: np.ndarray, pos: np.ndarray) -> np.ndarray:
        """The times (int64) at positions ``pos`` of series ``sid``."""
        if self.grid is not None:
            return self.grid[pos]
        assert self.first is not None
        return self.first[sid] + pos * self.unit


def step_axis(
    rows: Rows, ds: DatasetConfig, offset: poff.BaseOffset | None, src: Source
) -> tuple[StepAxis, str | None]:
    """Place every row on a step axis; returns the axis and the frequency alias (dates).

    ``offset`` is the config's frequency (None: inferred from the dates).
    """
    starts = rows.offsets[:-1]
    counts = np.diff(rows.offsets)
    same = rows.sid[1:] == rows.sid[:-1]
    if not rows.is_date:
        if ds.frequency is not None:
            raise src.config_fail(
                "frequency",
                f'column "{ds.time}" of {ds.path} holds whole numbers; frequency applies to '
                "dates only (remove it)",
            )
        diffs = (rows.t[1:] - rows.t[:-1])[same]
        unit = int(np.gcd.reduce(diffs)) if len(diffs) else 1
        axis = StepAxis(unit=max(unit, 1), first=rows.t[starts])
        axis.pos = (rows.t - axis.first[rows.sid]) // axis.unit
        _require_one_step(rows, axis, same, counts, src, f"time step {axis.unit}")
        return axis, None

    inferred = offset is None
    if offset is None:
        offset = infer_frequency(rows, counts, ds, src)
    axis = _date_axis(rows, offset, src)
    if inferred:
        _require_one_step(rows, axis, same, counts, src, f"frequency {offset.freqstr}")
    return axis, offset.freqstr


def _date_axis(rows: Rows, offset: poff.BaseOffset, src: Source) -> StepAxis:
    if isinstance(offset, poff.Tick) or type(offset) is poff.Day:
        # Fixed-length steps (a naive calendar day is 24 h): arithmetic from each series' start.
        # Tick.nanos already includes the multiple (15min: 900 s); Day has no nanos in pandas 3.
        unit = int(offset.n) * DAY_NS if type(offset) is poff.Day else int(offset.nanos)
        first = rows.t[rows.offsets[:-1]]
        rel = rows.t - first[rows.sid]
        misfit = rel % unit != 0
        axis = StepAxis(unit=unit, first=first, pos=rel // unit)
    else:
        lo, hi = rows.t.min(), rows.t.max()
        grid = pd.date_range(
            start=pd.Timestamp(lo), end=pd.Timestamp(hi), freq=offset, unit="ns"
        ).asi8.astype(np.int64)
        pos = np.searchsorted(grid, rows.t)
        # a time past the grid's last point finds the sentinel after it, which no time equals;
        # compared in blocks, so that no gathered copy of every time is made
        ext = np.append(grid, hi + 1)
        misfit = np.empty(len(pos), dtype=bool)
        for start in range(0, len(pos), 1 << 22):
            part = slice(start, start + (1 << 22))
            np.not_equal(ext[pos[part]], rows.t[part], out=misfit[part])
        axis = StepAxis(unit=1, grid=grid, pos=pos)
    if misfit.any():
        # Report the misfit that comes first in the file.
        cand = np.flatnonzero(misfit)
        j = int(cand[np.argmin(rows.row[cand])])
        raise src.fail(
            f"{src.series(rows.keys[rows.sid[j]])}: time {rows.time_text(rows.t[j])} does not fit "
            f"frequency {offset.freqstr} (row {rows.row[j]})"
        )
    return axis


def _require_one_step(
    rows: Rows, axis: StepAxis, same: np.ndarray, counts: np.ndarray, src: Source, what: str
) -> None:
    """Reject a series observed at a coarser step than the panel (e.g. every 3rd month)."""
    multi = np.flatnonzero(counts > 1)
    if not len(multi):
        return
    # steps between neighbours, 0 across a series boundary (gcd(x, 0) = x): one array, no
    # compacted copy; series i's steps start at offsets[i]; int32 when every step fits (half
    # the memory of a copy of the positions)
    narrow = int(axis.pos.max()) - int(axis.pos.min()) < 2**31
    d = np.empty(len(axis.pos) - 1, dtype=np.int32 if narrow else np.int64)
    np.subtract(axis.pos[1:], axis.pos[:-1], out=d, casting="unsafe")
    d[~same] = 0
    per_series = np.gcd.reduceat(d, rows.offsets[:-1][multi])
    coarse = np.flatnonzero(per_series > 1)
    if len(coarse):
        i = int(multi[coarse[0]])
        raise src.fail(
            f"{src.series(rows.keys[i])}: times are {int(per_series[coarse[0]])} steps of {what} "
            f"apart; all series must share one step (set frequency, or split the file)"
        )
