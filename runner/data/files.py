"""Reading a dataset file (CSV, gzip CSV or Parquet): only the columns the config names.

Every reader failure at this boundary (a missing file, a ragged row, a truncated gzip, a
damaged Parquet file, text that is not UTF-8, a column of the wrong type or one named twice in
the header) is a one-line :class:`~runner.errors.DataError` naming the file.
"""

from __future__ import annotations

import csv
import gzip
import io
import re
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pandas as pd

from runner.config import DatasetConfig
from runner.data.messages import Source, read_error_text, shown
from runner.errors import DataError

#: Cell texts read as "no value" in value and time columns (CSV). Key columns keep every text
#: as written, so that a region called "NA" stays a region.
MISSING_TOKENS = ["", "NA", "N/A", "NaN", "nan", "NULL", "null", "None", "#N/A", "<NA>"]


def read_table(path: Path, ds: DatasetConfig, src: Source) -> pd.DataFrame:
    """The columns of file ``path`` that dataset ``ds`` uses, types checked, as a DataFrame."""
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
        raise src.fail(f"cannot read file ({read_error_text(exc)})") from None
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
        raise src.fail(f"cannot read file ({read_error_text(exc)})") from None
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


def _read_csv(path: Path, needed: list[str], ds: DatasetConfig, width: int, src: Source) -> Any:
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


def _ragged_row(path: Path, width: int, found: int, src: Source) -> DataError:
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
    where = f'line {line} ("{shown(text)}")' if line is not None else "a row"
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


def _to_frame(read: list[Any], ds: DatasetConfig, src: Source) -> pd.DataFrame:
    """The pyarrow table in ``read`` (taken out of the list, so that the caller holds no
    reference to it) as a DataFrame the loader's array stages accept, types checked first.

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


def _needed_columns(ds: DatasetConfig, columns: list[str], src: Source) -> list[str]:
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
    listed = ", ".join(shown(c, 40) for c in columns[:20]) + (
        f", ... ({len(columns)} columns)" if len(columns) > 20 else ""
    )
    for col in wanted:
        if col not in columns:
            raise src.fail(f'column "{col}" not found (columns: {listed})')
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
