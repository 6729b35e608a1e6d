"""The forecast cache: keys follow exactly what can change a forecast; hits are bit-identical;
reruns after new or revised data recompute only the folds that saw the change.

Data: ``statsmodels.datasets.macrodata`` (open dataset bundled with statsmodels).
"""

from __future__ import annotations

import dataclasses
import importlib
import sqlite3
import subprocess
import sys
import textwrap
from pathlib import Path

import fault_plugins
import numpy as np
import pytest
from statsmodels.datasets import macrodata
from test_parallel import macro_work, plugin, same_outcomes

from runner.config import ExecutionConfig, ForecasterSpec
from runner.execution.cache import CACHE_FILE, ForecastCache, count_cached, task_keys
from runner.execution.dispatch import forecast_models
from runner.execution.tasks import ModelTask, SharedData

REPO = Path(__file__).resolve().parent.parent


def key_of(task: ModelTask, shared: SharedData) -> bytes:
    return task_keys([task], shared)[0]


@pytest.fixture
def base():
    values = macrodata.load_pandas().data["realgdp"].to_numpy(float)[:40]
    cov = np.column_stack([np.arange(40.0), np.sin(np.arange(40.0))])
    specs = [plugin("line", "LineFit"), plugin("cov", "CovariateMean")]
    shared = SharedData([values], [cov], specs, 4, (80.0,))
    task = ModelTask(0, 0, 0, 0, 30, 30, 4)
    return task, shared


def test_key_changes_with_each_thing_that_can_change_a_forecast(base, monkeypatch):
    task, shared = base
    k = key_of(task, shared)
    revised = shared.values[0].copy()
    revised[10] += 1e-9
    changed = {
        "params": dataclasses.replace(
            shared, forecasters=[plugin("line", "LineFit", weight=0.5)] + shared.forecasters[1:]
        ),
        "training value": dataclasses.replace(shared, values=[revised]),
        "horizon": dataclasses.replace(shared, horizon=5),
        "levels": dataclasses.replace(shared, levels=(80.0, 95.0)),
        "no levels": dataclasses.replace(shared, levels=()),
    }
    keys = {name: key_of(task, s) for name, s in changed.items()}
    keys["season"] = key_of(dataclasses.replace(task, season=12), shared)
    keys["shorter slice"] = key_of(dataclasses.replace(task, end=29, test_start=29), shared)
    keys["sliding start"] = key_of(dataclasses.replace(task, start=1), shared)
    keys["gap"] = key_of(dataclasses.replace(task, test_start=31), shared)
    monkeypatch.setattr(fault_plugins.LineFit, "version", "2")
    keys["implementation version"] = key_of(task, shared)
    monkeypatch.undo()
    assert all(v != k for v in keys.values()), [n for n, v in keys.items() if v == k]
    assert len(set(keys.values())) == len(keys)
    assert key_of(task, shared) == k  # back to version 1: the same key again


def test_key_ignores_what_cannot_change_a_forecast(base):
    task, shared = base
    k = key_of(task, shared)
    later = shared.values[0].copy()
    later[30:] = -1.0  # the test block and after: never given to the forecaster
    moved = np.concatenate([np.zeros(7), shared.values[0]])  # the same slice elsewhere
    renamed = [plugin("other-name", "LineFit")] + shared.forecasters[1:]
    other_cov = [shared.covariates[0] * 2.0]
    assert key_of(task, dataclasses.replace(shared, values=[later])) == k
    assert key_of(dataclasses.replace(task, index=99), shared) == k
    assert key_of(dataclasses.replace(task, start=7, end=37, test_start=37),
                  dataclasses.replace(shared, values=[moved],
                                      covariates=[np.zeros((47, 2))])) == k
    assert key_of(task, dataclasses.replace(shared, forecasters=renamed)) == k
    # LineFit is not given covariates, so they are not part of its key...
    assert key_of(task, dataclasses.replace(shared, covariates=other_cov)) == k
    # ...but they are for a forecaster that uses them, training part and test block alike
    cov_task = dataclasses.replace(task, forecaster=1)
    kc = key_of(cov_task, shared)
    test_block_only = shared.covariates[0].copy()
    test_block_only[31, 1] += 1.0
    after_block = shared.covariates[0].copy()
    after_block[36, 0] += 1.0
    assert key_of(cov_task, dataclasses.replace(shared, covariates=other_cov)) != kc
    assert key_of(cov_task, dataclasses.replace(shared, covariates=[test_block_only])) != kc
    assert key_of(cov_task, dataclasses.replace(shared, covariates=[after_block])) == kc


