"""Matching a recorded candidate's forecasts to the plan's tasks.

Each row of a checked forecasts file (:class:`~runner.forecasters.recorded_file.RecordedFile`)
lands on the task of its (series, origin) at the column of its step. A task with any step
missing from the file fails with reason ``not-recorded``, so the fair-ranking rule applies to
it; rows for series, origins or steps the plan does not score are counted in a note and the
manifest.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from runner.forecasters.recorded_file import RecordedFile
from runner.windows.plan import DatasetPlan

#: Reason of a task whose forecasts the file does not hold (failures.csv).
NOT_RECORDED = "not-recorded"
#: How many missing steps a failure message lists before summing up the rest.
_LIST_LIMIT = 6


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
