"""Series attributes: one text value per series (a category, a region, a shop format).

A dataset lists its attributes by name (``attributes: [format, region]``). Each is read

* from the data file, when it has the column (long layout): the column must hold the same
  value in every row of a series, since an attribute describes the series, not one time; or
* from the dataset's ``attribute_file``, a CSV or Parquet file with one row per series: the
  series key column(s) of the dataset (for a wide dataset, a column named ``series``), then the
  attribute columns. Every series of the dataset must have a row (a series without one is an
  error, never a silent "unknown" segment, since that would hide a mapping mistake); rows for
  series the data does not have are ignored with a note (a catalogue may cover more series
  than one extract).

An attribute that both files hold is an error (which one is meant?), except a series key
column, which is read from the data file. An empty cell is an error: every series needs a
value of every attribute.

The data file is read a second time, for the key and attribute columns only, so that the
panel loader (:mod:`runner.data.load`) stays as it is; keys are built as the loader builds
them (text of each key column, several columns joined with ``/``), and every series of the
panel must be found.

:func:`attach_attributes` stores the values on :attr:`Panel.attributes` and folds them into
the panel's fingerprint, so a series that changes attribute shows as changed data in
``castgrid diff`` and the history. Every problem is a one-line
:class:`~runner.errors.DataError` naming the file, the column and the series.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pandas as pd

from runner.config import DatasetConfig
from runner.data.panel import Panel
from runner.errors import DataError
from runner.paths import config_relative

#: The key column of an attribute_file for a wide dataset, whose series are its columns.
WIDE_KEY = "series"
#: How many series a message lists by name before counting the rest.
_LIST_LIMIT = 3
_FINGERPRINT_VERSION = b"castgrid-attributes-1\0"


def attach_attributes(panel: Panel, ds: DatasetConfig, base_dir: Path) -> None:
    """Read the attributes ``ds`` lists and store them on ``panel``.

    ``base_dir`` is the folder of the config file (relative paths are relative to it). Does
    nothing when ``ds`` lists no attributes. Raises :class:`~runner.errors.DataError`.
    """
    if not ds.attributes:
        return
    data_path = config_relative(ds.path, base_dir)
    key_cols = ds.series_columns if ds.layout == "long" else [WIDE_KEY]
    data_cols = _columns(data_path, ds.path) if ds.layout == "long" else []
    side_cols: list[str] = []
    side_path = None
    if ds.attribute_file is not None:
        side_path = config_relative(ds.attribute_file, base_dir)
        side_cols = _columns(side_path, ds.attribute_file)
    from_data, from_side = [], []
    for name in ds.attributes:
        in_data, in_side = name in data_cols, name in side_cols and name not in key_cols
        if in_data and in_side:
            raise DataError(
                f"{ds.attribute_file}: column \"{name}\" is also in {ds.path}; an attribute "
                "must come from one file (drop the column from one of them)"
            )
        if in_data:
            from_data.append(name)
        elif in_side:
            from_side.append(name)
        elif ds.attribute_file is None:
            raise DataError(
                f'{ds.path}: column "{name}" (an attribute of dataset "{ds.name}") not found '
                f"(columns: {_shown(data_cols)})"
            )
        else:
            where = f", nor in {ds.path}" if ds.layout == "long" else ""
            raise DataError(
                f'{ds.attribute_file}: column "{name}" (an attribute of dataset "{ds.name}") '
                f"not found{where} (columns: {_shown(side_cols)})"
            )
    values: dict[str, np.ndarray] = {}
    if from_data:
        values.update(_from_data(panel, data_path, ds.path, key_cols, from_data))
    if from_side:
        assert side_path is not None and ds.attribute_file is not None
        values.update(_from_side(panel, ds, side_path, ds.attribute_file, key_cols, from_side,
                                 side_cols))
    panel.attributes = {name: values[name] for name in ds.attributes}
    panel.fingerprint = _fingerprint(panel.fingerprint, panel.attributes)


# ------------------------------------------------------------------------------- reading


def _kind(path: Path, label: str) -> str:
    name = path.name.lower()
    if name.endswith(".parquet"):
        return "parquet"
    if name.endswith(".csv") or name.endswith(".csv.gz"):
        return "csv"
    raise DataError(f"{label}: expected a .csv, .csv.gz or .parquet file")


def _columns(path: Path, label: str) -> list[str]:
    kind = _kind(path, label)
    if not path.is_file():
        raise DataError(f"{label}: file not found (looked for {path.resolve()})")
    try:
        if kind == "parquet":
            import pyarrow.parquet as pq

            return [str(c) for c in pq.read_schema(path).names]
        return [str(c) for c in pd.read_csv(path, nrows=0).columns]
    except pd.errors.EmptyDataError:
        raise DataError(f"{label}: file has no columns") from None
    except Exception as exc:  # any reader failure at this boundary is a bad file
        raise DataError(f"{label}: cannot read file ({_reason(exc)})") from None


def _read(path: Path, label: str, columns: list[str]) -> pd.DataFrame:
    """The named columns, every cell as text ('' for an empty cell)."""
    try:
        if _kind(path, label) == "parquet":
            frame = pd.read_parquet(path, columns=columns, engine="pyarrow")
            # the loader names a series by the text of its key (pandas' astype(str))
            return pd.DataFrame({c: _text(frame[c]) for c in columns})
        return pd.read_csv(path, usecols=columns, dtype=str, keep_default_na=False,
                           low_memory=False)[columns]
    except Exception as exc:  # malformed rows, truncated gzip, damaged parquet
        raise DataError(f"{label}: cannot read file ({_reason(exc)})") from None


def _text(col: pd.Series) -> pd.Series:
    empty = col.isna()
    out = col.astype(str)
    out[empty.to_numpy()] = ""
    return out


def _keys(frame: pd.DataFrame, key_cols: list[str], label: str) -> pd.Series:
    for col in key_cols:
        empty = (frame[col] == "").to_numpy()
        if empty.any():
            raise DataError(f'{label}: column "{col}": empty series name (row '
                            f"{int(np.argmax(empty)) + 1})")
    keys = frame[key_cols[0]]
    if len(key_cols) > 1:
        keys = keys.str.cat([frame[c] for c in key_cols[1:]], sep="/")
    return keys


def _from_data(panel: Panel, path: Path, label: str, key_cols: list[str],
               names: list[str]) -> dict[str, np.ndarray]:
    """Attributes held by the data file: constant within each series."""
    frame = _read(path, label, list(dict.fromkeys([*key_cols, *names])))
    keys = _keys(frame, key_cols, label)
    codes, uniques = pd.factorize(keys)
    position = _positions(panel, list(uniques))
    lost = np.flatnonzero(position < 0)
    if len(lost) or len(uniques) != panel.n_series:
        raise DataError(f"{label}: the series read for the attributes differ from the series of "
                        f"dataset \"{panel.name}\"; check the series column(s)")
    _, first_row = np.unique(codes, return_index=True)  # codes are 0..n-1, all present
    out = {}
    for name in names:
        col = frame[name].to_numpy(dtype=object)
        empty = col == ""
        if empty.any():
            row = int(np.argmax(empty))
            raise DataError(f'{label}: column "{name}": series "{keys.iloc[row]}" has no value '
                            f"in row {row + 1}; every row of a series needs its attributes")
        differs = col != col[first_row[codes]]
        if differs.any():
            # the series that comes first in key order, at its first differing row
            rows = np.flatnonzero(differs)
            row = int(rows[np.argmin(position[codes[rows]] * len(col) + rows)])
            series = codes[row]
            a = int(first_row[series])
            raise DataError(
                f'{label}: column "{name}": series "{uniques[series]}" has more than one value '
                f'("{col[a]}" in row {a + 1}, "{col[row]}" in row {row + 1}); an attribute '
                "must be the same in every row of a series"
            )
        per_series = np.empty(panel.n_series, dtype=object)
        per_series[position] = col[first_row]
        out[name] = per_series
    return out


def _from_side(panel: Panel, ds: DatasetConfig, path: Path, label: str, key_cols: list[str],
               names: list[str], columns: list[str]) -> dict[str, np.ndarray]:
    """Attributes held by the attribute_file: one row per series."""
    absent = [c for c in key_cols if c not in columns]
    if absent:
        keys_text = ", ".join(key_cols)
        raise DataError(
            f'{label}: column "{absent[0]}" not found; an attribute_file needs the series '
            f'column(s) of dataset "{ds.name}" ({keys_text}) and the attribute columns '
            f"(columns: {_shown(columns)})"
        )
    frame = _read(path, label, list(dict.fromkeys([*key_cols, *names])))
    if len(frame) == 0:
        raise DataError(f"{label}: no data rows")
    keys = _keys(frame, key_cols, label)
    dup = keys.duplicated(keep=False).to_numpy()
    if dup.any():
        rows = np.flatnonzero(dup)
        first = keys.iloc[rows[0]]
        again = rows[keys.iloc[rows].to_numpy() == first]
        raise DataError(f'{label}: series "{first}" is listed twice (rows {again[0] + 1} and '
                        f"{again[1] + 1}); give each series one row")
    index = pd.Index(keys)
    where = index.get_indexer(pd.Index(panel.keys))
    missing = np.flatnonzero(where < 0)
    if len(missing):
        names_text = _listed([panel.keys[i] for i in missing])
        raise DataError(
            f'{label}: series "{panel.keys[missing[0]]}" of dataset "{ds.name}" is not in the '
            f"file ({len(missing)} series missing: {names_text}); every series needs a row "
            "with its attributes"
        )
    extra = np.setdiff1d(np.arange(len(keys)), where)
    if len(extra):
        panel.notes.append(
            f"{label}: {len(extra)} series not in the data ignored "
            f"({_listed([str(keys.iloc[i]) for i in extra])})"
        )
    out = {}
    for name in names:
        col = frame[name].to_numpy(dtype=object)[where]
        empty = np.flatnonzero(col == "")
        if len(empty):
            row = int(where[empty[0]])
            raise DataError(f'{label}: column "{name}": series "{panel.keys[empty[0]]}" has no '
                            f"value (row {row + 1}); every series needs a value")
        out[name] = col
    return out


def _positions(panel: Panel, keys: list[str]) -> np.ndarray:
    """Index of each key in the panel's series (-1 when it has none)."""
    return pd.Index(panel.keys).get_indexer(pd.Index(keys, dtype=object))


# ------------------------------------------------------------------------------- messages


def _listed(names: list[str]) -> str:
    shown = ", ".join(names[:_LIST_LIMIT])
    more = len(names) - _LIST_LIMIT
    return f"{shown} and {more} more" if more > 0 else shown


def _shown(columns: list[str]) -> str:
    text = ", ".join(columns[:20])
    return text + (f", ... ({len(columns)} columns)" if len(columns) > 20 else "")


def _reason(exc: Exception) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 160 else text[:157] + "..."


def _fingerprint(panel_fingerprint: str, attributes: dict[str, np.ndarray]) -> str:
    """The panel's fingerprint extended by the attributes (names in sorted order, values in
    series order), so that a series moving to another attribute value is a data change."""
    h = hashlib.sha256(_FINGERPRINT_VERSION + panel_fingerprint.encode())
    for name in sorted(attributes):
        for text in (name, *attributes[name], "\0"):
            b = str(text).encode("utf-8")
            h.update(len(b).to_bytes(8, "little") + b)
    return h.hexdigest()
