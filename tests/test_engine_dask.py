"""engine: dask on a real dask.distributed scheduler and workers on 127.0.0.1, and the same
leaderboard bytes from every way of running (jobs=1, jobs=2, dask, warm cache).

Data: ``statsmodels.datasets.macrodata`` (open dataset bundled with statsmodels).
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
from distributed import Client
from statsmodels.datasets import macrodata
from test_parallel import macro_work, plugin, same_outcomes

from runner.config import ExecutionConfig, ForecasterSpec
from runner.execution.dispatch import forecast_models
from runner.execution.engines import execute


@pytest.fixture(scope="module")
def scheduler(tmp_path_factory):
    """A dask scheduler and two single-threaded workers, each in its own process."""
    folder = tmp_path_factory.mktemp("dask")
    info = folder / "scheduler.json"
    procs = [subprocess.Popen(
        [sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1",
         "--port", "0", "--no-dashboard", "--scheduler-file", str(info)],
        stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )]
    try:
        deadline = time.monotonic() + 300  # a guard against a hang, not a measure
        while not info.exists() or not info.read_text().strip():
            assert time.monotonic() < deadline, "the dask scheduler did not start"
            time.sleep(0.1)
        address = json.loads(info.read_text())["address"]
        procs.append(subprocess.Popen(
            [sys.executable, "-m", "distributed.cli.dask_worker", address, "--nworkers", "2",
             "--nthreads", "1", "--no-dashboard", "--host", "127.0.0.1"],
            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
        ))
        with Client(address, timeout="30s") as client:
            client.wait_for_workers(2, timeout=300)
        yield address
    finally:
        if len(procs) == 2:
            try:
                with Client(address, timeout="10s") as client:
                    client.shutdown()  # scheduler and workers, at once
            except Exception:
                pass
        for p in reversed(procs):
            if p.poll() is None:
                p.terminate()
        for p in procs:
            try:
                p.wait(timeout=3)
            except subprocess.TimeoutExpired:
                p.kill()


def test_dask_cluster_gives_the_local_outcomes_and_isolates_faults(scheduler):
    theta = ForecasterSpec(name="theta", kind="theta", role="candidate", params={})
    specs = [plugin("line", "LineFit"), theta,
             plugin("stuck", "Stubborn", seconds=600, when_length=48),
             plugin("exits", "Exits", when_length=52)]
    tasks, shared = macro_work(specs, columns=["realgdp"], folds=3)
    keep = [k for k, t in enumerate(tasks) if t.forecaster < 2]
    # (in process, Stubborn would defeat the timer: it swallows the interruption)
    local = execute([tasks[k] for k in keep], shared, jobs=1)
    # Decided by outcomes, not by elapsed time: Stubborn holds its fit for 600 s, so only the
    # timer can give it reason "timeout"; the good fits (a line, theta on 48 quarters) stay far
    # inside 5 s however busy the machine is.
    remote = execute(tasks, shared, engine="dask", address=scheduler, fit_timeout=5.0)
    expected = {(2, 48): "timeout", (3, 52): "crash"}
    for t, o in zip(tasks, remote):
        assert o.reason == expected.get((t.forecaster, t.end - t.start)), (t, o.message)
    assert same_outcomes(local, [remote[k] for k in keep])


def test_dask_without_address_starts_a_local_cluster(tmp_path):
    tasks, shared = macro_work([plugin("line", "LineFit")], columns=["realgdp"])
    ex = ExecutionConfig(engine="dask", jobs=2, cache=str(tmp_path))
    out, counts = forecast_models(tasks, shared, ex, quiet=True)
    assert counts.computed == len(tasks)
    assert same_outcomes(out, execute(tasks, shared, jobs=1))


def _config(folder: Path, name: str, execution: str) -> Path:
    path = folder / f"{name}.yaml"
    path.write_text(textwrap.dedent(f"""
        experiment: {name}
        horizon: 4
        datasets:
          - {{name: macro, path: macro.csv, layout: wide, time: quarter, season: 4}}
        windows: {{scheme: expanding, train: 40, step: 4}}
        baselines: [naive, seasonal_naive, drift]
        models:
          - {{name: theta, kind: theta}}
          - {{name: line, kind: plugin, entry: "fault_plugins:LineFit"}}
        intervals: [80]
        execution: {execution}
    """))
    return path


def test_leaderboard_bytes_are_the_same_for_every_way_of_running(tmp_path, scheduler):
    import runner

    data = macrodata.load_pandas().data
    frame = data[["realgdp", "realcons", "cpi"]].iloc[:56].copy()
    frame.insert(0, "quarter", range(56))
    frame.to_csv(tmp_path / "macro.csv", index=False)
    cache = tmp_path / "cache"
    runs = {
        "serial": f"{{jobs: 1, cache: {cache}}}",
        "workers": "{jobs: 2, cache: false}",
        "dask": f"{{engine: dask, address: '{scheduler}', cache: false}}",
        "warm": f"{{jobs: 1, cache: {cache}}}",
    }
    boards = {}
    for name, execution in runs.items():
        result = runner.run(_config(tmp_path, name, execution), out_dir=tmp_path / name,
                            report=False)
        boards[name] = (tmp_path / name / "leaderboard.csv").read_bytes()
        tasks = result.manifest["tasks"]
        assert tasks["failed"] == 0, tasks
        if name == "warm":
            assert tasks["cached"] == 3 * 4 * 2, tasks  # 3 series x 4 folds x 2 models
    assert len(boards["serial"].splitlines()) == 1 + 5
    assert boards["workers"] == boards["serial"]
    assert boards["dask"] == boards["serial"]
    assert boards["warm"] == boards["serial"]
