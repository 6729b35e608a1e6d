"""Dataset loading: one config ``datasets`` entry becomes a :class:`~runner.data.panel.Panel`.

The loader works on flat arrays, never one pandas call per series: a panel of 10,000 series
is 1.2M rows, and a per-series loop would dominate the whole run. The stages, in order, each in
its own module:

1. read the file (CSV, gzip CSV or Parquet), only the columns the config names
   (:mod:`runner.data.files`);
2. turn the columns into flat arrays: a series id per row (keys sorted as strings), times
   as int64 (nanoseconds for dates), target values and covariates as float64, and the
   1-based row number of each cell so that every error can point into the file
   (:mod:`runner.data.columns`);
3. sort once by (series, time), reject duplicate times (:mod:`runner.data.rows`);
4. place every time on a step axis (a frequency grid for dates, the common difference for
   integers), check that timestamps fit it and that all series share it
   (:mod:`runner.data.frequency`, :mod:`runner.data.steps`);
5. find gaps (missing times) and missing values and apply the ``missing`` policy
   (:mod:`runner.data.missing`);
6. resolve the season length and fingerprint the content (here).

Every problem raises :class:`~runner.errors.DataError` with one line that names the file (as
written in the config), the column or series, and what was expected
(:mod:`runner.data.messages`).
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np

from runner.config import DatasetConfig
from runner.data.columns import long_rows, wide_rows
from runner.data.files import read_table
from runner.data.frequency import parse_frequency, resolve_season
from runner.data.messages import Source
from runner.data.missing import apply_missing_policy
from runner.data.panel import Panel
from runner.data.rows import reject_duplicates
from runner.data.steps import step_axis
from runner.paths import config_relative

_FINGERPRINT_VERSION = b"castgrid-panel-1\0"


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
    path = config_relative(ds.path, base_dir)
    src = Source(ds.path, wide=ds.layout == "wide")
    src.entry = f"{entry}." if entry else f'dataset "{ds.name}": '
    # A frequency that is no frequency is the config's problem: say so before reading data.
    offset = None if ds.frequency is None else parse_frequency(ds.frequency, src)
    frame = read_table(path, ds, src)
    rows = wide_rows(frame, ds, src) if ds.layout == "wide" else long_rows(frame, ds, src)
    del frame
    rows.sort()
    reject_duplicates(rows, src)
    axis, frequency = step_axis(rows, ds, offset, src)
    rows = apply_missing_policy(rows, axis, ds, src)
    season = resolve_season(ds, default_season, frequency, rows.is_date, src)
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
