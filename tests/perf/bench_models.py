"""Benchmark: castgrid's per-task path for statsmodels models against a plain statsmodels loop.

Target: with 200 series, 5 folds, ARIMA(1,1,1) and theta, jobs=1 and no cache, castgrid's wall
time (building the tasks and running them through ``runner.execution.engines.execute``) is at most
1.03 times that of a plain loop that calls statsmodels directly on the same training slices.

The series are synthetic (seeded random walks with a yearly season); only the timing matters,
and both paths must produce the same forecasts (counted). Rounds alternate between the paths
(rotating which goes first) so that load from other processes hits all alike; the best round
of each is compared. castgrid's serial path holds BLAS to one thread (as its worker processes
do), which is faster for these small fits than BLAS's default threads, so a third path, the
plain loop under the same one-thread limit (threadpoolctl), isolates castgrid's own overhead.

    python tests/perf/bench_models.py [--series 200] [--rounds 2] [--paired] [--profile]
"""

from __future__ import annotations

import argparse
import cProfile
import pstats
import time
import warnings

import numpy as np
from statsmodels.tsa.arima.model import ARIMA
from statsmodels.tsa.forecasting.theta import ThetaModel

from runner.config import ForecasterSpec
from runner.execution.engines import execute
from runner.execution.tasks import ModelTask, SharedData, run_model_task
from runner.windows.folds import Scheme, fold_bounds

HORIZON, SEASON, FOLDS, TRAIN = 6, 12, 5, 60


def make_series(count: int, seed: int = 0) -> list[np.ndarray]:
    """Synthetic monthly series: level + random walk + yearly season + noise (seeded)."""
    rng = np.random.default_rng(seed)
    n = TRAIN + (FOLDS - 1) * HORIZON + HORIZON
    t = np.arange(n)
    out = []
    for _ in range(count):
        season = rng.uniform(1, 5) * np.sin(2 * np.pi * t / SEASON + rng.uniform(0, 6))
        out.append(100 + np.cumsum(rng.normal(0, 1, n)) + season + rng.normal(0, 1, n))
    return out


def build(values: list[np.ndarray]) -> tuple[list[ModelTask], SharedData]:
    """The run's tasks (series-major, then forecaster, then fold) and its shared data."""
    specs = [
        ForecasterSpec(name="arima", kind="arima", role="candidate", params={"order": [1, 1, 1]}),
        ForecasterSpec(name="theta", kind="theta", role="candidate", params={}),
    ]
    scheme = Scheme(kind="expanding", train=TRAIN, horizon=HORIZON, step=HORIZON, folds=FOLDS)
    tasks = []
    for d, y in enumerate(values):
        for f in range(len(specs)):
            for start, end, test_start, _ in fold_bounds(len(y), scheme):
                tasks.append(
                    ModelTask(len(tasks), f, d, int(start), int(end), int(test_start), SEASON)
                )
    shared = SharedData(
        values=values,
        covariates=[None] * len(values),
        forecasters=specs,
        horizon=HORIZON,
        levels=(),
    )
    return tasks, shared


def castgrid_path(values: list[np.ndarray]) -> list[np.ndarray]:
    """Build the tasks and run them as a castgrid run does (jobs=1, no cache)."""
    tasks, shared = build(values)
    outcomes = execute(tasks, shared, jobs=1)
    return [o.point if o.ok else np.full(HORIZON, np.nan) for o in outcomes]


def plain_loop(values: list[np.ndarray]) -> list[np.ndarray]:
    """statsmodels called directly on the same slices, in the same order."""
    scheme = Scheme(kind="expanding", train=TRAIN, horizon=HORIZON, step=HORIZON, folds=FOLDS)
    out = []
    for y in values:
        bounds = fold_bounds(len(y), scheme)
        for model in ("arima", "theta"):
            for start, end, _, _ in bounds:
                train = y[start:end]
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    if model == "arima":
                        fc = ARIMA(train, order=(1, 1, 1)).fit().forecast(HORIZON)
                    else:
                        fc = ThetaModel(train, period=SEASON).fit().forecast(HORIZON).to_numpy()
                out.append(np.asarray(fc, dtype=float))
    return out


