"""The Python API, the public names, and the byte-identical leaderboard guarantee."""

from __future__ import annotations

import numpy as np
import pandas as pd

import runner

CONFIG = """
experiment: api
horizon: 4
season: 4
datasets:
  - name: q
    path: q.csv
    series: [region, item]
    time: quarter
    target: sales
windows: {scheme: sliding, train: 16, step: 2}
intervals: [90]
metrics: [mae, rmse, mase, smape, coverage, winkler]
execution: {jobs: 1, cache: false}
"""


def _write(tmp):
    # Open data: statsmodels' US macro dataset (quarterly real GDP, consumption, investment),
    # arranged as six series keyed by two columns.
    from statsmodels.datasets import macrodata

    df = macrodata.load_pandas().data
    quarters = pd.period_range("1959Q1", periods=len(df), freq="Q").to_timestamp()
    rows = []
    for region, cols in (("us", ["realgdp", "realcons", "realinv"]),
                         ("gov", ["realgovt", "realdpi", "m1"])):
        for col in cols:
            rows.append(pd.DataFrame({"region": region, "item": col, "quarter": quarters,
                                      "sales": df[col].to_numpy()}))
    frame = pd.concat(rows).sample(frac=1.0, random_state=0)  # unsorted on purpose
    frame.to_csv(tmp / "q.csv", index=False)
    (tmp / "c.yaml").write_text(CONFIG)
    return tmp / "c.yaml"


def test_public_names_match_all():
    # every name in __all__ resolves, and every public non-module name is in __all__
    for name in runner.__all__:
        assert getattr(runner, name) is not None
    public = {n for n in dir(runner) if not n.startswith("_") or n == "__version__"}
    modules = {n for n in public if type(getattr(runner, n)).__name__ == "module"}
    assert set(runner.__all__) == public - modules - {"annotations", "importlib", "Any"}


def test_run_returns_dataframes_and_reruns_byte_identical(tmp_path):
    cfg = _write(tmp_path)
    a = runner.run(cfg, out_dir=tmp_path / "a", report=False)
    runner.run(cfg, out_dir=tmp_path / "b", report=False)
    assert isinstance(a.leaderboard, pd.DataFrame) and isinstance(a.scores, pd.DataFrame)
    assert (tmp_path / "a" / "leaderboard.csv").read_bytes() == (
        tmp_path / "b" / "leaderboard.csv").read_bytes()
    board = a.leaderboard
    assert set(board["forecaster"]) == {"naive", "moving_average", "seasonal_naive",
                                        "season_average", "drift", "mean"}
    assert list(board["rank"]) == list(range(1, 7))
    assert board.loc[board.forecaster == "seasonal_naive", "mase_rel"].item() == 1.0
    # six series keyed by two columns; 203 quarters, sliding 16, horizon 4, step 2
    assert (board["series"] == 6).all()
    assert set(a.scores["series"]) == {f"us/{c}" for c in ("realgdp", "realcons", "realinv")} | {
        f"gov/{c}" for c in ("realgovt", "realdpi", "m1")}
    n_folds = (203 - 16 - 4) // 2 + 1
    assert (board["folds"] == n_folds).all()
    # the scores' mean over tasks of one fold equals what the fold mean is built from
    s = a.scores[a.scores.forecaster == "naive"]
    fold_means = s.groupby("fold")["mae"].mean()
    naive_mae = board.loc[board.forecaster == "naive", "mae_mean"].item()
    assert np.isclose(naive_mae, fold_means.mean(), rtol=1e-12)


