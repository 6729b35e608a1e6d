"""``kind: recorded``: forecasts made elsewhere, read from a file and scored like castgrid's own.

A planning system, a pipeline in another language or a spreadsheet process has exported the
forecasts it made; castgrid cannot refit that system, so it reads the forecasts and scores them
on the same (series, origin, step) tasks, with the same metrics, significance tests and
leaderboard, as every forecaster it runs itself.

The file (CSV, gzip CSV or Parquet) has one row per series, origin and forecast step: the
dataset's series key column(s), the origin (the time of the last observation the forecast was
made with), the time forecast (or the number of steps after the origin), the point forecast and,
optionally, the low and high bound of central intervals. :class:`Recorded` declares the
parameters that name those columns.

What this module does, in order (:class:`RecordedSources` drives it from
:func:`runner.pipeline.prepare`):

1. read the file once per candidate and check every row (:func:`read_recorded`): a cell that is
   not a number, an empty cell, a forecast dated at or before its origin, two rows for the same
   (series, origin, time), bounds in the wrong order, or a time off the dataset's grid is a
   :class:`~runner.errors.DataError` naming the file, the line (CSV; the row for Parquet) and the
   column;
2. give the plan its origins when the config says ``windows.origins: from_file``
   (:meth:`RecordedSources.origins`);
3. match the rows to the plan's tasks (:func:`match_plan`): a task with any step missing from the
   file fails with reason ``not-recorded``, so the fair-ranking rule applies to it; rows for
   origins, series or steps the plan does not score are counted in a note and the manifest.

:func:`recorded_forecasts` hands the matched forecasts to the scoring layer. No model task is
ever built for a recorded candidate, and nothing of it is cached: the file is read at every run,
and its fingerprint (SHA-256 of its bytes) goes into the manifest, so ``castgrid diff`` tells a
changed forecasts file from changed data.
"""

from __future__ import annotations

import hashlib
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from runner.config import Config, DatasetConfig, ForecasterSpec
from runner.data import Panel
from runner.data.panel import MISSING_TOKENS, _reason, _Source, _time_text, _to_datetime
from runner.errors import ConfigError, DataError
from runner.forecasters.registry import is_from_file
from runner.windows.axis import TimeAxis, time_axis
from runner.windows.plan import DatasetPlan, Plan

#: Reason of a task whose forecasts the file does not hold (failures.csv).
NOT_RECORDED = "not-recorded"
_SUFFIXES = (".csv", ".csv.gz", ".parquet")
#: How many missing steps a failure message lists before summing up the rest.
_LIST_LIMIT = 6


# ------------------------------------------------------------------------------ the kind


def _name(value: Any, param: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"{param}: expected a column name, got {value!r}")
    return value


class Recorded:
    """Forecasts made elsewhere, read from a file; nothing is fitted.

    Parameters
    ----------
    path:
        The forecasts file: ``.csv``, ``.csv.gz`` or ``.parquet``, relative to the config file
        like a dataset's path.
    dataset:
        The dataset the forecasts are for; needed only when the config has several.
    series_columns:
        The column(s) holding the series key, as in the dataset; default the dataset's
        ``series`` columns (a wide dataset has none: name the file's column holding the series
        name).
    origin_column:
        The time of the last observation each forecast was made with (default ``origin``).
    time_column, step_column:
        Either the time each forecast is for (default: a column named like the dataset's time
        column) or the number of steps after the origin (1 = the first time after it).
    value_column:
        The point forecast (default ``forecast``).
    bounds:
        Central interval bounds per level: ``{80: [low_column, high_column]}``. Each level must
        be one of the config's ``intervals``; a config level the file has no bounds for is
        scored as for a forecaster without intervals (empty interval metrics).
    """

    version = "1"
    uses_covariates = False

    def __init__(
        self,
        path: str,
        dataset: str | None = None,
        series_columns: str | list[str] | None = None,
        origin_column: str = "origin",
        time_column: str | None = None,
        step_column: str | None = None,
        value_column: str = "forecast",
        bounds: dict[Any, list[str]] | None = None,
    ) -> None:
        self.path = path
        self.dataset = dataset
        self.series_columns = series_columns
        self.origin_column = origin_column
        self.time_column = time_column
        self.step_column = step_column
        self.value_column = value_column
        self.bounds = bounds
        self.check()

    def check(self) -> dict[float, tuple[str, str]]:
        """Check every parameter; returns the bound columns per level (ValueError naming the
        parameter otherwise)."""
        if not isinstance(self.path, str) or not self.path.lower().endswith(_SUFFIXES):
            raise ValueError(f"path: expected a .csv, .csv.gz or .parquet file, got {self.path!r}")
        if self.dataset is not None and not isinstance(self.dataset, str):
            raise ValueError(f"dataset: expected a dataset name, got {self.dataset!r}")
        keys = self.series_columns
        if keys is not None:
            if isinstance(keys, str):
                keys = [keys]
            if not isinstance(keys, list) or not keys:
                raise ValueError(
                    f"series_columns: expected a column name or a non-empty list of them, got "
                    f"{self.series_columns!r}"
                )
            for k in keys:
                _name(k, "series_columns")
        _name(self.origin_column, "origin_column")
        _name(self.value_column, "value_column")
        if self.time_column is not None:
            _name(self.time_column, "time_column")
        if self.step_column is not None:
            _name(self.step_column, "step_column")
            if self.time_column is not None:
                raise ValueError("step_column: give time_column or step_column, not both")
        out: dict[float, tuple[str, str]] = {}
        if self.bounds is None:
            return out
        if not isinstance(self.bounds, dict) or not self.bounds:
            raise ValueError(
                f"bounds: expected a mapping of level to [low_column, high_column], got "
                f"{self.bounds!r}"
            )
        for key, cols in self.bounds.items():
            try:
                level = float(key)
            except (TypeError, ValueError):
                level = math.nan
            if isinstance(key, bool) or not 0 < level < 100:
                raise ValueError(f"bounds: expected interval levels between 0 and 100, got {key!r}")
            if (not isinstance(cols, list) or len(cols) != 2
                    or not all(isinstance(c, str) and c.strip() for c in cols)
                    or cols[0] == cols[1]):
                raise ValueError(
                    f"bounds: level {key}: expected [low_column, high_column] (two different "
                    f"column names), got {cols!r}"
                )
            if level in out:
                raise ValueError(f"bounds: level {level:g} is given twice")
            out[level] = (cols[0], cols[1])
        return out


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


