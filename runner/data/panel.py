"""Dataset loading: one config ``datasets`` entry becomes a :class:`Panel` of series.

The loader works on flat arrays, never one pandas call per series: a panel of 10,000 series
is 1.2M rows, and a per-series loop would dominate the whole run. The stages, in order:

1. read the file (CSV, gzip CSV or Parquet), only the columns the config names;
2. turn the columns into flat arrays: a series id per row (keys sorted as strings), times
   as int64 (nanoseconds for dates), target values and covariates as float64, and the
   1-based row number of each cell so that every error can point into the file;
3. sort once by (series, time), reject duplicate times;
4. place every time on a step axis (a frequency grid for dates, the common difference for
   integers), check that timestamps fit it and that all series share it;
5. find gaps (missing times) and missing values and apply the ``missing`` policy (``zero``
   fills them with 0 here; ``interpolate`` inserts the missing times and keeps every missing
   value as NaN, filled later within each training slice from that slice's own values);
6. resolve the season length and fingerprint the content.

Every problem raises :class:`~runner.errors.DataError` with one line that names the file (as
written in the config), the column or series, and what was expected.
"""

from __future__ import annotations

import csv
import gzip
import hashlib
import io
import math
import re
import warnings
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pandas.tseries.offsets as poff
from pandas.tseries.frequencies import to_offset

from runner.config import DatasetConfig
from runner.errors import ConfigError, DataError

#: Cell texts read as "no value" in value and time columns (CSV). Key columns keep every text
#: as written, so that a region called "NA" stays a region.
MISSING_TOKENS = ["", "NA", "N/A", "NaN", "nan", "NULL", "null", "None", "#N/A", "<NA>"]

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
_DAY_NS = 86_400 * 10**9
_INT_TIME_LIMIT = 2.0**62
#: How many series a fill notice lists by name before summing up the rest.
_NOTE_LIMIT = 10
_FINGERPRINT_VERSION = b"castgrid-panel-1\0"


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
        return _datetime_unit(self.times) if self.times.dtype.kind == "M" else ""

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


def load_panel(
    ds: DatasetConfig, base_dir: Path, default_season: int | None, *, entry: str | None = None
) -> Panel:
    """Read the dataset ``ds`` and return its :class:`Panel`.

    ``base_dir`` is the folder of the config file (relative dataset paths are relative to it);
    ``default_season`` is the config's top-level ``season``; ``entry`` says where ``ds`` is
    written (``configs/shop.yaml: datasets[0]``), so that a bad setting of the entry itself
    is reported against the config. Raises :class:`~runner.errors.DataError` for every
    problem with the file or its contents, :class:`~runner.errors.ConfigError` for a
    ``frequency`` that is no frequency or does not apply.
    """
    path = Path(ds.path).expanduser()
    if not path.is_absolute():
        path = Path(base_dir) / path
    src = _Source(ds.path, wide=ds.layout == "wide")
    src.entry = f"{entry}." if entry else f'dataset "{ds.name}": '
    # A frequency that is no frequency is the config's problem: say so before reading data.
    offset = None if ds.frequency is None else _parse_frequency(ds.frequency, src)
    frame = _read_table(path, ds, src)
    rows = _wide_rows(frame, ds, src) if ds.layout == "wide" else _long_rows(frame, ds, src)
    del frame
    rows.sort()
    _reject_duplicates(rows, src)
    axis, frequency = _time_axis(rows, ds, offset, src)
    rows = _apply_missing_policy(rows, axis, ds, src)
    season = _resolve_season(ds, default_season, frequency, rows.is_date, src)
    times = rows.t.view("datetime64[ns]") if rows.is_date else rows.t
    values = np.ascontiguousarray(rows.v, dtype=np.float64)
    cov = None if rows.cov is None else np.ascontiguousarray(rows.cov, dtype=np.float64)
    return Panel(
        name=ds.name,
        values=values,
        offsets=rows.offsets,
        keys=rows.keys,
        times=times,
        covariates=cov,
        covariate_names=list(ds.covariates),
        frequency=frequency,
        step=axis.unit if not rows.is_date else 1,
        season=season,
        fingerprint=_fingerprint(rows.keys, rows.offsets, rows.t, rows.is_date, values,
                                 list(ds.covariates), cov),
        path=str(path.resolve()),
        notes=src.notes,
    )  # fmt: skip


