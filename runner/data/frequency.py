"""A dataset's frequency (given in the config or inferred from its dates) and season length.

Frequencies are pandas offset aliases; the aliases older pandas accepted (``M``, ``Q``, ``H``)
are read as their current names, with a notice.
"""

from __future__ import annotations

import re
import warnings

import numpy as np
import pandas as pd
import pandas.tseries.offsets as poff
from pandas.tseries.frequencies import to_offset

from runner.config import DatasetConfig
from runner.data.messages import Source, shown
from runner.data.rows import Rows

#: Offset aliases older pandas accepted and pandas 3 rejects, mapped to their current names.
_LEGACY_ALIASES = {
    "M": "ME", "Q": "QE", "Y": "YE", "A": "YE", "BM": "BME", "BQ": "BQE", "BY": "BYE",
    "BA": "BYE", "AS": "YS", "BAS": "BYS", "SM": "SME", "CBM": "CBME", "H": "h", "BH": "bh",
    "CBH": "cbh", "T": "min", "S": "s", "L": "ms", "U": "us", "N": "ns",
}  # fmt: skip
_ALIAS = re.compile(r"^(\d*)([A-Za-z]+)(-[A-Za-z0-9]+)?$")

#: Customary season length per offset type (observations per natural cycle; common practice).
_SEASONS: tuple[tuple[type, int], ...] = (
    (poff.Hour, 24),
    (poff.BusinessDay, 5),
    (poff.Day, 7),
    (poff.Week, 52),
    (poff.MonthBegin, 12),
    (poff.MonthEnd, 12),
    (poff.BusinessMonthBegin, 12),
    (poff.BusinessMonthEnd, 12),
    (poff.SemiMonthBegin, 24),
    (poff.SemiMonthEnd, 24),
    (poff.QuarterBegin, 4),
    (poff.QuarterEnd, 4),
    (poff.BQuarterBegin, 4),
    (poff.BQuarterEnd, 4),
    (poff.YearBegin, 1),
    (poff.YearEnd, 1),
    (poff.BYearBegin, 1),
    (poff.BYearEnd, 1),
)
_YEARLY = (poff.YearBegin, poff.YearEnd, poff.BYearBegin, poff.BYearEnd)


def parse_frequency(text: str, src: Source) -> poff.BaseOffset:
    """The config's ``frequency`` as a pandas offset; an alias older pandas accepted is read
    as its current name (with a notice), anything else is a ConfigError."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            return to_offset(text)
    except (ValueError, TypeError):
        pass
    m = _ALIAS.match(text.strip())
    if m and m.group(2) in _LEGACY_ALIASES:
        modern = f"{m.group(1)}{_LEGACY_ALIASES[m.group(2)]}{m.group(3) or ''}"
        try:
            offset = to_offset(modern)
        except (ValueError, TypeError):
            pass
        else:
            src.notes.append(f'frequency "{text}" read as "{modern}" (its current pandas name)')
            return offset
    raise src.config_fail(
        "frequency",
        "expected a pandas offset alias such as D, B, W-SUN, MS, ME, QS, YS or h, got "
        f'"{shown(text, 40)}"',
    )


def _infer(times: np.ndarray) -> poff.BaseOffset | None:
    if len(times) < 3:
        return None
    idx = pd.DatetimeIndex(times.view("datetime64[ns]"))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            found = pd.infer_freq(idx)
        except (ValueError, TypeError):
            return None
    return None if found is None else to_offset(found)


def infer_frequency(
    rows: Rows, counts: np.ndarray, ds: DatasetConfig, src: Source
) -> poff.BaseOffset:
    """The frequency of the dates in ``rows``, or a DataError asking for ``frequency``."""
    # The longest series usually shows the frequency; when it has a gap, the union of all
    # times often still is regular (other series cover the hole).
    i = int(np.argmax(counts))
    offset = _infer(rows.t[rows.offsets[i] : rows.offsets[i + 1]])
    if offset is None:
        offset = _infer(np.unique(rows.t))
    if offset is None:
        raise src.fail(
            f'column "{ds.time}": cannot infer the frequency ({src.series(rows.keys[i])}, the '
            f"longest, has irregular or too few times); set frequency"
        )
    return offset


def resolve_season(
    ds: DatasetConfig, default: int | None, frequency: str | None, is_date: bool, src: Source
) -> int:
    """The season length: the dataset's ``season``, else the config's, else the customary
    one of the frequency (:func:`season_for_frequency`); a DataError when there is none."""
    if ds.season is not None:
        return int(ds.season)
    if default is not None:
        return int(default)
    if not is_date or frequency is None:
        raise src.fail(
            f'column "{ds.time}" holds whole numbers, so the season length is unknown; set '
            f"season (1 for none)"
        )
    season = season_for_frequency(frequency)
    if season is None:
        raise src.fail(
            f"frequency {frequency} has no customary season length; set season (1 for none)"
        )
    return season


def season_for_frequency(frequency: str) -> int | None:
    """The customary season length of a pandas frequency, or None when there is none.

    Observations per natural cycle (common practice): hourly 24 (a day), daily 7 and business
    daily 5 (a week), weekly 52, semi-monthly 24, monthly 12, quarterly 4 (a year), yearly 1.
    A multiple divides the cycle when that leaves more than one step per cycle (``3MS``: 4,
    ``2h``: 12); other multiples (``7D``), minutes and finer have none. ``frequency`` must be
    a current pandas alias (``ValueError`` otherwise).
    """
    offset = to_offset(frequency)
    for cls, season in _SEASONS:
        if type(offset) is cls:
            n = abs(int(offset.n))
            if isinstance(offset, _YEARLY):
                return 1
            if n == 1:
                return season
            return season // n if season % n == 0 and season // n > 1 else None
    return None
