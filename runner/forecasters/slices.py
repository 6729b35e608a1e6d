"""Many training slices of one flat value array at once, as padded matrices.

Series of a dataset are stored end to end in one float64 array; a task's training slice is
``values[start:end]``. Baselines and scaled metrics need per-slice sums, differences and the
last few values for hundreds of thousands of slices, so they are computed on padded
``(tasks, longest slice)`` matrices in chunks small enough to keep memory bounded, instead of
one Python call per task. Sums are taken per slice, not as differences of a running cumulative
sum, so long series with large values lose no precision.

Missing values (NaN, kept by ``missing: interpolate``) are filled inside each slice from that
slice's own values (:mod:`runner.forecasters.gaps`) before any statistic is taken, exactly as a
per-series model's training slice is filled.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from runner.forecasters.gaps import SliceFill

#: Largest padded matrix built at once (elements); 4M float64 = 32 MiB.
CHUNK_ELEMENTS = 1 << 22


def chunks(starts: np.ndarray, ends: np.ndarray) -> Iterator[slice]:
    """Consecutive task ranges whose padded matrices stay under :data:`CHUNK_ELEMENTS`."""
    n = len(starts)
    if n == 0:
        return
    width = int(np.max(ends - starts)) if n else 1
    rows = max(1, CHUNK_ELEMENTS // max(width, 1))
    for lo in range(0, n, rows):
        yield slice(lo, min(n, lo + rows))


def padded(
    values: np.ndarray | SliceFill, starts: np.ndarray, ends: np.ndarray
) -> np.ndarray:
    """Training slices right-aligned in a matrix: row i ends with ``values[ends[i]-1]``.

    Right alignment keeps "the last k values" at fixed columns; cells before a slice's start
    are NaN. Gaps inside a slice are filled from that slice alone (pass a :class:`SliceFill`
    to reuse one built for the same values).
    """
    fill = values if isinstance(values, SliceFill) else SliceFill(values)
    lengths = ends - starts
    width = int(lengths.max()) if len(lengths) else 0
    cols = np.arange(-width, 0, dtype=np.int64)
    idx = ends[:, None] + cols[None, :]
    valid = idx >= starts[:, None]
    out = fill.take(np.where(valid, idx, starts[:, None]), starts[:, None], ends[:, None])
    out[~valid] = np.nan
    return out


def padded_columns(
    values: np.ndarray | SliceFill, starts: np.ndarray, ends: np.ndarray
) -> np.ndarray:
    """:func:`padded` transposed, built contiguous: (longest slice, tasks), column i ends with
    ``values[ends[i]-1]`` in the last row."""
    fill = values if isinstance(values, SliceFill) else SliceFill(values)
    lengths = ends - starts
    width = int(lengths.max()) if len(lengths) else 0
    rows = np.arange(-width, 0, dtype=np.int64)
    idx = rows[:, None] + ends[None, :]
    valid = idx >= starts[None, :]
    out = fill.take(np.where(valid, idx, starts[None, :]), starts[None, :], ends[None, :])
    out[~valid] = np.nan
    return out


def column_sums(cols: np.ndarray) -> np.ndarray:
    """:func:`row_sums` of a transposed matrix (``cols`` from :func:`padded_columns`): each
    column summed from the top row down, NaN counted as 0."""
    out = np.zeros(cols.shape[1])
    for row in cols:
        out += np.where(np.isnan(row), 0.0, row)
    return out


def row_sums(mat: np.ndarray) -> np.ndarray:
    """The sum of each row of a padded matrix, NaN (padding) counted as 0, added from left to
    right.

    In that order the padding in front of a slice adds exact zeros before its first value, so
    a slice's sum is the same bits however wide its matrix is (the longest slice among the
    tasks computed with it, which depends on how the tasks are chunked). ``numpy.sum`` adds in
    pairs, and where the pairs fall depends on the width.

    >>> row_sums(np.array([[np.nan, 1.0, 2.0], [3.0, 4.0, 5.0]]))
    array([ 3., 12.])
    """
    # column by column over a transposed copy: each addition is one contiguous vector add
    return column_sums(np.ascontiguousarray(mat.T))


@dataclass
class SliceSummary:
    """Per-slice statistics shared by the baselines, their intervals and the scaled metrics.

    Sums of squares and absolute values are of the residuals of the corresponding benchmark
    method over the slice; ``*_count`` are how many residuals there are.
    """

    length: np.ndarray
    observed: np.ndarray  # values of the slice that are not missing (before filling)
    first: np.ndarray
    last: np.ndarray
    mean: np.ndarray
    mean_sq: np.ndarray  # sum (y_t - mean)^2
    diff_sq: np.ndarray  # sum (y_t - y_{t-1})^2
    drift_sq: np.ndarray  # sum (y_t - y_{t-1} - c)^2, c the mean difference
    seasonal_abs: np.ndarray  # sum |y_t - y_{t-m}|
    seasonal_sq: np.ndarray  # sum (y_t - y_{t-m})^2


def summarise(
    values: np.ndarray | SliceFill, starts: np.ndarray, ends: np.ndarray, season: int
) -> SliceSummary:
    """Compute :class:`SliceSummary` for every slice ``values[starts[i]:ends[i]]``.

    Statistics are of the filled slices (see :mod:`runner.forecasters.gaps`). Pass a
    :class:`SliceFill` to compute many batches of slices of one array: what it derives from
    the whole array is then derived once.
    """
    fill = values if isinstance(values, SliceFill) else SliceFill(values)
    n = len(starts)
    fields = {name: np.full(n, np.nan) for name in SliceSummary.__dataclass_fields__}
    fields["length"] = (ends - starts).astype(float)
    fields["observed"] = fill.observed(starts, ends).astype(float)
    m = max(int(season), 1)
    for part in chunks(starts, ends):
        # one row per position (the slices right-aligned, the last value in the last row):
        # each sum below is a run of contiguous vector additions, in a fixed order
        mat = padded_columns(fill, starts[part], ends[part])
        length = fields["length"][part]
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = column_sums(mat) / length
            d = np.diff(mat, axis=0)
            c = column_sums(d) / (length - 1)
            ds = mat[m:] - mat[:-m] if len(mat) > m else np.full((0, mat.shape[1]), np.nan)
            fields["first"][part] = mat[len(mat) - length.astype(int), np.arange(mat.shape[1])]
            fields["last"][part] = mat[-1]
            fields["mean"][part] = mean
            fields["mean_sq"][part] = column_sums((mat - mean) ** 2)
            fields["diff_sq"][part] = column_sums(d**2)
            fields["drift_sq"][part] = column_sums((d - c) ** 2)
            fields["seasonal_abs"][part] = column_sums(np.abs(ds))
            fields["seasonal_sq"][part] = column_sums(ds**2)
    return SliceSummary(**fields)