def resolve_columns(params: Recorded, ds: DatasetConfig) -> Columns:
    """The columns ``params`` names for dataset ``ds``; ValueError naming the parameter when
    they cannot be resolved or one column serves twice."""
    bounds = params.check()
    keys = params.series_columns
    if keys is None:
        if ds.layout == "wide":
            raise ValueError(
                f"series_columns: dataset {ds.name!r} is wide (its series are columns); name "
                "the file's column that holds the series name"
            )
        keys = ds.series_columns
    keys = [keys] if isinstance(keys, str) else list(keys)
    time = params.time_column
    if time is None and params.step_column is None:
        time = ds.time
    cols = Columns(tuple(keys), params.origin_column, time, params.step_column,
                   params.value_column, bounds)
    seen: dict[str, str] = {}
    for col, role in cols.all():
        if col in seen:
            raise ValueError(f"{role.split('.')[0]}: column {col!r} is also {seen[col]}")
        seen[col] = role
    return cols


# ------------------------------------------------------------------------------ reading


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
                f"the forecast for {_time_text(time_t[i], is_date)} is dated at or before its "
                f'origin {_time_text(origin_t[i], is_date)} (column "{cols.origin}"); a '
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
        raise DataError(f"{label}: cannot read file ({_reason(exc)})") from None
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
        raise DataError(f"{label}: cannot read file ({_reason(exc)})") from None
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
        parsed = _to_datetime(pd.Index(uniques), name, _Source(where.label, wide=False))
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
    what = (f"for {_time_text(when[j], is_date)}" if cols.time is not None
            else f"for step {when[j]}")
    raise DataError(
        f"{where.label}: {where.row(j)}, columns {names}: a second forecast of series "
        f'"{series_text}" made at {_time_text(origin[j], is_date)} {what} (the first is on '
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
            f"{_time_text(t[i], axis.is_date)} is not on the time grid of dataset "
            f"{panel.name!r} ({step}, first time {axis.time_text(0)})",
        )
    return pos.astype(np.int64)


# ------------------------------------------------------------------------------ matching


@dataclass
class RecordedForecasts:
    """A recorded candidate's forecasts on every task of its dataset (task order)."""

    name: str
    dataset: int
    forecaster: int
    path: str
    fingerprint: str
    rows: int
    outside: dict[str, int]
    point: np.ndarray  # (n, H), NaN rows for tasks not recorded
    lower: np.ndarray  # (levels, n, H)
    upper: np.ndarray
    reason: list[str | None]
    message: list[str]

    @property
    def outside_plan(self) -> int:
        """Rows of the file that no task of the plan scores."""
        return sum(self.outside.values())

    def manifest_entry(self, dataset: str) -> dict[str, Any]:
        """What the manifest records of the file."""
        return {"path": self.path, "dataset": dataset, "fingerprint": self.fingerprint,
                "rows": self.rows, "outside_plan": self.outside_plan}

    def note(self) -> str | None:
        """One line counting the rows outside the plan, or None when every row is scored."""
        if not self.outside_plan:
            return None
        parts = [f"{count} {what}" for what, count in self.outside.items() if count]
        return (f"forecasts file {self.path} of {self.name}: {self.outside_plan} of "
                f"{self.rows} rows are outside the plan and not scored ({', '.join(parts)})")