# ------------------------------------------------------------------------- shared state


@dataclass
class _Source:
    """How messages name the file and its series; collects notices."""

    label: str
    wide: bool
    notes: list[str] = field(default_factory=list)
    entry: str = ""  # how messages name the config entry: "c.yaml: datasets[0]."

    def fail(self, message: str) -> DataError:
        # One line, whatever the file holds: control characters (a quoted newline, a NUL)
        # are shown escaped.
        return DataError(_CONTROL.sub(_escape, f"{self.label}: {message}"))

    def config_fail(self, key: str, message: str) -> ConfigError:
        return ConfigError(f"{self.entry}{key}: {message}")

    def series(self, key: str) -> str:
        # In a wide file a series *is* a column, so name it the way the user sees it.
        return f'column "{_shown(key)}"' if self.wide else f'series "{_shown(key)}"'


@dataclass
class _Rows:
    """Flat per-row arrays while loading; ``row`` is the 1-based data row in the file (0: a
    row the loader inserted for a missing time)."""

    sid: np.ndarray
    t: np.ndarray
    v: np.ndarray
    cov: np.ndarray | None
    row: np.ndarray
    keys: list[str]
    is_date: bool
    offsets: np.ndarray = field(default_factory=lambda: np.zeros(1, np.int64))

    def sort(self) -> None:
        # Files written in order (series, then time) skip the sort altogether; the check needs
        # no more than two boolean arrays. Otherwise one int64 key (series, dense time rank)
        # sorts 3-4x faster than np.lexsort.
        later = self.sid[1:] > self.sid[:-1]
        later |= (self.sid[1:] == self.sid[:-1]) & (self.t[1:] >= self.t[:-1])
        if not later.all():
            codes, uniques = pd.factorize(self.t)
            rank = np.empty(len(uniques), dtype=np.int64)
            rank[np.argsort(uniques)] = np.arange(len(uniques))
            key = self.sid.astype(np.int64) * len(uniques) + rank[codes]
            order = np.argsort(key)
            self.sid, self.t, self.v, self.row = (
                self.sid[order], self.t[order], self.v[order], self.row[order]
            )  # fmt: skip
            if self.cov is not None:
                self.cov = self.cov[order]
        counts = np.bincount(self.sid, minlength=len(self.keys))
        self.offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)

    def time_text(self, t: int | np.integer) -> str:
        return _time_text(t, self.is_date)


#: Characters that break a line, or that a terminal would act on: shown escaped in messages.
_CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029]")


def _escape(m: re.Match) -> str:
    return repr(m.group(0))[1:-1]


def _shown(text: object, limit: int = 60) -> str:
    """A value from the file as a message shows it: control characters escaped, long text cut."""
    text = _CONTROL.sub(_escape, str(text))
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _time_text(t: int | np.integer, is_date: bool) -> str:
    """One time for a message: an ISO date (or date-time), or an integer."""
    if not is_date:
        return str(int(t))
    stamp = np.asarray([t], dtype=np.int64).view("datetime64[ns]")
    return str(np.datetime_as_string(stamp, unit=_datetime_unit(stamp))[0])


def _datetime_unit(times: np.ndarray) -> str:
    """The coarsest unit that prints every time exactly ('D' when all are midnight)."""
    ns = times.view(np.int64)
    for unit, size in (("D", _DAY_NS), ("s", 10**9), ("ms", 10**6), ("us", 10**3)):
        if not np.any(ns % size):
            return unit
    return "ns"


# ------------------------------------------------------------------------------ reading