def test_warm_cache_is_bit_identical_and_no_cache_bypasses_it(tmp_path):
    tasks, shared = macro_work([plugin("line", "LineFit")], levels=(80.0, 95.0))
    ex = ExecutionConfig(jobs=1, cache=str(tmp_path / "c"))
    cold, c1 = forecast_models(tasks, shared, ex, quiet=True)
    warm, c2 = forecast_models(tasks, shared, ex, quiet=True)
    assert (c1.computed, c2.cached, c2.computed) == (len(tasks), len(tasks), 0)
    assert same_outcomes(cold, warm)
    assert count_cached(tasks, shared, tmp_path / "c") == len(tasks)
    again, c3 = forecast_models(tasks, shared, ex, use_cache=False, quiet=True)
    assert c3.computed == len(tasks) and same_outcomes(cold, again)
    out, _ = forecast_models(tasks, shared, ExecutionConfig(jobs=1, cache=False), quiet=True)
    nowhere = tmp_path / "none"
    forecast_models(tasks, shared, ex, cache_path=None, quiet=True)
    assert not nowhere.exists() and same_outcomes(cold, out)
    assert count_cached(tasks, shared, tmp_path / "missing") == 0


def test_built_in_moved_to_another_module_keeps_its_cache(tmp_path, monkeypatch):
    """A built-in is keyed by kind and version, not by the module that holds it."""
    import types

    from runner.forecasters import registry

    spec = ForecasterSpec(name="a", kind="arima", role="candidate", params={"order": [1, 0, 0]})
    tasks, shared = macro_work([spec], folds=2)
    ex = ExecutionConfig(jobs=1, cache=str(tmp_path / "c"))
    cold, c1 = forecast_models(tasks, shared, ex, quiet=True)
    assert c1.computed == len(tasks)
    # Move the class to a module of another name, as a reorganisation of the package would.
    module_name, _, attr = registry.BUILTIN["arima"].partition(":")
    moved = types.ModuleType("castgrid_relocated_models")
    setattr(moved, attr, getattr(importlib.import_module(module_name), attr))
    monkeypatch.setitem(sys.modules, "castgrid_relocated_models", moved)
    monkeypatch.setitem(registry.BUILTIN, "arima", f"castgrid_relocated_models:{attr}")
    registry.load_entry.cache_clear()
    try:
        warm, c2 = forecast_models(tasks, shared, ex, quiet=True)
    finally:
        registry.load_entry.cache_clear()
    assert (c2.cached, c2.computed) == (len(tasks), 0)
    assert same_outcomes(cold, warm)


def test_identical_tasks_in_one_run_are_computed_once(tmp_path):
    specs = [plugin("a", "LineFit"), plugin("b", "LineFit")]  # same identity, two names
    tasks, shared = macro_work(specs, columns=["realgdp", "realcons"])
    out, counts = forecast_models(tasks, shared, ExecutionConfig(jobs=1, cache=str(tmp_path)),
                                  quiet=True)
    half = len(tasks) // 2
    assert (counts.computed, counts.cached) == (half, half)
    assert same_outcomes(
        out[:half], [dataclasses.replace(o, index=o.index - half) for o in out[half:]]
    )


def _folds(values_per_series: list[np.ndarray], n_folds: int = 5, horizon: int = 4):
    from runner.windows.folds import Scheme, fold_bounds

    specs = [plugin("line", "LineFit"), plugin("half", "LineFit", weight=0.5)]
    flat = np.concatenate(values_per_series)
    tasks, offset = [], 0
    for v in values_per_series:
        scheme = Scheme("expanding", train=20, horizon=horizon, step=horizon, folds=n_folds)
        bounds = fold_bounds(len(v), scheme) + offset
        for f in range(len(specs)):
            for a, b, c, _ in bounds:
                tasks.append(ModelTask(len(tasks), f, 0, int(a), int(b), int(c), 4))
        offset += len(v)
    return tasks, SharedData([flat], [None], specs, horizon, ())


def test_incremental_reruns_after_appending_and_after_revising(tmp_path):
    data = macrodata.load_pandas().data
    series = [data[c].to_numpy(float) for c in ("realgdp", "realcons", "realinv")]
    ex = ExecutionConfig(jobs=1, cache=str(tmp_path))
    tasks, shared = _folds([s[:60] for s in series])
    _, cold = forecast_models(tasks, shared, ex, quiet=True)
    assert cold.computed == 3 * 2 * 5
    # one step (4 quarters) of new observations: each series gets one new fold per forecaster
    tasks, shared = _folds([s[:64] for s in series])
    out, counts = forecast_models(tasks, shared, ex, quiet=True)
    assert (counts.computed, counts.cached) == (3 * 2, 3 * 2 * 4)
    fresh, _ = forecast_models(tasks, shared, ex, use_cache=False, quiet=True)
    assert same_outcomes(out, fresh)
    # revise quarter 45 of realcons: the folds whose training slice holds it recompute
    revised = [s[:64].copy() for s in series]
    revised[1][45] *= 1.01
    tasks, shared = _folds(revised)
    saw_it = sum(1 for t in tasks if t.start <= 64 + 45 < t.end)
    assert 0 < saw_it < len(tasks) // 3
    out, counts = forecast_models(tasks, shared, ex, quiet=True)
    assert (counts.computed, counts.cached) == (saw_it, len(tasks) - saw_it)


