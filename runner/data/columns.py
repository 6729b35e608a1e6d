"""From the file's columns to flat arrays: series ids, times, target values and covariates.

A long file has one row per (series, time); a wide file one row per time and one column per
series. Either way the result is one :class:`~runner.data.rows.Rows`: a series id per row (keys
sorted as strings), times as int64 (nanoseconds for dates), values as float64, and the 1-based
row of each cell in the file, so that every later error can point into the file. The work is on
whole columns, never one pandas call per series.
"""

from __future__ import annotations

import math
import warnings
from collections import Counter

import numpy as np
import pandas as pd

from runner.config import DatasetConfig
from runner.data.messages import Source, shown
from runner.data.panel import time_text
from runner.data.rows import Rows

#: Whole-number times must stay within this, so that the difference of two fits in int64.
_INT_TIME_LIMIT = 2.0**62


def long_rows(frame: pd.DataFrame, ds: DatasetConfig, src: Source) -> Rows:
    """A long table (one row per series and time) as flat rows, in file order."""
    n = len(frame)
    sid, keys = _series_ids(frame, ds.series_columns, src)
    # each column leaves the frame once it is converted: a large file is not held twice
    for col in ds.series_columns:
        del frame[col]
    t, is_date = _parse_times(frame.pop(ds.time), ds.time, src)
    v = _numeric(frame.pop(ds.target), ds.target, src)
    cov = None
    if ds.covariates:
        cov = np.column_stack([_numeric(frame[c], c, src) for c in ds.covariates])
    row = np.arange(1, n + 1, dtype=np.int32 if n < 2**31 else np.int64)
    return Rows(sid=sid, t=t, v=v, cov=cov, row=row, keys=keys, is_date=is_date)


def _series_ids(
    frame: pd.DataFrame, columns: list[str], src: Source
) -> tuple[np.ndarray, list[str]]:
    """Series id per row and the sorted keys (string order of the key tuple)."""
    codes_per_col, names_per_col = [], []
    for col in columns:
        codes, uniques = pd.factorize(frame[col], use_na_sentinel=True)
        names = np.asarray(pd.Index(uniques).astype(str), dtype=object)
        empty = codes < 0
        blank = np.flatnonzero(names == "")  # looked up among the names, not per row
        if len(blank):
            empty |= np.isin(codes, blank)
        if empty.any():
            raise src.fail(f'column "{col}": empty series name (row {int(np.argmax(empty)) + 1})')
        order = np.argsort(names.astype(str), kind="stable")
        # int32 codes for up to 2**31 series: half the memory of a row's series id
        rank = np.empty(len(order), dtype=np.int32 if len(order) < 2**31 else np.int64)
        rank[order] = np.arange(len(order))
        codes_per_col.append(rank[codes])
        names_per_col.append(names[order])
    if len(columns) == 1:
        sid, names = codes_per_col[0], names_per_col[0]
        keys = [str(x) for x in names]
    else:
        dims = tuple(len(nm) for nm in names_per_col)
        if math.prod(dims) < 2**62:
            # C-order flat index: sorting it sorts the key tuples, first column first.
            flat = np.ravel_multi_index(tuple(codes_per_col), dims)
            combos, sid = np.unique(flat, return_inverse=True)
            parts = np.unravel_index(combos, dims)
        else:
            stacked = np.column_stack(codes_per_col)
            rows_u, sid = np.unique(stacked, axis=0, return_inverse=True)
            parts = tuple(rows_u[:, j] for j in range(rows_u.shape[1]))
        cols = [names_per_col[j][parts[j]] for j in range(len(columns))]
        keys = ["/".join(str(x) for x in tup) for tup in zip(*cols)]
    sid = np.asarray(sid).ravel()
    if len(set(keys)) != len(keys):
        dup = next(k for k, count in Counter(keys).items() if count > 1)
        raise src.fail(f'series "{dup}": two different series get this name; avoid "/" in keys')
    return sid, keys


def _numeric(col: pd.Series, name: str, src: Source) -> np.ndarray:
    """A value column as float64 (NaN for empty cells); text, dates and infinities rejected."""
    if pd.api.types.is_bool_dtype(col.dtype):
        out = col.to_numpy(dtype=np.float64, na_value=np.nan)
    elif pd.api.types.is_numeric_dtype(col.dtype):
        out = col.to_numpy(dtype=np.float64, na_value=np.nan)
    elif pd.api.types.is_datetime64_any_dtype(col.dtype):
        raise src.fail(f'column "{name}": expected numbers, found dates')
    else:
        out = pd.to_numeric(col, errors="coerce").to_numpy(dtype=np.float64, na_value=np.nan)
        bad = np.isnan(out) & col.notna().to_numpy()
        if bad.any():
            i = int(np.argmax(bad))
            raise src.fail(
                f'column "{name}": expected numbers, found "{shown(col.iloc[i])}" (row {i + 1})'
            )
    inf = np.isinf(out)
    if inf.any():
        i = int(np.argmax(inf))
        raise src.fail(f'column "{name}": expected finite numbers, found {out[i]} (row {i + 1})')
    return out


