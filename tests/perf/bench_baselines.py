"""Benchmark: 10,000 monthly series of 120 observations, all six baselines, expanding windows,
5 folds, horizon 12, through ``castgrid run`` end to end. Prints wall time and peak memory.

Target: under 15 s and under 2 GiB on a 2-core machine.
Run: ``python tests/perf/bench_baselines.py``.
The series are random (seeded) seasonal walks: synthetic load, not demo data.
"""

from __future__ import annotations

import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

N_SERIES, LENGTH = 10_000, 120


def make_data(folder: Path) -> Path:
    rng = np.random.default_rng(0)
    months = pd.date_range("2015-01-01", periods=LENGTH, freq="MS")
    season = 10 * np.sin(2 * np.pi * np.arange(LENGTH) / 12)
    values = 100 + rng.normal(0, 2, (N_SERIES, LENGTH)).cumsum(axis=1) + season
    frame = pd.DataFrame({
        "item": np.repeat([f"s{i:05d}" for i in range(N_SERIES)], LENGTH),
        "month": np.tile(months.strftime("%Y-%m-%d"), N_SERIES),
        "qty": np.round(values.ravel(), 3),
    })
    path = folder / "bench.csv"
    frame.to_csv(path, index=False)
    return path


CONFIG = """
experiment: bench-baselines
horizon: 12
datasets:
  - name: items
    path: bench.csv
    series: item
    time: month
    target: qty
windows: {scheme: expanding, train: 48, step: 12, folds: 5}
execution: {jobs: 1, cache: false}
"""


def main() -> int:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        make_data(folder)
        print(f"data: {N_SERIES} series x {LENGTH} obs written in {time.perf_counter() - t0:.1f} s")
        cfg = folder / "bench.yaml"
        cfg.write_text(CONFIG)
        t0 = time.perf_counter()
        res = subprocess.run(
            [sys.executable, "-m", "runner", "run", str(cfg), "--out", str(folder / "out"),
             "--quiet"],
            capture_output=True, text=True,
        )
        wall = time.perf_counter() - t0
        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        if res.returncode != 0:
            print(res.stderr)
            return 1
        tasks = N_SERIES * 5 * 6
        print(f"castgrid run: {wall:.2f} s wall, peak RSS {peak:.0f} MiB, {tasks} tasks "
              f"(target < 15 s, < 2048 MiB)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