def _read_table(path: Path, ds: DatasetConfig, src: _Source) -> pd.DataFrame:
    name = path.name.lower()
    if name.endswith(".parquet"):
        kind = "parquet"
    elif name.endswith(".csv") or name.endswith(".csv.gz"):
        kind = "csv"
    else:
        raise src.fail("expected a .csv, .csv.gz or .parquet file")
    if not path.exists():
        raise src.fail(f"file not found (looked for {path.resolve()})")
    if not path.is_file():
        raise src.fail("expected a file, found a folder")
    try:
        columns = _header(path, kind)
    except Exception as exc:  # any reader failure at this boundary is a bad file
        raise src.fail(f"cannot read file ({_reason(exc)})") from None
    if not columns:
        raise src.fail("file has no columns")
    needed = _needed_columns(ds, columns, src)
    try:
        with _returning_memory(kind):
            if kind == "parquet":
                import pyarrow.parquet as pq

                # a column at a time: the Arrow form of one column, not of the whole file,
                # is held beside the frame being built
                file = pq.ParquetFile(path)
                parts = {c: _to_frame([file.read(columns=[c])], ds, src)[c] for c in needed}
                frame = pd.DataFrame(parts, copy=False)
                del parts
            else:
                read = [_read_csv(path, needed, ds, len(columns), src)]
                frame = _to_frame(read, ds, src)  # takes the table out of the list
    except DataError:
        raise
    except Exception as exc:  # truncated gzip, damaged parquet, bad encoding
        raise src.fail(f"cannot read file ({_reason(exc)})") from None
    if len(frame) == 0:
        raise src.fail("no data rows")
    return frame


@contextmanager
def _returning_memory(kind: str) -> Iterator[None]:
    """Memory a read used goes back to the system when the read is done: Arrow's own pool
    keeps it for later reads, and a file of a million series would keep gigabytes that the
    run needs for the rest. A Parquet read allocates through the C library meanwhile (which
    returns large blocks as they are freed); the CSV reader's many small blocks fare better in
    Arrow's pool, released at the end (measured with tests/perf/bench_baselines.py)."""
    import pyarrow as pa

    before = pa.default_memory_pool()
    if kind == "parquet":
        pa.set_memory_pool(pa.system_memory_pool())
    try:
        yield
    finally:
        pa.set_memory_pool(before)
        before.release_unused()
        _trim_heap()


def _trim_heap() -> None:
    """Give the C library's free heap memory back to the system (glibc keeps the freed
    blocks of a read's many row groups otherwise: hundreds of MiB per 100,000 series). A
    no-op where the C library has no ``malloc_trim``."""
    import ctypes

    try:
        ctypes.CDLL(None).malloc_trim(0)
    except (AttributeError, OSError):
        pass


def _open_text(path: Path) -> io.TextIOBase:
    """The file as text (gzip undone), for the pure-Python header read and row scan."""
    if path.name.lower().endswith(".gz"):
        return gzip.open(path, "rt", encoding="utf-8-sig", newline="")
    return open(path, encoding="utf-8-sig", newline="")


def _header(path: Path, kind: str) -> list[str]:
    """Column names exactly as the file has them (duplicates kept, nothing renamed)."""
    if kind == "parquet":
        import pyarrow.parquet as pq

        return [str(c) for c in pq.read_schema(path).names]
    with _open_text(path) as fh:
        for record in csv.reader(fh):
            if record:  # blank lines before the header are skipped, as the reader does
                return record
    return []


#: pyarrow's message for a row with the wrong number of fields.
_RAGGED = re.compile(r"Expected (\d+) columns, got (\d+)")


def _read_csv(
    path: Path, needed: list[str], ds: DatasetConfig, width: int, src: _Source
) -> Any:
    """Read the ``needed`` columns with pyarrow's CSV reader (multi-threaded, gzip aware).

    Every row must have as many fields as the header: a value written with an unquoted comma
    (``1,234.5``) would otherwise shift or cut the row without a word. Key columns are read as
    text; the missing-value tokens apply to every other column.
    """
    import pyarrow as pa
    import pyarrow.csv as pcsv

    try:
        return pcsv.read_csv(
            path,
            # Quoted values may hold line breaks, as RFC 4180 allows.
            parse_options=pcsv.ParseOptions(newlines_in_values=True),
            convert_options=pcsv.ConvertOptions(
                include_columns=needed,
                # text, dictionary-encoded: each key is held once however many its rows
                column_types={c: pa.dictionary(pa.int32(), pa.string())
                              for c in ds.series_columns},
                null_values=MISSING_TOKENS,
                # Key columns keep every text ("NA" is a region); other text columns get
                # their missing tokens nulled in _to_frame.
                strings_can_be_null=False,
            ),
        )
    except pa.ArrowInvalid as exc:
        # Not an invalid_row_handler: pyarrow decodes the row's text before calling it, and a
        # row that is not UTF-8 would print a stray traceback from inside pyarrow.
        m = _RAGGED.search(str(exc))
        if m is None:
            raise
        raise _ragged_row(path, width, int(m.group(2)), src) from None


