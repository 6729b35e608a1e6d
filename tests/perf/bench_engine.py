"""Benchmark of the execution engine: workers, warm cache, and a rerun after appended data.

200 series x 5 folds x {ARIMA(1,1,1), theta, ETS} (runner.forecasters.models, statsmodels
underneath), so 3,000 fits per run. Prints the wall-clock seconds of
:func:`runner.execution.dispatch.forecast_models` for:

* cold, jobs=1 (no cache) and cold, jobs=2 (filling a new cache): target jobs=2 >= 1.7x faster;
* warm, jobs=2 (the same tasks again): target >= 20x faster than the cold jobs=2 run;
* after appending one step (6 observations) to every series: target <= 1.5 x (share of new
  folds) x cold + 1 s.

The series are windows of open datasets bundled with statsmodels (macrodata, sunspots, Nile,
CO2, El Nino). Run: ``/opt/cg-venv/bin/python tests/perf/bench_engine.py [--series N]``.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time

import numpy as np
import statsmodels.api as sm

from runner.config import ExecutionConfig, ForecasterSpec
from runner.execution.dispatch import forecast_models
from runner.execution.tasks import ModelTask, SharedData
from runner.windows.folds import Scheme, fold_bounds

HORIZON, STEP, FOLDS, TRAIN, LENGTH = 6, 6, 5, 36, 72


def pool() -> list[np.ndarray]:
    """Long open series to cut benchmark windows from."""
    ds = sm.datasets
    macro = ds.macrodata.load_pandas().data
    out = [macro[c].to_numpy(float) for c in macro.columns if c not in ("year", "quarter")]
    out.append(ds.sunspots.load_pandas().data["SUNACTIVITY"].to_numpy(float))
    out.append(ds.nile.load_pandas().data["volume"].to_numpy(float))
    out.append(ds.co2.load_pandas().data["co2"].interpolate().to_numpy(float))
    out.append(ds.elnino.load_pandas().data.drop(columns="YEAR").to_numpy(float).ravel())
    return out


def windows(n_series: int, length: int) -> list[np.ndarray]:
    """``n_series`` windows of ``length`` (+ one step to append later) from the pool."""
    series, src = [], pool()
    k = 0
    while len(series) < n_series:
        s = src[k % len(src)]
        offset = (k // len(src)) * 7
        if offset + LENGTH + STEP > len(s):
            offset = offset % max(1, len(s) - LENGTH - STEP)
        series.append(s[offset : offset + length])
        k += 1
    return series


def work(series: list[np.ndarray]) -> tuple[list[ModelTask], SharedData]:
    specs = [
        ForecasterSpec(name="arima", kind="arima", role="candidate",
                       params={"order": [1, 1, 1]}),
        ForecasterSpec(name="theta", kind="theta", role="candidate", params={}),
        ForecasterSpec(name="ets", kind="ets", role="candidate", params={}),
    ]
    flat = np.concatenate(series)
    scheme = Scheme("expanding", train=TRAIN, horizon=HORIZON, step=STEP, folds=FOLDS)
    tasks, offset = [], 0
    for s in series:
        bounds = fold_bounds(len(s), scheme) + offset
        for f in range(len(specs)):
            for a, b, c, _ in bounds:
                tasks.append(ModelTask(len(tasks), f, 0, int(a), int(b), int(c), 4))
        offset += len(s)
    return tasks, SharedData([flat], [None], specs, HORIZON, (80.0,))


def timed(tasks, shared, **kw):
    t0 = time.perf_counter()
    out, counts = forecast_models(tasks, shared, ExecutionConfig(), quiet=True, **kw)
    return time.perf_counter() - t0, out, counts


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--series", type=int, default=200)
    args = parser.parse_args()
    tasks, shared = work(windows(args.series, LENGTH))
    print(f"{args.series} series x {FOLDS} folds x 3 models = {len(tasks)} tasks; "
          f"load average at start {os.getloadavg()[0]:.2f} on {os.cpu_count()} cores")
    with tempfile.TemporaryDirectory() as cache:
        t1, out1, c1 = timed(tasks, shared, jobs=1, cache_path=None)
        print(f"cold jobs=1            {t1:7.2f} s   {c1}")
        t2, out2, c2 = timed(tasks, shared, jobs=2, cache_path=cache)
        print(f"cold jobs=2 (+cache)   {t2:7.2f} s   {c2}   speed-up {t1 / t2:.2f}x "
              f"(target >= 1.7x)")
        same = all(
            a.reason == b.reason and (a.point is None or a.point.tobytes() == b.point.tobytes())
            for a, b in zip(out1, out2)
        )
        print(f"jobs=1 and jobs=2 bit-identical: {same}")
        t3, out3, c3 = timed(tasks, shared, jobs=2, cache_path=cache)
        print(f"warm jobs=2            {t3:7.2f} s   {c3}   {t2 / t3:.1f}x faster than cold "
              f"(target >= 20x)")
        tasks4, shared4 = work(windows(args.series, LENGTH + STEP))
        t4, _, c4 = timed(tasks4, shared4, jobs=2, cache_path=cache)
        share = c4.computed / len(tasks4)
        budget = 1.5 * share * t2 + 1.0
        print(f"appended one step      {t4:7.2f} s   {c4}   new-fold share {share:.2f}, "
              f"budget 1.5 x share x cold + 1 s = {budget:.2f} s "
              f"({'met' if t4 <= budget else 'MISSED'})")


if __name__ == "__main__":
    main()