def test_results_folder_files(tmp_path):
    import json

    import pyarrow.parquet as pq

    cfg = _write(tmp_path)
    out = tmp_path / "out"
    runner.run(cfg, out_dir=out, report=False)
    for name in ("leaderboard.csv", "leaderboard.md", "scores.parquet", "horizon.csv",
                 "forecasts.parquet", "failures.csv", "manifest.json"):
        assert (out / name).exists(), name
    fc = pq.read_table(out / "forecasts.parquet").to_pandas()
    assert {"interval_90_low", "interval_90_high", "actual", "forecast", "time", "step"} <= set(
        fc.columns
    )
    # the actual at each forecast row is the observed value at that time (the data file)
    src = pd.read_csv(tmp_path / "q.csv")
    src["series"] = src["region"] + "/" + src["item"]
    src["time"] = pd.to_datetime(src["quarter"]).dt.strftime("%Y-%m-%d")
    merged = fc.astype({"series": str, "time": str}).merge(src, on=["series", "time"])
    assert len(merged) == len(fc)
    np.testing.assert_allclose(merged["actual"], merged["sales"])
    man = json.loads((out / "manifest.json").read_text())
    assert man["tasks"]["total"] == 6 * 6 * ((203 - 16 - 4) // 2 + 1)
    assert man["reference"] == {"q": "seasonal_naive"}


def test_gap_forecasts_through_the_gap(tmp_path):
    # With gap g, the scored block starts g steps after the training end, so a forecast for it
    # is the (g+1)..(g+h)-step-ahead forecast (common practice); drift makes that visible.
    import pyarrow.parquet as pq

    y = np.array([1.0, 2.0, 4.0, 7.0, 11.0, 16.0, 22.0, 29.0, 37.0, 46.0, 56.0, 67.0])
    pd.DataFrame({"t": np.arange(1, 13), "s": y}).to_csv(tmp_path / "g.csv", index=False)
    (tmp_path / "g.yaml").write_text(
        "experiment: gap\nhorizon: 2\nseason: 1\n"
        "datasets: [{name: g, path: g.csv, layout: wide, time: t}]\n"
        "windows: {train: 8, gap: 2, folds: 1}\nbaselines: [naive, drift]\n"
        "execution: {jobs: 1, cache: false}\n"
    )
    out = tmp_path / "out"
    runner.run(tmp_path / "g.yaml", out_dir=out, report=False)
    fc = pq.read_table(out / "forecasts.parquet").to_pandas()
    # 12 observations, horizon 2, gap 2 -> training is the first 8, the test block is 11..12
    drift = fc[fc.forecaster == "drift"].sort_values("step")
    slope = (y[7] - y[0]) / 7
    np.testing.assert_allclose(drift["forecast"], y[7] + slope * np.array([3, 4]))
    np.testing.assert_allclose(drift["actual"], y[10:12])
    naive = fc[fc.forecaster == "naive"]
    np.testing.assert_allclose(naive["forecast"], [y[7], y[7]])


def test_parquet_times_are_real_times_and_match_the_data(tmp_path):
    """Dates are stored as timestamps, integer times as integers; a mix falls back to text."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    cfg = _write(tmp_path)
    out = tmp_path / "dates"
    runner.run(cfg, out_dir=out, report=False)
    for name, column in (("scores.parquet", "origin"), ("forecasts.parquet", "origin"),
                         ("forecasts.parquet", "time")):
        assert pa.types.is_timestamp(pq.read_schema(out / name).field(column).type), name
    fc = pq.read_table(out / "forecasts.parquet").to_pandas()
    # the origin is the last training observation: one quarter before the first forecast time
    first = fc[fc["step"] == 1]
    assert (first["origin"] + pd.DateOffset(months=3) == first["time"]).all()
    # integer times: one more dataset, same file, the quarter written as a running number
    frame = pd.read_csv(tmp_path / "q.csv", parse_dates=["quarter"])
    frame["quarter"] = (frame["quarter"].dt.year - 1959) * 4 + frame["quarter"].dt.quarter
    frame.to_csv(tmp_path / "n.csv", index=False)
    (tmp_path / "n.yaml").write_text(CONFIG.replace("path: q.csv", "path: n.csv"))
    runner.run(tmp_path / "n.yaml", out_dir=tmp_path / "ints", report=False)
    schema = pq.read_schema(tmp_path / "ints" / "forecasts.parquet")
    assert pa.types.is_integer(schema.field("time").type)
    both = CONFIG.replace("datasets:\n", "datasets:\n  - {name: n, path: n.csv, series: "
                          "[region, item], time: quarter, target: sales}\n")
    (tmp_path / "both.yaml").write_text(both)
    runner.run(tmp_path / "both.yaml", out_dir=tmp_path / "both", report=False)
    schema = pq.read_schema(tmp_path / "both" / "forecasts.parquet")
    assert pa.types.is_string(schema.field("time").type)