def _ragged_row(path: Path, width: int, found: int, src: _Source) -> DataError:
    """The error for a row whose field count differs from the header's, naming its line.

    pyarrow reports the row but (reading in parallel) not where it is; a scan with Python's
    csv module finds the first such line. It only runs on this error path.
    """
    line, text = None, ""
    try:
        with _open_text(path) as fh:
            reader = csv.reader(fh)
            header_seen = False
            for record in reader:
                if not record:
                    continue
                if not header_seen:
                    header_seen = True
                elif len(record) != width:
                    line, found, text = reader.line_num, len(record), ",".join(record)
                    break
    except (csv.Error, OSError, UnicodeDecodeError, EOFError):
        pass
    where = f'line {line} ("{_shown(text)}")' if line is not None else "a row"
    hint = "; quote values that contain commas" if found > width else ""
    return src.fail(f"{where}: expected {width} fields as in the header, found {found}{hint}")


def _type_problem(t: Any, role: str) -> str | None:
    """Why a column of pyarrow type ``t`` cannot serve as ``role``, or None when it can.

    Nested and binary types (Parquet lists, structs, raw bytes) never can; a time column
    holds dates, date-times, whole numbers or text; a value column numbers, true/false or text
    (text is then parsed, and any that is not a number is reported with its row).
    """
    import pyarrow as pa

    types = pa.types
    if types.is_binary(t) or types.is_large_binary(t):
        return "not UTF-8 text"
    text = types.is_string(t) or types.is_large_string(t) or types.is_null(t)
    number = types.is_integer(t) or types.is_floating(t)
    if role == "series":
        ok = not types.is_nested(t)
    elif role == "time":
        ok = text or number or types.is_timestamp(t) or types.is_date(t) or types.is_boolean(t)
    else:
        ok = text or number or types.is_boolean(t) or types.is_decimal(t)
        # Dates in a value column get their own message from _numeric.
        ok = ok or types.is_timestamp(t) or types.is_date(t)
    if ok:
        return None
    expected = {"series": "text or numbers", "time": "dates or whole numbers"}.get(role, "numbers")
    found = "times of day without a date" if types.is_time(t) else f"values of type {t}"
    return f"expected {expected}, found {found}"