def direct_fit(train: np.ndarray, model: str) -> np.ndarray:
    """One direct statsmodels fit and forecast, as the plain loop does it."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if model == "arima":
            return np.asarray(ARIMA(train, order=(1, 1, 1)).fit().forecast(HORIZON))
        return ThetaModel(train, period=SEASON).fit().forecast(HORIZON).to_numpy()


def paired(values: list[np.ndarray]) -> tuple[float, float]:
    """Per task, a direct fit and castgrid's run_model_task back to back (BLAS one thread).

    Slow spells of the machine then hit both sides of each pair alike, so the ratio of the
    sums measures castgrid's own per-task cost with little noise.
    """
    from threadpoolctl import threadpool_limits

    tasks, shared = build(values)
    direct_s = castgrid_s = 0.0
    with threadpool_limits(1):
        for i, task in enumerate(tasks):
            train = shared.values[task.dataset][task.start : task.end]
            model = shared.forecasters[task.forecaster].kind
            order = ("direct", "castgrid") if i % 2 == 0 else ("castgrid", "direct")
            for side in order:
                t0 = time.perf_counter()
                if side == "direct":
                    direct_fit(train, model)
                    direct_s += time.perf_counter() - t0
                else:
                    run_model_task(task, shared)
                    castgrid_s += time.perf_counter() - t0
    return direct_s, castgrid_s


def plain_loop_one_thread(values: list[np.ndarray]) -> list[np.ndarray]:
    """The plain loop with BLAS held to one thread, as castgrid's serial path holds it."""
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1):
        return plain_loop(values)


def main() -> None:
    """Time both paths and print the figures."""
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=200)
    ap.add_argument("--rounds", type=int, default=2)
    ap.add_argument("--profile", action="store_true", help="profile one castgrid round")
    ap.add_argument(
        "--paired", action="store_true", help="also time each task direct vs castgrid in pairs"
    )
    args = ap.parse_args()
    values = make_series(args.series)
    n_tasks = args.series * FOLDS * 2
    castgrid_path(values[:2])  # imports and registry look-ups, outside the timing
    plain_loop(values[:2])
    paths = (
        ("plain", plain_loop),
        ("plain-1blas", plain_loop_one_thread),
        ("castgrid", castgrid_path),
    )
    times: dict[str, list[float]] = {name: [] for name, _ in paths}
    results: dict[str, list[np.ndarray]] = {}
    for r in range(args.rounds):
        # Rotate which path goes first, so a slow spell of the machine is shared out.
        for name, fn in paths[r % len(paths) :] + paths[: r % len(paths)]:
            t0 = time.perf_counter()
            results[name] = fn(values)
            times[name].append(time.perf_counter() - t0)
    # Same forecasts (castgrid's task order is forecaster-major per series, like the loop's),
    # except where statsmodels stopped at its 50 iterations unconverged: castgrid allows 200.
    pairs = list(zip(results["castgrid"], results["plain-1blas"]))
    same = sum(bool(np.allclose(a, b, rtol=1e-9, atol=0)) for a, b in pairs)
    failed = sum(bool(np.isnan(a).any()) for a, _ in pairs)
    best = {k: min(v) for k, v in times.items()}
    ratio = best["castgrid"] / best["plain"]
    ratio_1 = best["castgrid"] / best["plain-1blas"]
    print(f"{args.series} series x {FOLDS} folds x 2 models = {n_tasks} fits, jobs=1, no cache")
    for name, _ in paths:
        rounds = ", ".join(f"{t:.2f}" for t in times[name])
        print(
            f"  {name:11s} best {best[name]:7.2f} s  ({best[name] / n_tasks * 1e3:.2f} ms/fit; "
            f"rounds: {rounds})"
        )
    verdict = "met" if ratio <= 1.03 else "NOT met"
    print(f"  ratio castgrid / plain: {ratio:.3f}  (target <= 1.03: {verdict})")
    # castgrid holds BLAS to one thread (as its workers do), which on small fits is faster than
    # the default threads; against a loop held the same way the ratio is castgrid's own cost.
    verdict_1 = "met" if ratio_1 <= 1.03 else "NOT met"
    print(f"  ratio castgrid / plain-1blas: {ratio_1:.3f}  (target <= 1.03: {verdict_1})")
    over = (best["castgrid"] - best["plain-1blas"]) / n_tasks * 1e3
    print(f"  castgrid overhead per task against plain-1blas: {over:.3f} ms")
    print(
        f"  forecasts equal to the plain loop's: {same} of {len(pairs)} "
        f"(castgrid failures recorded: {failed}; the rest are fits statsmodels left "
        "unconverged at 50 iterations, which castgrid's default of 200 lets finish)"
    )
    if args.paired:
        direct_s, castgrid_s = paired(values)
        print(
            f"  paired per task (BLAS one thread): direct {direct_s:.2f} s, run_model_task "
            f"{castgrid_s:.2f} s, ratio {castgrid_s / direct_s:.3f}, overhead "
            f"{(castgrid_s - direct_s) / n_tasks * 1e3:.3f} ms/task"
        )
    if args.profile:
        prof = cProfile.Profile()
        prof.runcall(castgrid_path, values[: max(1, args.series // 10)])
        stats = pstats.Stats(prof).sort_stats("tottime")
        stats.print_stats(r"runner/", 25)


if __name__ == "__main__":
    main()