def match_plan(
    rec: RecordedFile, dp: DatasetPlan, horizon: int, levels: tuple[float, ...],
    span: int,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[str | None], list[str], dict[str, int]]:
    """Place the file's rows on the plan's tasks; returns point, lower, upper, reason, message
    and the counts of rows outside the plan."""
    n = dp.n_tasks
    gap = int(dp.test_starts[0] - dp.ends[0]) if n else 0
    evaluated = np.zeros(dp.panel.n_series, dtype=bool)
    evaluated[dp.series] = True
    series_out = (rec.series < 0) | ~evaluated[np.maximum(rec.series, 0)]
    in_axis = (rec.origin >= 0) & (rec.origin < span)
    task_key = dp.series * span + dp.origin
    order = np.argsort(task_key, kind="stable")
    sorted_keys = task_key[order]
    row_key = np.where(series_out | ~in_axis, -1, rec.series * span + rec.origin)
    if n:
        at = np.minimum(np.searchsorted(sorted_keys, row_key), n - 1)
        found = ~series_out & in_axis & (sorted_keys[at] == row_key)
    else:
        at, found = np.zeros(len(row_key), np.int64), np.zeros(len(row_key), bool)
    col = rec.step - gap - 1
    in_block = (col >= 0) & (col < horizon)
    use = found & in_block
    task = order[at[use]]
    point = np.full((n, horizon), np.nan)
    point[task, col[use]] = rec.value[use]
    lower = np.full((len(levels), n, horizon), np.nan)
    upper = np.full((len(levels), n, horizon), np.nan)
    for j in range(len(levels)):
        lower[j, task, col[use]] = rec.lower[j, use]
        upper[j, task, col[use]] = rec.upper[j, use]
    outside = {
        "of series the plan does not evaluate": int(series_out.sum()),
        "at origins the plan does not use": int((~series_out & ~found).sum()),
        "at steps outside the scored block": int((found & ~in_block).sum()),
    }
    reason: list[str | None] = []
    message: list[str] = []
    holes = np.isnan(point)
    for t in range(n):
        if not holes[t].any():
            reason.append(None)
            message.append("")
            continue
        reason.append(NOT_RECORDED)
        message.append(_missing_message(rec.label, dp, t, np.flatnonzero(holes[t]), gap,
                                        horizon))
    return point, lower, upper, reason, message, outside


def _missing_message(
    label: str, dp: DatasetPlan, t: int, missing: np.ndarray, gap: int, horizon: int
) -> str:
    panel = dp.panel
    origin = panel.format_time(np.array([dp.ends[t] - 1]))[0]
    times = panel.format_time(dp.test_starts[t] + missing)
    steps = gap + 1 + missing
    if len(missing) == horizon:
        which = (f"any of its steps {steps[0]}-{steps[-1]} ({times[0]} to {times[-1]})"
                 if horizon > 1 else f"step {steps[0]} ({times[0]})")
    else:
        shown = ", ".join(f"{s} ({tm})" for s, tm in zip(steps[:_LIST_LIMIT], times))
        more = f" and {len(missing) - _LIST_LIMIT} more" if len(missing) > _LIST_LIMIT else ""
        which = f"step{'s' if len(missing) > 1 else ''} {shown}{more}"
    return (f"{label} has no forecast of series {panel.keys[dp.series[t]]!r} made at origin "
            f"{origin} for {which}")


# ------------------------------------------------------------------------------ the run


@dataclass
class _Candidate:
    index: int  # into the plan's forecasters
    spec: ForecasterSpec
    params: Recorded
    location: str  # models[i]
    dataset: str
    file: RecordedFile | None = None
    columns: Columns | None = field(default=None, repr=False)


def _location(cfg: Config, spec: ForecasterSpec) -> str:
    for i, m in enumerate(cfg.models):
        if spec.name == m.name or spec.name.startswith(f"{m.name}["):
            return f"models[{i}]"
    return f"forecaster {spec.name}"


