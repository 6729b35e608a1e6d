"""Benchmark: load a long CSV of 10,000 series x 120 monthly observations (1.2M rows).

Prints the seconds taken by ``runner.data.load_panel`` (best of three) for the file as
written (rows shuffled, so the loader's sort does real work) and gzip-compressed.
Run: ``/opt/cg-venv/bin/python tests/perf/bench_load.py``.
"""

from __future__ import annotations

import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from runner.config import DatasetConfig
from runner.data import load_panel

N_SERIES, LENGTH = 10_000, 120


def write_panel(folder: Path) -> Path:
    rng = np.random.default_rng(0)
    months = pd.date_range("2012-01-01", periods=LENGTH, freq="MS").strftime("%Y-%m-%d")
    frame = pd.DataFrame(
        {
            "item": np.repeat([f"item-{i:05d}" for i in range(N_SERIES)], LENGTH),
            "month": np.tile(np.asarray(months), N_SERIES),
            "units": np.round(rng.gamma(4.0, 25.0, N_SERIES * LENGTH), 1),
            "promo": rng.integers(0, 2, N_SERIES * LENGTH),
        }
    ).sample(frac=1.0, random_state=1)
    path = folder / "panel.csv"
    frame.to_csv(path, index=False)
    frame.to_csv(folder / "panel.csv.gz", index=False)
    frame.sort_values(["item", "month"]).to_csv(folder / "sorted.csv", index=False)
    # 1% of the rows gone (never a series' first or last): gaps for missing: interpolate.
    inner = (frame["month"] != months[0]) & (frame["month"] != months[-1])
    drop = frame[inner].sample(frac=0.01, random_state=2).index
    frame.drop(index=drop).to_csv(folder / "gappy.csv", index=False)
    return path


def best_of(ds: DatasetConfig, folder: Path, runs: int = 3) -> tuple[float, int]:
    best, n = float("inf"), 0
    for _ in range(runs):
        start = time.perf_counter()
        panel = load_panel(ds, folder, None)
        best = min(best, time.perf_counter() - start)
        n = len(panel.values)
    return best, n


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        write_panel(folder)
        cases = (
            ("panel.csv", [], "error", "shuffled rows"),
            ("sorted.csv", ["promo"], "error", "sorted rows, one covariate"),
            ("panel.csv.gz", [], "error", "gzip, shuffled rows"),
            ("gappy.csv", [], "interpolate", "shuffled, 1% rows missing, interpolate"),
        )
        for name, cov, missing, what in cases:
            ds = DatasetConfig(
                name="bench", path=name, series="item", time="month", target="units",
                covariates=cov, missing=missing,
            )  # fmt: skip
            seconds, n = best_of(ds, folder)
            print(f"load_panel {name} ({what}): {n:,} values, {N_SERIES:,} series: {seconds:.2f} s")


if __name__ == "__main__":
    main()
