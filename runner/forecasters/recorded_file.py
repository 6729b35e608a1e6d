"""Reading a recorded candidate's forecasts file and checking every row against its dataset.

The file (CSV, gzip CSV or Parquet) has one row per series, origin and forecast step; the
columns it is read by are :class:`Columns` (resolved from the candidate's parameters by
:func:`runner.forecasters.recorded.resolve_columns`). A cell that is not a number, an empty
cell, a forecast dated at or before its origin, two rows for the same (series, origin, time),
bounds in the wrong order, or a time off the dataset's grid is a
:class:`~runner.errors.DataError` naming the file, the line (CSV; the row for Parquet) and the
column. Times are parsed as the dataset loader parses them (:mod:`runner.data.columns`).
"""

from __future__ import annotations

import hashlib
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from runner.data import Panel
from runner.data.columns import parse_datetimes
from runner.data.files import MISSING_TOKENS
from runner.data.messages import read_error_text
from runner.data.panel import time_text
from runner.errors import DataError
from runner.windows.axis import TimeAxis


@dataclass(frozen=True)
class Columns:
    """The file's columns for one dataset, every default resolved."""

    keys: tuple[str, ...]
    origin: str
    time: str | None
    step: str | None
    value: str
    bounds: dict[float, tuple[str, str]]

    def all(self) -> list[tuple[str, str]]:
        """(column, what it is for) of every column read, in the order they are checked."""
        out = [(k, "series_columns") for k in self.keys] + [(self.origin, "origin_column")]
        out += [(self.time, "time_column")] if self.time else [(self.step or "", "step_column")]
        out += [(self.value, "value_column")]
        for level, (lo, hi) in self.bounds.items():
            out += [(lo, f"bounds.{level:g}"), (hi, f"bounds.{level:g}")]
        return out


@dataclass
class RecordedFile:
    """One forecasts file, read and checked against one dataset: one entry per row.

    ``series`` indexes the panel's series (-1: a series the dataset does not have); ``origin``
    is the origin's position on the dataset's time axis (it may lie outside the axis) and
    ``step`` counts steps after it (1 = the first time after the origin). ``lower`` and
    ``upper`` have one row per interval level of the config (NaN for a level without bounds).
    """

    label: str
    fingerprint: str
    rows: int
    series: np.ndarray
    origin: np.ndarray
    step: np.ndarray
    value: np.ndarray
    lower: np.ndarray
    upper: np.ndarray