def _parse_times(col: pd.Series, name: str, src: Source) -> tuple[np.ndarray, bool]:
    """Times as int64 and whether they are dates (nanoseconds since 1970, UTC wall time)."""
    missing = col.isna().to_numpy()
    if missing.any():
        raise src.fail(f'column "{name}": empty time value (row {int(np.argmax(missing)) + 1})')
    dtype = col.dtype
    if pd.api.types.is_bool_dtype(dtype):
        raise src.fail(f'column "{name}": expected dates or whole numbers, found true/false')
    if pd.api.types.is_integer_dtype(dtype) or pd.api.types.is_float_dtype(dtype):
        # Whole numbers within +-2**62, so that differences of two times fit in int64.
        x = col.to_numpy(dtype=np.float64)
        bad = ~np.isfinite(x) | (x != np.round(x)) | (np.abs(x) > _INT_TIME_LIMIT)
        if bad.any():
            i = int(np.argmax(bad))
            limit = " (at most 18 digits)" if np.abs(x[i]) > _INT_TIME_LIMIT else ""
            raise src.fail(
                f'column "{name}": expected dates or whole numbers{limit}, found {col.iloc[i]} '
                f"(row {i + 1})"
            )
        return col.to_numpy(dtype=np.int64), False
    if pd.api.types.is_datetime64_any_dtype(dtype):
        idx = pd.DatetimeIndex(col)
    else:
        # Parse each distinct text once: a monthly panel has 1.2M cells but ~100 dates.
        codes, uniques = pd.factorize(col)
        parsed = parse_datetimes(pd.Index(uniques), src.label, name)
        bad = parsed.isna()
        if bad.any():
            bad_rows = bad[codes]
            i = int(np.argmax(bad_rows))
            raise src.fail(
                f'column "{name}": expected dates, found "{shown(col.iloc[i])}" (row {i + 1})'
            )
        idx = parsed[codes]
    if idx.tz is not None:
        idx = idx.tz_convert("UTC").tz_localize(None)
        src.notes.append(f'column "{name}": times with a time zone were converted to UTC')
    try:
        ns = idx.as_unit("ns")
    except (pd.errors.OutOfBoundsDatetime, OverflowError):
        raise src.fail(f'column "{name}": dates must lie between 1677 and 2262') from None
    return ns.asi8.astype(np.int64, copy=False), True


def parse_datetimes(texts: pd.Index, label: str, column: str) -> pd.DatetimeIndex:
    """Parse distinct time texts of column ``column`` of file ``label``; NaT marks a text that
    does not parse (the caller names its row).

    ISO 8601 first, in any of its variants (``2021-03-01``, ``2021-03-01 05:00:00.5``);
    when the first text is not ISO, the format pandas infers from it applies to all. Raises
    :class:`~runner.errors.DataError` (``label: column "column": ...``) when the texts cannot
    be read as dates at all. The dataset loader and the reader of recorded forecasts both
    use it, so the same text gives the same time in both.

    >>> parse_datetimes(pd.Index(["2021-03-01", "March"]), "a.csv", "month").isna().tolist()
    [False, True]
    """
    with warnings.catch_warnings():
        # pandas warns when it falls back to parsing element by element; that is fine here.
        warnings.simplefilter("ignore", UserWarning)
        try:
            parsed = _coerce_datetimes(texts, "ISO8601")
            if len(parsed) and pd.isna(parsed[0]):
                parsed = _coerce_datetimes(texts, None)
        except (ValueError, TypeError, OverflowError):
            fail = Source(label, wide=False).fail
            raise fail(f'column "{column}": expected dates or whole numbers') from None
    return pd.DatetimeIndex(parsed)


def _coerce_datetimes(texts: pd.Index, fmt: str | None) -> pd.DatetimeIndex:
    try:
        return pd.DatetimeIndex(pd.to_datetime(texts, format=fmt, errors="coerce"))
    except ValueError:
        # Mixed UTC offsets: bring everything to UTC instead.
        return pd.DatetimeIndex(pd.to_datetime(texts, format=fmt, errors="coerce", utc=True))


def wide_rows(frame: pd.DataFrame, ds: DatasetConfig, src: Source) -> Rows:
    """Melt a wide table (time column + one column per series) into flat rows.

    Empty cells before a column's first value and after its last are outside that series (a
    series may start later or end earlier than the table); empty cells inside it are missing
    values.
    """
    t, is_date = _parse_times(frame[ds.time], ds.time, src)
    order = np.argsort(t, kind="stable")
    t = t[order]
    dup = np.flatnonzero(t[1:] == t[:-1])
    if len(dup):
        j = dup[0]
        rows = sorted((int(order[j]) + 1, int(order[j + 1]) + 1))
        raise src.fail(
            f'column "{ds.time}": duplicate time {time_text(t[j], is_date)} '
            f"(rows {rows[0]} and {rows[1]})"
        )
    names = [c for c in frame.columns if c != ds.time]
    keys_sorted = sorted(str(c) for c in names)
    if len(set(keys_sorted)) != len(keys_sorted):
        raise src.fail("two series columns have the same name")
    by_key = {str(c): c for c in names}
    mat = np.column_stack([_numeric(frame[by_key[k]], k, src) for k in keys_sorted])[order]
    has = ~np.isnan(mat)
    empty = ~has.any(axis=0)
    if empty.any():
        raise src.fail(f'column "{keys_sorted[int(np.argmax(empty))]}": no values')
    # Inside a series: at or after its first value and at or before its last.
    inside = np.maximum.accumulate(has, axis=0) & np.maximum.accumulate(has[::-1], axis=0)[::-1]
    col_idx, time_idx = np.nonzero(inside.T)  # column-major: series by series, time ordered
    return Rows(
        sid=col_idx.astype(np.int64),
        t=t[time_idx],
        v=mat[time_idx, col_idx],
        cov=None,
        row=(order[time_idx] + 1).astype(np.int64),
        keys=keys_sorted,
        is_date=is_date,
    )
