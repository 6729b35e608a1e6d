"""The :class:`Panel`: every series of one dataset, end to end in flat arrays.

:func:`runner.data.load.load_panel` builds it from a file; everything after loading (the plan,
the forecasters, scoring) reads series through it. The two functions below print times the way
every message and output file shows them.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

#: Nanoseconds in a day (times of dates are int64 nanoseconds since 1970).
DAY_NS = 86_400 * 10**9


@dataclass(eq=False)
class Panel:
    """All series of one dataset, stored end to end in flat arrays.

    Series ``i`` is ``values[offsets[i]:offsets[i+1]]``, in time order; ``times`` and the rows
    of ``covariates`` line up with ``values``. Series are ordered by their key (string order
    of the key tuple), so the same data always gives the same panel. With ``missing:
    interpolate``, ``values`` is NaN at every missing value (never at a series' first or last
    position): each training slice is filled from its own values when it is used.
    """

    name: str
    values: np.ndarray
    offsets: np.ndarray
    keys: list[str]
    times: np.ndarray
    covariates: np.ndarray | None
    covariate_names: list[str]
    frequency: str | None
    step: int
    season: int
    fingerprint: str
    path: str
    notes: list[str] = field(default_factory=list)
    #: series attributes by name: one text value per series, in key order
    #: (filled by :func:`runner.data.attributes.attach_attributes`)
    attributes: dict[str, np.ndarray] = field(default_factory=dict)

    @property
    def n_series(self) -> int:
        """Number of series."""
        return len(self.keys)

    def series_values(self, i: int) -> np.ndarray:
        """Values of series ``i`` (a view, in time order)."""
        return self.values[self.offsets[i] : self.offsets[i + 1]]

    def series_times(self, i: int) -> np.ndarray:
        """Times of series ``i`` (a view)."""
        return self.times[self.offsets[i] : self.offsets[i + 1]]

    def series_covariates(self, i: int) -> np.ndarray | None:
        """Covariate rows of series ``i`` (a view), or None when the dataset has none."""
        if self.covariates is None:
            return None
        return self.covariates[self.offsets[i] : self.offsets[i + 1]]

    @cached_property
    def _time_unit(self) -> str:
        # One unit for the whole panel, so that every series prints its times alike.
        return datetime_unit(self.times) if self.times.dtype.kind == "M" else ""

    def format_time(self, flat_index: np.ndarray) -> np.ndarray:
        """Times at positions ``flat_index`` of the flat arrays, as strings.

        Dates print as ISO dates (``2021-03-01``), or ISO date-times
        (``2021-03-01T05:00:00``) when any time of the panel has a time of day; integer times
        print as integers.
        """
        t = self.times[np.asarray(flat_index, dtype=np.int64)]
        if self.times.dtype.kind == "M":
            return np.datetime_as_string(t, unit=self._time_unit)
        return t.astype(str)


def time_text(t: int | np.integer, is_date: bool) -> str:
    """One time for a message: an ISO date (or date-time), or an integer."""
    if not is_date:
        return str(int(t))
    stamp = np.asarray([t], dtype=np.int64).view("datetime64[ns]")
    return str(np.datetime_as_string(stamp, unit=datetime_unit(stamp))[0])


def datetime_unit(times: np.ndarray) -> str:
    """The coarsest unit that prints every time exactly ('D' when all are midnight)."""
    ns = times.view(np.int64)
    for unit, size in (("D", DAY_NS), ("s", 10**9), ("ms", 10**6), ("us", 10**3)):
        if not np.any(ns % size):
            return unit
    return "ns"