def file_fingerprint(path: Path) -> str:
    """SHA-256 of the file's bytes: any change to the file, however small, changes it."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


class _Where:
    """Names a row of the file in messages: ``line N`` of a CSV file (the header is line 1, as
    a text editor counts) or ``row N`` of a Parquet file."""

    def __init__(self, label: str, csv: bool) -> None:
        self.label = label
        self.csv = csv

    def row(self, i: int) -> str:
        return f"line {i + 2}" if self.csv else f"row {i + 1}"

    def fail(self, i: int, column: str, message: str) -> DataError:
        return DataError(f'{self.label}: {self.row(i)}, column "{column}": {message}')


def read_recorded(
    path: Path, label: str, cols: Columns, panel: Panel, axis: TimeAxis,
    levels: tuple[float, ...],
) -> RecordedFile:
    """Read the forecasts file at ``path`` (``label`` as the config writes it) and check every
    row against dataset ``panel``; raises :class:`DataError` at the first bad cell."""
    kind = "parquet" if path.name.lower().endswith(".parquet") else "csv"
    if not path.exists():
        raise DataError(f"{label}: file not found (looked for {path.resolve()})")
    if not path.is_file():
        raise DataError(f"{label}: expected a file, found a folder")
    where = _Where(label, kind == "csv")
    frame = _read_frame(path, label, cols, kind)
    n = len(frame)
    is_date = panel.times.dtype.kind == "M"
    series, key = _series_index(frame, cols.keys, panel, where)
    origin_t = _times(frame[cols.origin], cols.origin, is_date, panel.name, where)
    if cols.time is not None:
        time_t = _times(frame[cols.time], cols.time, is_date, panel.name, where)
        early = np.flatnonzero(time_t <= origin_t)
        if len(early):
            i = int(early[0])
            raise where.fail(
                i, cols.time,
                f"the forecast for {time_text(time_t[i], is_date)} is dated at or before its "
                f'origin {time_text(origin_t[i], is_date)} (column "{cols.origin}"); a '
                "forecast must be for a time after the origin it was made at",
            )
    else:
        assert cols.step is not None
        steps = _whole_numbers(frame[cols.step], cols.step, where)
        early = np.flatnonzero(steps < 1)
        if len(early):
            i = int(early[0])
            raise where.fail(
                i, cols.step,
                f"step {steps[i]} is at or before the origin; steps count from 1, the first time "
                "after the origin",
            )
    value = _numbers(frame[cols.value], cols.value, where)
    lower = np.full((len(levels), n), np.nan)
    upper = np.full((len(levels), n), np.nan)
    for j, level in enumerate(levels):
        if level not in cols.bounds:
            continue
        lo_col, hi_col = cols.bounds[level]
        lower[j] = _numbers(frame[lo_col], lo_col, where)
        upper[j] = _numbers(frame[hi_col], hi_col, where)
        reversed_ = np.flatnonzero(lower[j] > upper[j])
        if len(reversed_):
            i = int(reversed_[0])
            raise where.fail(
                i, lo_col,
                f"the low bound {lower[j, i]:g} of the {level:g}% interval is above its high "
                f'bound {upper[j, i]:g} (column "{hi_col}")',
            )
    when = time_t if cols.time is not None else steps
    _reject_duplicates(frame, cols, key, origin_t, when, where, is_date)
    origin = _positions(origin_t, axis, panel, cols.origin, where)
    if cols.time is not None:
        step = _positions(time_t, axis, panel, cols.time, where) - origin
    else:
        step = steps
    return RecordedFile(label, file_fingerprint(path), n, series, origin, step, value, lower,
                        upper)


def _read_frame(path: Path, label: str, cols: Columns, kind: str) -> pd.DataFrame:
    try:
        if kind == "parquet":
            import pyarrow.parquet as pq

            header = [str(c) for c in pq.read_schema(path).names]
        else:
            header = [str(c) for c in pd.read_csv(path, nrows=0).columns]
    except pd.errors.EmptyDataError:
        raise DataError(f"{label}: the file is empty") from None
    except Exception as exc:  # any reader failure at this boundary is a bad file
        raise DataError(f"{label}: cannot read file ({read_error_text(exc)})") from None
    shown = ", ".join(header[:20]) + (f", ... ({len(header)} columns)" if len(header) > 20 else "")
    for col, param in cols.all():
        if col not in header:
            at = "line 1 (header), " if kind == "csv" else ""
            raise DataError(
                f'{label}: {at}column "{col}" not found (columns: {shown}); the recorded '
                f"candidate's {param} names it"
            )
    needed = list(dict.fromkeys(c for c, _ in cols.all()))
    try:
        if kind == "parquet":
            frame = pd.read_parquet(path, columns=needed, engine="pyarrow")
        else:
            numeric = [c for c in needed if c not in cols.keys]
            frame = pd.read_csv(
                path, usecols=needed, dtype={c: str for c in cols.keys},
                keep_default_na=False, na_values={c: MISSING_TOKENS for c in numeric},
                # a blank line stays a row, so that row i is always line i + 2 of the file
                skip_blank_lines=False, low_memory=False,
            )
    except Exception as exc:  # malformed rows, truncated gzip, damaged parquet, bad encoding
        raise DataError(f"{label}: cannot read file ({read_error_text(exc)})") from None
    if kind == "csv" and len(frame):
        # blank lines at the end of a file are no rows; a blank line inside it is one (an error)
        blank = (frame.isna() | (frame == "")).all(axis=1).to_numpy()
        trailing = len(blank) if blank.all() else int(np.argmin(blank[::-1]))
        frame = frame.iloc[: len(blank) - trailing]
    if len(frame) == 0:
        raise DataError(f"{label}: no data rows")
    return frame


def _series_index(
    frame: pd.DataFrame, keys: tuple[str, ...], panel: Panel, where: _Where
) -> tuple[np.ndarray, np.ndarray]:
    """Each row's series as an index into ``panel.keys`` (-1: not a series of the dataset), and
    a code per distinct key of the file.

    Keys are matched as the dataset loader names series: each key cell as text, several key
    columns joined with ``/``.
    """
    codes_per_col, names_per_col = [], []
    for col in keys:
        codes, uniques = pd.factorize(frame[col], use_na_sentinel=True)
        names = np.asarray(pd.Index(uniques).astype(str), dtype=object)
        empty = codes < 0
        if len(names):
            empty |= names[np.maximum(codes, 0)] == ""
        if empty.any():
            raise where.fail(int(np.argmax(empty)), col,
                             "empty series key; every row needs the series it forecasts")
        codes_per_col.append(codes)
        names_per_col.append(names)
    if len(keys) == 1:
        combo, uniques_text = codes_per_col[0], names_per_col[0]
    else:
        stacked = np.column_stack(codes_per_col)
        rows_u, combo = np.unique(stacked, axis=0, return_inverse=True)
        uniques_text = np.array(
            ["/".join(str(names_per_col[j][r[j]]) for j in range(len(keys))) for r in rows_u],
            dtype=object,
        )
    lookup = {k: i for i, k in enumerate(panel.keys)}
    index = np.array([lookup.get(str(k), -1) for k in uniques_text], dtype=np.int64)
    combo = np.asarray(combo, dtype=np.int64).ravel()
    return index[combo], combo


def _times(
    col: pd.Series, name: str, is_date: bool, dataset: str, where: _Where
) -> np.ndarray:
    """A time column as int64 (nanoseconds for dates), of the same kind as the dataset's."""
    missing = col.isna().to_numpy()
    if missing.any():
        raise where.fail(int(np.argmax(missing)), name, "empty time")
    kind_text = "dates" if is_date else "whole numbers"
    wrong = f"expected {kind_text}, like the times of dataset {dataset!r}"
    dtype = col.dtype
    if pd.api.types.is_bool_dtype(dtype):
        raise where.fail(0, name, f"{wrong}, got {col.iloc[0]!r}")
    if not is_date:
        if pd.api.types.is_datetime64_any_dtype(dtype):
            raise where.fail(0, name, f"{wrong}, got {col.iloc[0]}")
        x = pd.to_numeric(col, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
        bad = ~np.isfinite(x) | (x != np.round(x))
        if bad.any():
            i = int(np.argmax(bad))
            raise where.fail(i, name, f'{wrong}, got "{col.iloc[i]}"')
        return x.astype(np.int64)
    if pd.api.types.is_numeric_dtype(dtype):
        raise where.fail(0, name, f"{wrong}, got {col.iloc[0]!r}")
    if pd.api.types.is_datetime64_any_dtype(dtype):
        idx = pd.DatetimeIndex(col)
    else:
        codes, uniques = pd.factorize(col)
        parsed = parse_datetimes(pd.Index(uniques), where.label, name)
        bad = parsed.isna()
        if bad.any():
            i = int(np.argmax(bad[codes]))
            raise where.fail(i, name, f'{wrong}, got "{col.iloc[i]}"')
        idx = parsed[codes]
    if idx.tz is not None:  # as the dataset loader does: times with a zone are read in UTC
        idx = idx.tz_convert("UTC").tz_localize(None)
    try:
        return idx.as_unit("ns").asi8.astype(np.int64, copy=False)
    except (pd.errors.OutOfBoundsDatetime, OverflowError):
        raise DataError(
            f'{where.label}: column "{name}": dates must lie between 1677 and 2262'
        ) from None


def _numbers(col: pd.Series, name: str, where: _Where) -> np.ndarray:
    """A forecast or bound column as float64: every cell a finite number."""
    if pd.api.types.is_datetime64_any_dtype(col.dtype):
        raise where.fail(0, name, f"expected a number, got the date {col.iloc[0]}")
    if pd.api.types.is_bool_dtype(col.dtype):
        raise where.fail(0, name, f"expected a number, got {col.iloc[0]!r}")
    if pd.api.types.is_numeric_dtype(col.dtype):
        out = col.to_numpy(dtype=np.float64, na_value=np.nan)
    else:
        out = pd.to_numeric(col, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
        bad = np.isnan(out) & col.notna().to_numpy()
        if bad.any():
            i = int(np.argmax(bad))
            raise where.fail(i, name, f'expected a number, got "{col.iloc[i]}"')
    empty = np.isnan(out)
    if empty.any():
        raise where.fail(
            int(np.argmax(empty)), name,
            "expected a number, got an empty cell (leave out the row of a forecast that was "
            "not made: its task is then recorded as failed)",
        )
    inf = np.isinf(out)
    if inf.any():
        i = int(np.argmax(inf))
        raise where.fail(i, name, f"expected a finite number, got {out[i]}")
    return out


def _whole_numbers(col: pd.Series, name: str, where: _Where) -> np.ndarray:
    x = pd.to_numeric(col, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
    bad = ~np.isfinite(x) | (x != np.round(x))
    if bad.any():
        i = int(np.argmax(bad))
        got = "an empty cell" if pd.isna(col.iloc[i]) else f'"{col.iloc[i]}"'
        raise where.fail(i, name, f"expected a whole number of steps, got {got}")
    return x.astype(np.int64)


def _reject_duplicates(
    frame: pd.DataFrame, cols: Columns, key: np.ndarray, origin: np.ndarray,
    when: np.ndarray, where: _Where, is_date: bool,
) -> None:
    """Two rows for one (series, origin, time or step) make the forecast ambiguous."""
    table = pd.DataFrame({"k": key, "o": origin, "w": when})
    later = table.duplicated(keep="first").to_numpy()
    if not later.any():
        return
    j = int(np.argmax(later))
    same = (key == key[j]) & (origin == origin[j]) & (when == when[j])
    i = int(np.argmax(same))
    names = ", ".join(f'"{c}"' for c in (*cols.keys, cols.origin, cols.time or cols.step))
    series_text = "/".join(str(frame[c].iat[j]) for c in cols.keys)
    what = (f"for {time_text(when[j], is_date)}" if cols.time is not None
            else f"for step {when[j]}")
    raise DataError(
        f"{where.label}: {where.row(j)}, columns {names}: a second forecast of series "
        f'"{series_text}" made at {time_text(origin[j], is_date)} {what} (the first is on '
        f"{where.row(i)})"
    )


def _positions(
    t: np.ndarray, axis: TimeAxis, panel: Panel, name: str, where: _Where
) -> np.ndarray:
    """Positions of times on the dataset's time axis, extended before its first time and past
    its last; a time between two steps of the axis is a :class:`DataError`."""
    if axis.grid is None:  # fixed-length steps: whole numbers, hours, days
        rel = t - axis.first
        pos, off = rel // axis.unit, rel % axis.unit != 0
    else:  # a calendar frequency: the grid of its timestamps, extended both ways
        from pandas.tseries.frequencies import to_offset

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            offset = to_offset(panel.frequency)
        grid = axis.grid
        first, last = pd.Timestamp(int(grid[0])), pd.Timestamp(int(grid[-1]))
        before = after = np.empty(0, np.int64)
        lo, hi = int(t.min()), int(t.max())
        if lo < grid[0]:
            k = len(pd.date_range(start=pd.Timestamp(lo), end=first, freq=offset)) + 2
            before = pd.date_range(end=first, periods=k, freq=offset, unit="ns").asi8[:-1]
        if hi > grid[-1]:
            k = len(pd.date_range(start=last, end=pd.Timestamp(hi), freq=offset)) + 2
            after = pd.date_range(start=last, periods=k, freq=offset, unit="ns").asi8[1:]
        full = np.concatenate([before, grid, after]).astype(np.int64)
        at = np.minimum(np.searchsorted(full, t), len(full) - 1)
        off = full[at] != t
        pos = at - len(before)
    if off.any():
        i = int(np.argmax(off))
        step = f"frequency {panel.frequency}" if panel.frequency else f"step {axis.unit}"
        raise where.fail(
            i, name,
            f"{time_text(t[i], axis.is_date)} is not on the time grid of dataset "
            f"{panel.name!r} ({step}, first time {axis.time_text(0)})",
        )
    return pos.astype(np.int64)