def _to_frame(read: list[Any], ds: DatasetConfig, src: _Source) -> pd.DataFrame:
    """A pyarrow table as a DataFrame the loader's array stages accept, types checked first.

    Dictionary columns are decoded, decimals become floats, dates become datetimes, and the
    missing-value tokens in text columns (other than key columns) become nulls.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    table = read.pop()
    keys = set(ds.series_columns)
    tokens = pa.array(MISSING_TOKENS, type=pa.string())
    arrays = []
    for name, col in zip(table.column_names, table.columns):
        role = "series" if name in keys else "time" if name == ds.time else "value"
        if pa.types.is_dictionary(col.type) and not (
                role == "series" and pa.types.is_string(col.type.value_type)):
            col = col.cast(col.type.value_type)
        # a key column of text stays dictionary-encoded (a pandas Categorical): its names are
        # held once, not once per row (a million series of 120 rows)
        problem = _type_problem(col.type.value_type if pa.types.is_dictionary(col.type)
                                else col.type, role)
        if problem is not None:
            raise src.fail(f'column "{name}": {problem}')
        if pa.types.is_decimal(col.type):
            col = col.cast(pa.float64())
        elif pa.types.is_large_string(col.type):
            col = col.cast(pa.string())
        if role != "series" and pa.types.is_string(col.type):
            col = pc.if_else(pc.is_in(col, value_set=tokens), pa.scalar(None, pa.string()), col)
        arrays.append(col)
    table = pa.table(arrays, names=table.column_names)
    del arrays
    # date_as_object=False: dates become datetime64, not Python date objects. The Arrow
    # columns are released as they are converted, and not consolidated into one block: for a
    # large file, the table and the frame are never both held whole.
    return table.to_pandas(date_as_object=False, ignore_metadata=True, split_blocks=True,
                           self_destruct=True)


def _reason(exc: Exception) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    if isinstance(exc, UnicodeDecodeError) or "invalid UTF8" in text:
        text = "not UTF-8 text"
    return text if len(text) <= 160 else text[:157] + "..."


def _needed_columns(ds: DatasetConfig, columns: list[str], src: _Source) -> list[str]:
    if ds.layout == "wide":
        wanted = [ds.time]
    else:
        wanted = [*ds.series_columns, ds.time, ds.target, *ds.covariates]
    roles: dict[str, str] = {}
    labelled = [(c, "series") for c in ds.series_columns] + [(ds.time, "time")]
    if ds.layout == "long":
        labelled += [(ds.target, "target")] + [(c, "covariate") for c in ds.covariates]
    for col, role in labelled:
        if col in roles:
            raise src.fail(f'column "{col}" is used twice (as {roles[col]} and as {role})')
        roles[col] = role
    shown = ", ".join(_shown(c, 40) for c in columns[:20]) + (
        f", ... ({len(columns)} columns)" if len(columns) > 20 else ""
    )
    for col in wanted:
        if col not in columns:
            raise src.fail(f'column "{col}" not found (columns: {shown})')
    # Two columns of one name: whichever one a reader picked, the other would be ignored
    # without a word (a flag column scored as the target). Every column of a wide file is used.
    at: dict[str, list[int]] = {}
    for i, col in enumerate(columns, 1):
        at.setdefault(col, []).append(i)
    for col in columns if ds.layout == "wide" else wanted:
        if len(at[col]) > 1:
            places = ", ".join(str(i) for i in at[col])
            raise src.fail(
                f'column "{col}" appears {len(at[col])} times in the header (columns {places}); '
                "rename or drop all but one"
            )
    if ds.layout == "wide":
        if len(columns) < 2:
            raise src.fail(f'layout wide needs series columns besides "{ds.time}"')
        return list(columns)
    return list(wanted)


# --------------------------------------------------------------------- columns to arrays


def _long_rows(frame: pd.DataFrame, ds: DatasetConfig, src: _Source) -> _Rows:
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
    return _Rows(sid=sid, t=t, v=v, cov=cov, row=row, keys=keys, is_date=is_date)


def _series_ids(
    frame: pd.DataFrame, columns: list[str], src: _Source
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


def _numeric(col: pd.Series, name: str, src: _Source) -> np.ndarray:
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
                f'column "{name}": expected numbers, found "{_shown(col.iloc[i])}" '
                f"(row {i + 1})"
            )
    inf = np.isinf(out)
    if inf.any():
        i = int(np.argmax(inf))
        raise src.fail(f'column "{name}": expected finite numbers, found {out[i]} (row {i + 1})')
    return out


def _parse_times(col: pd.Series, name: str, src: _Source) -> tuple[np.ndarray, bool]:
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
        parsed = _to_datetime(pd.Index(uniques), name, src)
        bad = parsed.isna()
        if bad.any():
            bad_rows = bad[codes]
            i = int(np.argmax(bad_rows))
            raise src.fail(
                f'column "{name}": expected dates, found "{_shown(col.iloc[i])}" (row {i + 1})'
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


def _to_datetime(texts: pd.Index, name: str, src: _Source) -> pd.DatetimeIndex:
    """Parse distinct time texts; NaT marks a text that does not parse.

    ISO 8601 first, in any of its variants (``2021-03-01``, ``2021-03-01 05:00:00.5``);
    when the first text is not ISO, the format pandas infers from it applies to all.
    """
    with warnings.catch_warnings():
        # pandas warns when it falls back to parsing element by element; that is fine here.
        warnings.simplefilter("ignore", UserWarning)
        try:
            parsed = _coerce_datetimes(texts, "ISO8601")
            if len(parsed) and pd.isna(parsed[0]):
                parsed = _coerce_datetimes(texts, None)
        except (ValueError, TypeError, OverflowError):
            raise src.fail(f'column "{name}": expected dates or whole numbers') from None
    return pd.DatetimeIndex(parsed)


def _coerce_datetimes(texts: pd.Index, fmt: str | None) -> pd.DatetimeIndex:
    try:
        return pd.DatetimeIndex(pd.to_datetime(texts, format=fmt, errors="coerce"))
    except ValueError:
        # Mixed UTC offsets: bring everything to UTC instead.
        return pd.DatetimeIndex(pd.to_datetime(texts, format=fmt, errors="coerce", utc=True))


def _wide_rows(frame: pd.DataFrame, ds: DatasetConfig, src: _Source) -> _Rows:
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
            f'column "{ds.time}": duplicate time {_time_text(t[j], is_date)} '
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
    return _Rows(
        sid=col_idx.astype(np.int64),
        t=t[time_idx],
        v=mat[time_idx, col_idx],
        cov=None,
        row=(order[time_idx] + 1).astype(np.int64),
        keys=keys_sorted,
        is_date=is_date,
    )


# ---------------------------------------------------------------------- order and time axis


def _reject_duplicates(rows: _Rows, src: _Source) -> None:
    dup = np.flatnonzero((rows.sid[1:] == rows.sid[:-1]) & (rows.t[1:] == rows.t[:-1]))
    if len(dup):
        j = int(dup[0])
        a, b = sorted((int(rows.row[j]), int(rows.row[j + 1])))
        raise src.fail(
            f"{src.series(rows.keys[rows.sid[j]])}: duplicate time {rows.time_text(rows.t[j])} "
            f"(rows {a} and {b})"
        )


@dataclass
class _Axis:
    """Step positions of times: ``pos`` per row (one apart = one step), and times back.

    Either arithmetic (fixed-length steps of ``unit``, counted from each series' first time)
    or a calendar ``grid`` of every valid timestamp from the panel's first to its last.
    """

    unit: int
    first: np.ndarray | None = None
    grid: np.ndarray | None = None
    pos: np.ndarray = field(default_factory=lambda: np.zeros(0, np.int64))

    def times(self, sid: np.ndarray, pos: np.ndarray) -> np.ndarray:
        if self.grid is not None:
            return self.grid[pos]
        assert self.first is not None
        return self.first[sid] + pos * self.unit


def _time_axis(
    rows: _Rows, ds: DatasetConfig, offset: poff.BaseOffset | None, src: _Source
) -> tuple[_Axis, str | None]:
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
        axis = _Axis(unit=max(unit, 1), first=rows.t[starts])
        axis.pos = (rows.t - axis.first[rows.sid]) // axis.unit
        _require_one_step(rows, axis, same, counts, src, f"time step {axis.unit}")
        return axis, None

    inferred = offset is None
    if offset is None:
        offset = _infer_frequency(rows, counts, ds, src)
    axis = _date_axis(rows, offset, src)
    if inferred:
        _require_one_step(rows, axis, same, counts, src, f"frequency {offset.freqstr}")
    return axis, offset.freqstr


def _parse_frequency(text: str, src: _Source) -> poff.BaseOffset:
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
        f'"{_shown(text, 40)}"',
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


def _infer_frequency(
    rows: _Rows, counts: np.ndarray, ds: DatasetConfig, src: _Source
) -> poff.BaseOffset:
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


def _date_axis(rows: _Rows, offset: poff.BaseOffset, src: _Source) -> _Axis:
    if isinstance(offset, poff.Tick) or type(offset) is poff.Day:
        # Fixed-length steps (a naive calendar day is 24 h): arithmetic from each series' start.
        # Tick.nanos already includes the multiple (15min: 900 s); Day has no nanos in pandas 3.
        unit = int(offset.n) * _DAY_NS if type(offset) is poff.Day else int(offset.nanos)
        first = rows.t[rows.offsets[:-1]]
        rel = rows.t - first[rows.sid]
        misfit = rel % unit != 0
        axis = _Axis(unit=unit, first=first, pos=rel // unit)
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
        for lo in range(0, len(pos), 1 << 22):
            part = slice(lo, lo + (1 << 22))
            np.not_equal(ext[pos[part]], rows.t[part], out=misfit[part])
        axis = _Axis(unit=1, grid=grid, pos=pos)
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
    rows: _Rows, axis: _Axis, same: np.ndarray, counts: np.ndarray, src: _Source, what: str
) -> None:
    """Reject a series observed at a coarser step than the panel (e.g. every 3rd month)."""
    multi = np.flatnonzero(counts > 1)
    if not len(multi):
        return
    # steps between neighbours, 0 across a series boundary (gcd(x, 0) = x): one array, no
    # compacted copy; series i's steps start at offsets[i]
    # int32 when every step fits (half the memory of a copy of the positions)
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


# -------------------------------------------------------------------------- missing values


def _apply_missing_policy(rows: _Rows, axis: _Axis, ds: DatasetConfig, src: _Source) -> _Rows:
    """Insert rows for missing times and fill missing values as ``ds.missing`` says."""
    policy = ds.missing
    same = rows.sid[1:] == rows.sid[:-1]
    gap_at = np.flatnonzero(same & (axis.pos[1:] - axis.pos[:-1] > 1))
    if len(gap_at):
        if policy == "error":
            j = int(gap_at[0])
            missing_t = axis.times(rows.sid[j : j + 1], axis.pos[j : j + 1] + 1)[0]
            total = int(np.sum(axis.pos[gap_at + 1] - axis.pos[gap_at] - 1))
            n_series = len(np.unique(rows.sid[gap_at]))
            raise src.fail(
                f"{src.series(rows.keys[rows.sid[j]])}: time {rows.time_text(missing_t)} is "
                f"missing (no row between {rows.time_text(rows.t[j])} and "
                f"{rows.time_text(rows.t[j + 1])}; "
                f"{total} missing time(s) in {n_series} series); add the rows or set missing: "
                f"interpolate or zero"
            )
        rows = _insert_gaps(rows, axis)
    inserted = rows.row == 0
    if rows.cov is not None:
        holes = np.isnan(rows.cov)
        if holes.any():
            r, c = (int(x[0]) for x in np.nonzero(holes))
            where = (
                "is missing from the file" if inserted[r] else f"has no value (row {rows.row[r]})"
            )
            raise src.fail(
                f'{src.series(rows.keys[rows.sid[r]])}: column "{ds.covariates[c]}": time '
                f"{rows.time_text(rows.t[r])} {where}; covariates must be known at every time"
            )
    nan = np.isnan(rows.v)
    if not nan.any():
        return rows
    target = ds.target if ds.target is not None else "value"
    empty = np.flatnonzero(np.bincount(rows.sid[~nan], minlength=len(rows.keys)) == 0)
    if len(empty):
        raise src.fail(f"{src.series(rows.keys[empty[0]])}: no values")
    if policy == "error":
        j = int(np.argmax(nan))
        where = f'column "{target}": ' if not src.wide else ""
        raise src.fail(
            f"{src.series(rows.keys[rows.sid[j]])}: {where}missing value at "
            f"{rows.time_text(rows.t[j])} (row {rows.row[j]}); fill it or set missing: "
            f"interpolate or zero"
        )
    if policy == "zero":
        rows.v = np.where(nan, 0.0, rows.v)
        verb = "set to 0"
    else:
        # Kept as NaN: each forecaster fills its own training slice from that slice alone
        # (runner.forecasters.gaps), so no value from after a forecast origin reaches it.
        _check_interpolable(rows, nan, src)
        rows.v = np.where(nan, np.nan, rows.v)  # one NaN bit pattern, for the fingerprint
        verb = "kept as gaps (filled within each training slice)"
    _fill_notes(rows, nan, inserted, verb, src)
    return rows


def _insert_gaps(rows: _Rows, axis: _Axis) -> _Rows:
    n = len(rows.keys)
    starts, ends = rows.offsets[:-1], rows.offsets[1:] - 1
    first_pos, last_pos = axis.pos[starts], axis.pos[ends]
    lengths = (last_pos - first_pos + 1).astype(np.int64)
    offsets = np.concatenate([[0], np.cumsum(lengths)]).astype(np.int64)
    total = int(offsets[-1])
    sid = np.repeat(np.arange(n, dtype=np.int64), lengths)
    pos = first_pos[sid] + (np.arange(total, dtype=np.int64) - offsets[sid])
    at = offsets[rows.sid] + (axis.pos - first_pos[rows.sid])
    v = np.full(total, np.nan)
    v[at] = rows.v
    row = np.zeros(total, dtype=np.int64)
    row[at] = rows.row
    cov = None
    if rows.cov is not None:
        cov = np.full((total, rows.cov.shape[1]), np.nan)
        cov[at] = rows.cov
    t = axis.times(sid, pos)
    return _Rows(sid=sid, t=t, v=v, cov=cov, row=row, keys=rows.keys, is_date=rows.is_date,
                 offsets=offsets)  # fmt: skip


def _check_interpolable(rows: _Rows, nan: np.ndarray, src: _Source) -> None:
    """``interpolate`` never guesses beyond the data: a missing first or last value is an error.

    Interior gaps stay NaN in the panel; they are filled per training slice later.
    """
    starts, ends = rows.offsets[:-1], rows.offsets[1:] - 1
    lead, trail = starts[nan[starts]], ends[nan[ends]]
    if len(lead) or len(trail):
        j = int(min(lead.min(initial=len(nan)), trail.min(initial=len(nan))))
        where = "first" if len(lead) and j == lead.min() else "last"
        raise src.fail(
            f"{src.series(rows.keys[rows.sid[j]])}: the {where} value (at "
            f"{rows.time_text(rows.t[j])}, row {rows.row[j]}) is missing and cannot be "
            f"interpolated; drop the row or set missing: zero"
        )


def _fill_notes(
    rows: _Rows, nan: np.ndarray, inserted: np.ndarray, verb: str, src: _Source
) -> None:
    per_series = np.bincount(rows.sid[nan], minlength=len(rows.keys))
    per_inserted = np.bincount(rows.sid[inserted], minlength=len(rows.keys))
    hit = np.flatnonzero(per_series)
    for i in hit[:_NOTE_LIMIT]:
        extra = f" ({per_inserted[i]} of them at missing times)" if per_inserted[i] else ""
        src.notes.append(
            f"{src.series(rows.keys[i])}: {per_series[i]} missing value(s) {verb}{extra}"
        )
    if len(hit) > _NOTE_LIMIT:
        rest = hit[_NOTE_LIMIT:]
        src.notes.append(
            f"... and {int(per_series[rest].sum())} missing value(s) {verb} in "
            f"{len(rest)} more series"
        )


# ------------------------------------------------------------------------ season, identity


def _resolve_season(
    ds: DatasetConfig, default: int | None, frequency: str | None, is_date: bool, src: _Source
) -> int:
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


def _fingerprint(
    keys: list[str],
    offsets: np.ndarray,
    t: np.ndarray,
    is_date: bool,
    values: np.ndarray,
    cov_names: list[str],
    cov: np.ndarray | None,
) -> str:
    """SHA-256 of the loaded content; independent of row order and of the file's format."""
    h = hashlib.sha256(_FINGERPRINT_VERSION)
    for text in (*keys, "\0", *cov_names):
        b = text.encode("utf-8")
        h.update(len(b).to_bytes(8, "little") + b)
    h.update(b"D" if is_date else b"I")
    # the arrays' own memory is hashed (no bytes copy of a panel's values)
    for arr, dt in ((offsets, "<i8"), (t, "<i8"), (values, "<f8")):
        h.update(memoryview(np.ascontiguousarray(arr, dtype=dt)).cast("B"))
    if cov is not None:
        h.update(memoryview(np.ascontiguousarray(cov, dtype="<f8")).cast("B"))
    return h.hexdigest()