class RecordedSources:
    """The recorded candidates of a run: reads each file once, gives the plan its origins
    (``windows.origins: from_file``) and matches the files to the plan.

    Built by :func:`runner.pipeline.prepare` after the forecasters are checked; raises
    :class:`ConfigError` when the config does not say where the origins are (a recorded
    candidate's forecasts were made at fixed origins: the config lists them, sets
    ``first_origin``, or takes them ``from_file``) or does not say which dataset a file is for.
    """

    def __init__(self, cfg: Config, specs: list[ForecasterSpec], config_path: Path) -> None:
        self.cfg = cfg
        self.source = str(config_path)
        self.base = Path(config_path).parent
        self.levels = tuple(cfg.intervals)
        names = [d.name for d in cfg.datasets]
        self.candidates: list[_Candidate] = []
        for f, spec in enumerate(specs):
            if not is_from_file(spec):
                continue
            loc = _location(cfg, spec)
            where = f"{self.source}: {loc}.params"
            try:
                params = Recorded(**spec.params)
            except (TypeError, ValueError) as exc:
                raise ConfigError(f"{where}: {exc}") from None
            if params.dataset is None and len(names) > 1:
                raise ConfigError(
                    f"{where}.dataset: the config has {len(names)} datasets; name the one the "
                    f"forecasts of {spec.name} are for ({', '.join(names)})"
                )
            if params.dataset is not None and params.dataset not in names:
                raise ConfigError(
                    f"{where}.dataset: {params.dataset!r} is not a dataset of the config "
                    f"({', '.join(names)})"
                )
            for level in params.check():
                if level not in self.levels:
                    asked = (", ".join(f"{v:g}" for v in self.levels) if self.levels
                             else "none")
                    raise ConfigError(
                        f"{where}.bounds: level {level:g} is not one of the config's intervals "
                        f"({asked}); add it to intervals or leave its bounds out"
                    )
            self.candidates.append(
                _Candidate(f, spec, params, loc, params.dataset or names[0])
            )
        w = cfg.windows
        if self.candidates and w.origins is None and w.first_origin is None:
            first = self.candidates[0].spec.name
            raise ConfigError(
                f"{self.source}: windows.origins: the forecasts of {first} (kind recorded) were "
                "made at the origins of its file; set origins: from_file, list the origins, or "
                "set first_origin"
            )

    def _files(self, panel: Panel, axis: TimeAxis) -> list[_Candidate]:
        """The candidates of dataset ``panel``, each file read and checked once."""
        out = []
        ds = next(d for d in self.cfg.datasets if d.name == panel.name)
        for c in self.candidates:
            if c.dataset != panel.name:
                continue
            if c.file is None:
                try:
                    c.columns = resolve_columns(c.params, ds)
                except ValueError as exc:
                    raise ConfigError(f"{self.source}: {c.location}.params.{exc}") from None
                path = Path(c.params.path).expanduser()
                if not path.is_absolute():
                    path = self.base / path
                c.file = read_recorded(path, c.params.path, c.columns, panel, axis, self.levels)
            out.append(c)
        return out

    def origins(self, panel: Panel, axis: TimeAxis) -> np.ndarray | None:
        """The origins (positions on the axis) of the files for dataset ``panel``, or None when
        it has no recorded candidate. Origins before the axis or past its end are left out."""
        found = self._files(panel, axis)
        if not found:
            return None
        both = np.concatenate([c.file.origin for c in found if c.file is not None])
        return np.unique(both[(both >= 0) & (both < axis.span)])

    def attach(self, plan: Plan) -> None:
        """Match every file to the plan: forecasts per task in ``plan.recorded``, a note per
        file with rows outside the plan; a candidate applies to its own dataset only."""
        horizon = plan.config.horizon
        for d, dp in enumerate(plan.datasets):
            mine = {c.index for c in self.candidates if c.dataset == dp.panel.name}
            theirs = {c.index for c in self.candidates} - mine
            dp.forecasters = [f for f in dp.forecasters if f not in theirs]
            if not mine:
                continue
            axis = time_axis(dp.panel)
            for c in self._files(dp.panel, axis):
                assert c.file is not None
                point, lower, upper, reason, message, outside = match_plan(
                    c.file, dp, horizon, self.levels, axis.span
                )
                rec = RecordedForecasts(
                    c.spec.name, d, c.index, c.params.path, c.file.fingerprint, c.file.rows,
                    outside, point, lower, upper, reason, message,
                )
                plan.recorded[c.spec.name] = rec
                note = rec.note()
                if note is not None and note not in dp.panel.notes:
                    dp.panel.notes.append(note)


def recorded_forecasts(plan: Plan) -> list[RecordedForecasts]:
    """The forecasts of every recorded candidate of ``plan`` (read now if the plan was built
    without :func:`runner.pipeline.prepare`)."""
    wanted = [s.name for s in plan.forecasters if is_from_file(s)]
    if any(name not in plan.recorded for name in wanted):
        RecordedSources(plan.config, plan.forecasters, plan.config_path).attach(plan)
    return [plan.recorded[name] for name in wanted]


def manifest_entries(plan: Plan) -> dict[str, dict[str, Any]]:
    """``recorded`` of the manifest: per recorded candidate, its file's path (as the config
    writes it), dataset, fingerprint, rows and rows outside the plan."""
    return {
        name: rec.manifest_entry(plan.datasets[rec.dataset].panel.name)
        for name, rec in sorted(plan.recorded.items())
    }
