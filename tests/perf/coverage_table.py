"""Print the interval coverage of every built-in forecaster on its own model (80% and 95%).

Each row simulates series from the process the method's interval is derived from (see
``tests/coverage_sim.py``), fits on the first ``train`` values, forecasts ``horizon`` steps and
pools the share of future values inside the interval. ``se`` is the estimated standard error of
the pooled coverage (points; per-series clusters), ``max`` its upper bound sqrt(p(1-p)/n). A
dash means the forecaster gives no interval.

    PYTHONPATH=<checkout> python tests/perf/coverage_table.py [--size table] [--only NAME ...]

The script imports ``runner`` from PYTHONPATH, so the same script measures any checkout
(e.g. an exported older commit) with identical simulated series (fixed seeds).
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/, for coverage_sim

from coverage_sim import CASES, LEVELS, measure  # noqa: E402


def _fmt(value: float) -> str:
    return "  -  " if math.isnan(value) else f"{value:5.1f}"


def _se(value: float) -> str:
    return "  - " if math.isnan(value) else f"{value:4.1f}"


def main() -> None:
    """Measure and print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--size", default="table", help="which case size to use (ci, table, slow)")
    parser.add_argument("--only", nargs="*", default=None, help="case names to run")
    args = parser.parse_args()
    import runner

    print(f"runner from {Path(runner.__file__).resolve().parent}")
    header = f"{'case':<22} {'process':<44} {'n':>6} {'T':>4} {'h':>3}"
    header += "".join(f" {f'{lv:g}%':>6} {'se':>4} {'max':>4}" for lv in LEVELS)
    header += "  fail  secs"
    print(header)
    print("-" * len(header))
    for case in CASES:
        if args.only and case.name not in args.only:
            continue
        n = case.series.get(args.size)
        if n is None:
            continue
        t0 = time.perf_counter()
        got = measure(case, n)
        row = f"{case.name:<22} {case.process:<44} {got.series:>6} {case.train:>4} "
        row += f"{case.horizon:>3}"
        for lv in LEVELS:
            row += f" {_fmt(got.coverage[lv]):>6} {_se(got.cluster_error(lv))} "
            row += f"{got.standard_error(lv):4.1f}"
        row += f"  {got.failed:>4}  {time.perf_counter() - t0:4.0f}"
        print(row, flush=True)


if __name__ == "__main__":
    main()
