"""Benchmark: N monthly series of 120 observations, all six baselines, expanding windows,
5 folds, horizon 12, through ``castgrid run --no-cache --quiet`` end to end (a subprocess).

Prints, per round, the wall time and the CPU time of the run (user + system of the child
process, from ``resource.getrusage(RUSAGE_CHILDREN)``, which load from other processes on a
shared machine inflates far less than the wall time); then the best round, the peak resident
memory of the run (``ru_maxrss`` of the children) and the size of every file written.

Targets (2-core machine): 10,000 series under 3 s; 100,000 series under 25 s and 2 GiB;
1,000,000 series under 5 min and 6 GiB (with ``--forecasts none``).

    python tests/perf/bench_baselines.py [--series 10000] [--rounds 3] [--format csv]
        [--forecasts all|compared|none] [--chunk N] [--keep DIR]

The series are random (seeded) seasonal walks: synthetic load, not demo data. ``--format
parquet`` writes the data as Parquet (much faster to write and read for a million series).
"""

from __future__ import annotations

import argparse
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

LENGTH = 120
#: Series generated per block, so that writing a million series needs little memory.
BLOCK = 50_000


def make_data(folder: Path, n_series: int, fmt: str) -> Path:
    """Write the long table (item, month, qty) as CSV or Parquet, in blocks of series."""
    import pyarrow as pa
    import pyarrow.csv as pcsv
    import pyarrow.parquet as pq

    rng = np.random.default_rng(0)
    months = np.arange("2015-01", "2025-01", dtype="datetime64[M]").astype("datetime64[D]")
    assert len(months) == LENGTH
    season = 10 * np.sin(2 * np.pi * np.arange(LENGTH) / 12)
    path = folder / f"bench.{fmt}"
    writer = None
    try:
        for lo in range(0, n_series, BLOCK):
            n = min(BLOCK, n_series - lo)
            values = 100 + rng.normal(0, 2, (n, LENGTH)).cumsum(axis=1) + season
            names = np.char.add("s", np.char.zfill(np.arange(lo, lo + n).astype(str), 7))
            table = pa.table({
                "item": pa.DictionaryArray.from_arrays(
                    pa.array(np.repeat(np.arange(n, dtype=np.int32), LENGTH)), pa.array(names)
                ) if fmt == "parquet" else pa.array(np.repeat(names, LENGTH)),
                "month": pa.array(np.tile(months, n)) if fmt == "parquet"
                else pa.array(np.tile(months.astype(str), n)),
                "qty": pa.array(np.round(values.ravel(), 3)),
            })
            if writer is None:
                writer = (pq.ParquetWriter(path, table.schema) if fmt == "parquet"
                          else pcsv.CSVWriter(path, table.schema))
            writer.write_table(table)
    finally:
        if writer is not None:
            writer.close()
    return path


def config_text(data: Path, forecasts: str | None, chunk: int | None) -> str:
    out = [
        "experiment: bench-baselines",
        "horizon: 12",
        "datasets:",
        "  - name: items",
        f"    path: {data.name}",
        "    series: item",
        "    time: month",
        "    target: qty",
        "windows: {scheme: expanding, train: 48, step: 12, folds: 5}",
        "execution: {jobs: 1, cache: false"
        + ("}" if chunk is None else f", chunk: {chunk}}}"),
    ]
    if forecasts is not None:
        out.append(f"output: {{forecasts: {forecasts}}}")
    return "\n".join(out) + "\n"


def children_cpu() -> float:
    ru = resource.getrusage(resource.RUSAGE_CHILDREN)
    return ru.ru_utime + ru.ru_stime


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--series", type=int, default=10_000)
    ap.add_argument("--rounds", type=int, default=1, help="runs; the best is reported")
    ap.add_argument("--format", choices=("csv", "parquet"), default="csv")
    ap.add_argument("--forecasts", choices=("all", "compared", "none"), default=None,
                    help="output.forecasts (left out of the config when not given)")
    ap.add_argument("--chunk", type=int, default=None, help="execution.chunk (series per chunk)")
    ap.add_argument("--keep", default=None, help="work in this folder and keep it")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(args.keep or tmp)
        folder.mkdir(parents=True, exist_ok=True)
        t0 = time.perf_counter()
        data = make_data(folder, args.series, args.format)
        print(f"data: {args.series:,} series x {LENGTH} obs ({args.format}, "
              f"{data.stat().st_size / 2**20:.0f} MiB) written in {time.perf_counter() - t0:.1f} s")
        cfg = folder / "bench.yaml"
        cfg.write_text(config_text(data, args.forecasts, args.chunk))
        walls, cpus = [], []
        for r in range(args.rounds):
            # a new results folder each round: nothing of an earlier round (its plots) is reused
            out = folder / f"out{r}"
            shutil.rmtree(folder / f"out{r - 1}", ignore_errors=True)
            load = os.getloadavg()[0]
            cpu0 = children_cpu()
            t0 = time.perf_counter()
            res = subprocess.run(
                [sys.executable, "-m", "runner", "run", str(cfg), "--out", str(out),
                 "--quiet", "--no-cache"],
                capture_output=True, text=True,
            )
            walls.append(time.perf_counter() - t0)
            cpus.append(children_cpu() - cpu0)
            if res.returncode != 0:
                print(res.stderr)
                return 1
            print(f"  round {r + 1}: {walls[-1]:.2f} s wall, {cpus[-1]:.2f} s CPU "
                  f"(load average {load:.1f} on {os.cpu_count()} cores)")
        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        tasks = args.series * 5 * 6
        print(f"castgrid run, {args.series:,} series, {tasks:,} tasks: best {min(walls):.2f} s "
              f"wall, {min(cpus):.2f} s CPU, peak RSS {peak:,.0f} MiB")
        for f in sorted(out.iterdir()):
            if f.is_file():
                print(f"  {f.name:20s} {f.stat().st_size / 2**20:9.2f} MiB")
        plots = out / "plots"
        if plots.is_dir():
            size = sum(p.stat().st_size for p in plots.iterdir())
            print(f"  {'plots/':20s} {size / 2**20:9.2f} MiB")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