def test_truncated_or_garbage_cache_file_is_moved_aside_and_rebuilt(tmp_path, capfd):
    tasks, shared = macro_work([plugin("line", "LineFit")])
    ex = ExecutionConfig(jobs=1, cache=str(tmp_path))
    first, _ = forecast_models(tasks, shared, ex, quiet=True)
    path = tmp_path / CACHE_FILE
    with sqlite3.connect(path) as conn:  # fold the write-ahead log into the file first
        conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    size = path.stat().st_size
    with open(path, "r+b") as fh:
        fh.truncate(size // 2)
    capfd.readouterr()
    out, counts = forecast_models(tasks, shared, ex, quiet=True)
    err = capfd.readouterr().err
    assert "forecast cache" in err and "damaged" in err and "damaged-1" in err
    assert (tmp_path / f"{CACHE_FILE}.damaged-1").exists()
    assert counts.computed == len(tasks) and same_outcomes(first, out)
    path.write_bytes(b"this is not a database at all" * 100)
    out, counts = forecast_models(tasks, shared, ex, quiet=True)
    assert "damaged-2" in capfd.readouterr().err
    assert counts.computed == len(tasks)
    _, counts = forecast_models(tasks, shared, ex, quiet=True)
    assert counts.cached == len(tasks) and capfd.readouterr().err.count("damaged") == 0


def test_two_runs_sharing_a_cache_at_once_do_not_corrupt_it(tmp_path):
    script = textwrap.dedent(f"""
        import sys
        sys.path[:0] = [{str(REPO / 'tests')!r}]
        from test_parallel import macro_work, plugin
        from runner.config import ExecutionConfig, ForecasterSpec
        from runner.execution.dispatch import forecast_models
        tasks, shared = macro_work([plugin("slow", "SlowLine", delay=0.015,
                                           weight=float(sys.argv[1]))],
                                   columns=["realgdp", "realcons", "realinv", "cpi", "m1"],
                                   folds=20, length=120)
        out, counts = forecast_models(tasks, shared, ExecutionConfig(jobs=1,
                                      cache={str(tmp_path)!r}), quiet=True)
        print(counts.computed, counts.cached, counts.failed)
    """)
    runs = [
        subprocess.Popen([sys.executable, "-c", script, w], stdout=subprocess.PIPE, text=True)
        for w in ("1.0", "2.0")
    ]
    results = [r.communicate(timeout=120)[0].split() for r in runs]
    assert all(r.returncode == 0 for r in runs)
    assert all(int(r[2]) == 0 and int(r[0]) + int(r[1]) == 100 for r in results)
    # a third run finds everything both wrote
    tasks, shared = macro_work([plugin("slow", "SlowLine", delay=0.015, weight=2.0)],
                               columns=["realgdp", "realcons", "realinv", "cpi", "m1"],
                               folds=20, length=120)
    _, counts = forecast_models(tasks, shared, ExecutionConfig(jobs=1, cache=str(tmp_path)),
                                quiet=True)
    assert counts.cached == 100
    with ForecastCache.open(tmp_path) as cache:
        assert cache.conn.execute("PRAGMA integrity_check").fetchall() == [("ok",)]
        assert cache.entries() == 200
        assert cache.by_kind() == [("plugin", 200)]


def test_cache_info_and_prune_commands(tmp_path, cli):
    csv = tmp_path / "macro.csv"
    data = macrodata.load_pandas().data
    frame = data[["realgdp", "realcons"]].iloc[:48].copy()
    frame.insert(0, "quarter", range(48))
    frame.to_csv(csv, index=False)

    def config(name: str, models: str) -> Path:
        p = tmp_path / f"{name}.yaml"
        p.write_text(textwrap.dedent(f"""
            experiment: {name}
            horizon: 4
            datasets:
              - {{name: macro, path: macro.csv, layout: wide, time: quarter, season: 4}}
            windows: {{scheme: expanding, train: 36, step: 4}}
            baselines: [naive, seasonal_naive]
            models: [{models}]
            execution: {{jobs: 1, cache: {tmp_path / 'cache'}}}
        """))
        return p

    both = config("both", "{name: theta, kind: theta}, {name: ets, kind: ets}")
    theta_only = config("theta", "{name: theta, kind: theta}")
    from runner.execution.model_tasks import build_model_tasks
    from runner.pipeline import prepare

    tasks, shared = build_model_tasks(prepare(both))
    assert len(tasks) == 2 * 2 * 3
    forecast_models(tasks, shared, ExecutionConfig(jobs=1, cache=str(tmp_path / "cache")),
                    quiet=True)
    r = cli("cache", "info", "--dir", str(tmp_path / "cache"))
    assert r.returncode == 0, r.stderr
    assert "entries  12" in r.stdout and "ets" in r.stdout and "theta" in r.stdout
    r = cli("cache", "prune", str(theta_only), "--dry-run")
    assert r.returncode == 0, r.stderr
    assert "would drop 6 of 12" in r.stdout
    r = cli("cache", "prune", str(theta_only))
    assert r.returncode == 0 and "dropped 6 of 12" in r.stdout, r.stdout + r.stderr
    r = cli("cache", "info", str(theta_only))
    assert "entries  6" in r.stdout and "ets" not in r.stdout
    theta_tasks, theta_shared = build_model_tasks(prepare(theta_only))
    assert count_cached(theta_tasks, theta_shared, tmp_path / "cache") == 6
