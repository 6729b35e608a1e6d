"""Runs in chunks of series: the same results whatever the chunk size, and no more than one
chunk's forecasts in memory.

The data are invented (seeded random walks, one constant series so that the scaled metrics are
undefined somewhere, one series too short for every fold) and a test plugin fails on one fold
(tests/fault_plugins.py); the comparison is of castgrid with itself: a run of one chunk against
the same run in chunks of 2 series.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

import runner
from runner.pipeline import prepare
from runner.scoring.evaluate import evaluate, series_chunks

CONFIG = """
experiment: chunked
horizon: 4
season: 4
datasets:
  - {{name: a, path: a.csv, series: s, time: t, target: y}}
  - {{name: b, path: b.csv, series: s, time: t, target: y}}
windows: {{scheme: expanding, train: 16, step: 4, folds: 3}}
models:
  - {{name: touchy, kind: plugin, entry: 'fault_plugins:Raises', params: {{when_length: 24}}}}
  - {{name: avg, kind: combination, params: {{of: [naive, touchy]}}}}
  - {{name: pick, kind: best_so_far, params: {{among: [naive, seasonal_naive, avg]}}}}
metrics: [mae, rmse, mase, smape, coverage]
intervals: [80]
execution: {{jobs: 1, cache: false, chunk: {chunk}}}
"""


def _write(folder: Path, chunk: int) -> Path:
    rng = np.random.default_rng(4)
    for name, n in (("a", 7), ("b", 4)):
        rows = []
        for i in range(n):
            length = 28 + (i % 3) * 4 if i != 1 else 12  # series 1: too short for any fold
            y = 50 + rng.normal(0, 2, length).cumsum() + 5 * np.sin(np.arange(length))
            if i == 2:
                y = np.full(length, 7.0)  # constant: mase and smape undefined in places
            rows += [{"s": f"{name}{i}", "t": t, "y": float(v)} for t, v in enumerate(y)]
        pd.DataFrame(rows).to_csv(folder / f"{name}.csv", index=False)
    cfg = folder / f"c{chunk}.yaml"
    cfg.write_text(CONFIG.format(chunk=chunk))
    return cfg


@pytest.fixture(scope="module")
def two_runs(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("chunks")
    outs = []
    for chunk in (10_000, 2):
        out = folder / f"out{chunk}"
        runner.run(_write(folder, chunk), out_dir=out)
        outs.append(out)
    return outs[0], outs[1]


def _decoded(path: Path) -> pd.DataFrame:
    frame = pq.read_table(path).to_pandas()
    for col in ("dataset", "series", "forecaster"):
        frame[col] = frame[col].astype(str)
    return frame


def test_leaderboard_bytes_do_not_depend_on_the_chunk(two_runs: tuple[Path, Path]) -> None:
    whole, chunked = two_runs
    for name in ("leaderboard.csv", "leaderboard.md", "failures.csv", "selection.csv"):
        assert (whole / name).read_bytes() == (chunked / name).read_bytes(), name
    board = pd.read_csv(whole / "leaderboard.csv")
    assert board["failed"].sum() > 0  # the plugin's fold, and what is made from it


def test_scores_are_the_same_rows(two_runs: tuple[Path, Path]) -> None:
    whole, chunked = two_runs
    pd.testing.assert_frame_equal(_decoded(whole / "scores.parquet"),
                                  _decoded(chunked / "scores.parquet"))
    assert pq.ParquetFile(chunked / "scores.parquet").metadata.num_row_groups > 1


def test_forecasts_are_the_same_rows_in_chunk_order(two_runs: tuple[Path, Path]) -> None:
    whole, chunked = two_runs
    keys = ["dataset", "forecaster", "series", "fold", "step"]
    a = _decoded(whole / "forecasts.parquet").sort_values(keys).reset_index(drop=True)
    b = _decoded(chunked / "forecasts.parquet").sort_values(keys).reset_index(drop=True)
    pd.testing.assert_frame_equal(a, b)


def test_horizon_means_add_up_from_chunks(two_runs: tuple[Path, Path]) -> None:
    # per-step means are sums over chunks divided by counts: equal up to the order of the
    # additions (the file prints 6 significant digits)
    whole, chunked = two_runs
    a, b = pd.read_csv(whole / "horizon.csv"), pd.read_csv(chunked / "horizon.csv")
    pd.testing.assert_frame_equal(a, b, rtol=1e-12)


def test_a_chunk_holds_its_series_whole_and_no_more(tmp_path: Path) -> None:
    plan = prepare(_write(tmp_path, 2))
    seen = []
    ev = evaluate(plan, quiet=True, sink=lambda c: seen.append(
        (c.dataset, c.tasks, np.unique(c.plan.series).tolist())))
    for d, dp in enumerate(plan.datasets):
        mine = [(t, s) for dd, t, s in seen if dd == d]
        assert [t for t, _ in mine] == list(series_chunks(dp, 2))
        assert all(len(s) <= 2 for _, s in mine)
        covered = np.concatenate([np.arange(t.start, t.stop) for t, _ in mine])
        assert covered.tolist() == list(range(dp.n_tasks))  # every task once, in order
        assert sorted(x for _, s in mine for x in s) == sorted(set(dp.series.tolist()))
        # nothing of the forecasts is kept once the chunks are written
        assert all(r.point is None for r in ev.datasets[d].results)
