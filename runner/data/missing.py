"""Gaps (missing times) and missing values, and the config's ``missing`` policy.

``error`` rejects the first one with its series, time and row; ``zero`` fills them with 0;
``interpolate`` inserts the missing times and keeps every missing value as NaN, filled later
within each training slice from that slice's own values (so no value from after a forecast
origin reaches it). Covariates must be known at every time under every policy.
"""

from __future__ import annotations

import numpy as np

from runner.config import DatasetConfig
from runner.data.messages import Source
from runner.data.rows import Rows
from runner.data.steps import StepAxis

#: How many series a fill notice lists by name before summing up the rest.
_NOTE_LIMIT = 10


def apply_missing_policy(rows: Rows, axis: StepAxis, ds: DatasetConfig, src: Source) -> Rows:
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


def _insert_gaps(rows: Rows, axis: StepAxis) -> Rows:
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
    return Rows(sid=sid, t=t, v=v, cov=cov, row=row, keys=rows.keys, is_date=rows.is_date,
                 offsets=offsets)  # fmt: skip


def _check_interpolable(rows: Rows, nan: np.ndarray, src: Source) -> None:
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


def _fill_notes(rows: Rows, nan: np.ndarray, inserted: np.ndarray, verb: str, src: Source) -> None:
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
