"""Benchmark: ``engine: dask`` on a local cluster of two single-threaded workers against the
local engine with two worker processes, on an ARIMA(1,1,1) run (no cache).

Target: dask's throughput (tasks per second of wall time) within 10% of the local engine's on
10,000 series x 5 folds. Both runs include their start-up (worker processes, and for dask the
scheduler and the dask workers), as a user's run does.

    python tests/perf/bench_dask.py [--series 10000] [--rounds 1]

Prints wall time, CPU time (this process plus every finished child process, from
``resource.getrusage``) and throughput of each, the best of ``--rounds`` (alternating which
goes first), the ratio, and whether both gave the same forecasts. The series are synthetic
(seeded random walks with a yearly season): only the timing matters.
"""

from __future__ import annotations

import argparse
import os
import resource
import time

import numpy as np

from runner.config import ForecasterSpec
from runner.execution.engines import execute
from runner.execution.tasks import ModelTask, SharedData
from runner.windows.folds import Scheme, fold_bounds

HORIZON, FOLDS, TRAIN, LENGTH = 6, 5, 36, 66


def work(n_series: int) -> tuple[list[ModelTask], SharedData]:
    """ARIMA(1,1,1) tasks on ``n_series`` synthetic monthly series (expanding, 5 folds)."""
    rng = np.random.default_rng(0)
    t = np.arange(LENGTH)
    values = [100 + np.cumsum(rng.normal(0, 1, LENGTH)) + 3 * np.sin(2 * np.pi * t / 12)
              for _ in range(n_series)]
    flat = np.concatenate(values)
    scheme = Scheme("expanding", train=TRAIN, horizon=HORIZON, step=HORIZON, folds=FOLDS)
    tasks = []
    for i in range(n_series):
        for a, b, c, _ in fold_bounds(LENGTH, scheme) + i * LENGTH:
            tasks.append(ModelTask(len(tasks), 0, 0, int(a), int(b), int(c), 12))
    spec = ForecasterSpec(name="arima", kind="arima", role="candidate",
                          params={"order": [1, 1, 1]})
    return tasks, SharedData([flat], [None], [spec], HORIZON, ())


def cpu() -> float:
    own = resource.getrusage(resource.RUSAGE_SELF)
    kids = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + kids.ru_utime + kids.ru_stime


def timed(tasks, shared, engine: str) -> tuple[float, float, list]:
    c0, t0 = cpu(), time.perf_counter()
    out = execute(tasks, shared, jobs=2, engine=engine)
    return time.perf_counter() - t0, cpu() - c0, out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=10_000)
    ap.add_argument("--rounds", type=int, default=1)
    args = ap.parse_args()
    tasks, shared = work(args.series)
    print(f"{args.series:,} series x {FOLDS} folds, ARIMA(1,1,1): {len(tasks):,} fits; load "
          f"average at start {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    best: dict[str, tuple[float, float]] = {}
    outs = {}
    for r in range(args.rounds):
        for engine in (("local", "dask") if r % 2 == 0 else ("dask", "local")):
            wall, used, outs[engine] = timed(tasks, shared, engine)
            print(f"  round {r + 1} {engine:5s}: {wall:8.2f} s wall, {used:8.2f} s CPU, "
                  f"{len(tasks) / wall:7.1f} fits/s")
            if engine not in best or wall < best[engine][0]:
                best[engine] = (wall, used)
    same = all(
        a.reason == b.reason and (a.point is None or a.point.tobytes() == b.point.tobytes())
        for a, b in zip(outs["local"], outs["dask"])
    )
    ratio = best["local"][0] / best["dask"][0]
    print(f"dask throughput / local throughput: {ratio:.3f} (target >= 0.90: "
          f"{'met' if ratio >= 0.90 else 'NOT met'}); CPU dask / local: "
          f"{best['dask'][1] / best['local'][1]:.3f}; same forecasts: {same}")


if __name__ == "__main__":
    main()
