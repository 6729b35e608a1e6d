"""The execution engine runs every task the same way in process and on worker processes.

Data: US macroeconomic quarterly series from ``statsmodels.datasets.macrodata`` (an open dataset
bundled with statsmodels), cut into rolling-origin folds with
:func:`runner.windows.folds.fold_bounds`.
"""

from __future__ import annotations

import io

import numpy as np
import pytest
from statsmodels.datasets import macrodata

from runner.config import ExecutionConfig, ForecasterSpec
from runner.execution.dispatch import forecast_models
from runner.execution.engines import execute, resolve_jobs
from runner.execution.progress import Progress
from runner.execution.tasks import ModelTask, SharedData
from runner.windows.folds import Scheme, fold_bounds

COLUMNS = ["realgdp", "realcons", "realinv", "cpi"]


def plugin(name: str, cls: str, **params) -> ForecasterSpec:
    """A plugin forecaster from tests/fault_plugins.py."""
    return ForecasterSpec(
        name=name, kind="plugin", role="candidate", params=params, entry=f"fault_plugins:{cls}"
    )


def macro_work(
    specs: list[ForecasterSpec],
    *,
    columns: list[str] = COLUMNS,
    length: int = 60,
    horizon: int = 4,
    folds: int = 4,
    levels: tuple[float, ...] = (80.0,),
    values: np.ndarray | None = None,
) -> tuple[list[ModelTask], SharedData]:
    """Tasks over the first ``length`` quarters of some macrodata series, end to end."""
    data = macrodata.load_pandas().data
    if values is None:
        values = np.concatenate([data[c].to_numpy(float)[:length] for c in columns])
    n = len(values) // len(columns)
    scheme = Scheme("expanding", train=n - horizon * folds, horizon=horizon, step=horizon,
                    folds=folds)
    tasks = []
    for f in range(len(specs)):
        for s in range(len(columns)):
            for start, end, test_start, _ in fold_bounds(n, scheme) + s * n:
                tasks.append(ModelTask(len(tasks), f, 0, int(start), int(end), int(test_start), 4))
    return tasks, SharedData([values], [None], specs, horizon, levels)


def same_outcomes(a, b) -> bool:
    """Bit-identical forecasts and the same reasons, task by task."""
    if len(a) != len(b):
        return False
    for x, y in zip(a, b):
        if (x.index, x.reason, x.info) != (y.index, y.reason, y.info):
            return False
        for u, v in ((x.point, y.point), (x.lower, y.lower), (x.upper, y.upper)):
            if (u is None) != (v is None):
                return False
            if u is not None and u.tobytes() != v.tobytes():
                return False
    return True


def test_jobs_1_and_2_give_bit_identical_outcomes_in_task_order():
    tasks, shared = macro_work([plugin("line", "LineFit"), plugin("half", "LineFit", weight=0.5)])
    serial = execute(tasks, shared, jobs=1)
    pooled = execute(tasks, shared, jobs=2)
    assert [o.index for o in pooled] == [t.index for t in tasks]
    assert all(o.ok for o in serial)
    assert same_outcomes(serial, pooled)
    # the forecaster saw only its training slice: a least-squares line, checked with numpy
    t = tasks[0]
    y = shared.values[0][t.start : t.end]
    slope, intercept = np.polyfit(np.arange(len(y)), y, 1)
    expected = intercept + slope * np.arange(len(y), len(y) + shared.horizon)
    np.testing.assert_allclose(serial[0].point, expected, rtol=1e-12)


def test_statsmodels_model_is_bit_identical_across_workers_and_cache(tmp_path):
    # theta through runner.forecasters.models: real statsmodels fits, in process vs worker processes
    theta = ForecasterSpec(name="theta", kind="theta", role="candidate", params={})
    tasks, shared = macro_work([theta], columns=["realgdp", "cpi"], folds=3)
    serial = execute(tasks, shared, jobs=1)
    assert all(o.ok for o in serial), [o.message for o in serial if not o.ok]
    ex = ExecutionConfig(jobs=2, cache=str(tmp_path))
    cold, c1 = forecast_models(tasks, shared, ex, quiet=True)
    warm, c2 = forecast_models(tasks, shared, ex, quiet=True)
    assert (c1.computed, c1.cached, c2.computed, c2.cached) == (len(tasks), 0, 0, len(tasks))
    assert same_outcomes(serial, cold) and same_outcomes(cold, warm)
    assert all(o.cached for o in warm) and not any(o.cached for o in cold)


def test_on_error_stop_in_process_runs_nothing_after_the_first_failure():
    # Raises fails on the slice of length 52 (the second fold of each series)
    tasks, shared = macro_work([plugin("r", "Raises", when_length=48)])
    out = execute(tasks, shared, jobs=1, on_error="stop")
    reasons = [o.reason for o in out]
    first = reasons.index("error")
    assert tasks[first].end - tasks[first].start == 48
    assert all(r is None for r in reasons[:first])
    assert reasons[first + 1 :] == ["not-run"] * (len(tasks) - first - 1)


def test_on_error_stop_with_workers_keeps_the_list_aligned_and_counts():
    tasks, shared = macro_work([plugin("r", "Raises", when_length=48)], folds=4)
    ex = ExecutionConfig(jobs=2, cache=False, on_error="stop")
    out, counts = forecast_models(tasks, shared, ex, quiet=True)
    assert len(out) == len(tasks)
    assert counts.failed >= 1 and counts.not_run >= 1
    assert counts.computed + counts.cached + counts.failed + counts.not_run == len(tasks)
    # record (the default) runs everything and fails exactly the 48-long slices
    out, counts = forecast_models(tasks, shared, ExecutionConfig(jobs=2, cache=False),
                                  quiet=True)
    bad = [t.end - t.start == 48 for t in tasks]
    assert [o.reason == "error" for o in out] == bad and counts.failed == sum(bad)


def test_resolve_jobs():
    assert resolve_jobs(3) == 3
    assert resolve_jobs(-1) >= 1
    with pytest.raises(ValueError):
        resolve_jobs(0)


def test_progress_prints_quarter_lines_when_not_a_terminal():
    out = io.StringIO()
    p = Progress(8, cached=2, stream=out, tty=False)
    for k in range(6):
        p.task_done(ok=k != 3)
    p.close()
    lines = out.getvalue().splitlines()
    # 2 cached already cover 25%; then 50% at 4 done, 75% at 6, 100% at 8
    assert [line.split(",")[0] for line in lines] == [
        "castgrid: model tasks 2/8", "castgrid: model tasks 4/8",
        "castgrid: model tasks 6/8", "castgrid: model tasks 8/8",
    ]
    assert "cached 2" in lines[-1] and "failed 1" in lines[-1] and "remaining 0:00" in lines[-1]


def test_progress_redraws_on_a_terminal_and_is_silent_when_quiet():
    tty = io.StringIO()
    p = Progress(3, stream=tty, tty=True)
    for _ in range(3):
        p.task_done(ok=True)
    p.close()
    assert tty.getvalue().startswith("\r") and tty.getvalue().endswith("\n")
    assert tty.getvalue().count("\n") == 1
    quiet = io.StringIO()
    q = Progress(3, stream=quiet, quiet=True)
    q.task_done(ok=True)
    q.close()
    assert quiet.getvalue() == ""
