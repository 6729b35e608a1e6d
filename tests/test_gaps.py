"""Missing values (``missing: interpolate``): filled per training slice, never scored as actuals.

References: pandas ``Series.interpolate(method="linear", limit_direction="both")`` fills
interior gaps on the straight line between the neighbours and carries the first / last observed
value over a leading / trailing gap, which is the rule of :mod:`runner.forecasters.gaps`;
scikit-learn's ``mean_absolute_error`` on the observed steps is the score of a test block with
a missing actual.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import mean_absolute_error

import runner
from runner.forecasters.benchmarks import Drift, Mean, MovingAverage, Naive, SeasonalNaive
from runner.forecasters.gaps import SliceFill, fill_slice
from runner.forecasters.slices import summarise


def _with_gaps(rng: np.random.Generator, n: int, share: float) -> np.ndarray:
    y = rng.normal(0, 1, n).cumsum() + 50
    y[rng.random(n) < share] = np.nan
    return y


def test_fill_slice_matches_pandas_linear_interpolation_with_edges_carried():
    rng = np.random.default_rng(0)
    for _ in range(200):
        y = _with_gaps(rng, int(rng.integers(1, 30)), share=0.4)
        if np.isnan(y).all():
            assert np.isnan(fill_slice(y)).all()  # nothing to fill from
            continue
        expected = pd.Series(y).interpolate(method="linear", limit_direction="both")
        np.testing.assert_allclose(fill_slice(y), expected.to_numpy(), rtol=1e-12)


def test_many_slices_at_once_fill_each_from_itself_alone():
    rng = np.random.default_rng(1)
    values = _with_gaps(rng, 300, share=0.3)
    starts = rng.integers(0, 250, 80)
    ends = starts + rng.integers(1, 50, 80)
    fill = SliceFill(values)
    for s, e in zip(starts, ends):
        got = fill.take(np.arange(s, e), s, e)
        assert got.tobytes() == fill_slice(values[s:e]).tobytes()
        # a value outside the slice never matters: change everything around it
        other = values.copy()
        other[:s] = 1e9
        other[e:] = -1e9
        assert SliceFill(other).take(np.arange(s, e), s, e).tobytes() == got.tobytes()


def test_benchmarks_see_the_same_filled_slice_as_a_model_would():
    # each vectorised benchmark over many gappy slices equals the benchmark on the filled slice
    rng = np.random.default_rng(2)
    values = _with_gaps(rng, 400, share=0.2)
    values[[0, 399]] = [50.0, 51.0]
    starts = np.arange(0, 300, 7, dtype=np.int64)
    ends = starts + 60
    for model, season in ((Naive(), 1), (SeasonalNaive(), 4), (Mean(), 1), (Drift(), 1),
                          (MovingAverage(size=5), 1)):
        many = model.forecast_many(values, starts, ends, 6, season=season, levels=(80.0,))
        for i, (s, e) in enumerate(zip(starts, ends)):
            y = fill_slice(values[s:e])
            one = model.forecast_many(y, np.array([0]), np.array([len(y)]), 6, season=season,
                                      levels=(80.0,))
            assert many.point[i].tobytes() == one.point[0].tobytes(), type(model).__name__
            np.testing.assert_array_equal(many.lower[:, i], one.lower[:, 0])


def test_slice_ending_in_a_gap_carries_the_last_observed_value_forward():
    values = np.array([1.0, 2.0, 3.0, np.nan, np.nan, 100.0])
    b = Naive().forecast_many(values, np.array([0]), np.array([5]), 2, season=1)
    assert b.point[0].tolist() == [3.0, 3.0]  # not 35 or 67.7: 100 is after the origin
    s = summarise(values, np.array([0, 3]), np.array([5, 5]), 1)
    assert s.observed.tolist() == [3.0, 0.0]
    b = Naive().forecast_many(values, np.array([3]), np.array([5]), 2, season=1)
    assert not b.ok[0] and "no observed value" in b.message


def test_missing_actual_is_not_scored_and_is_reported(tmp_path: Path, capsys):
    # series "a" misses the value at t = 17, inside the last test block [16, 20)
    y = 10.0 + np.arange(20) % 3
    rows = [("a", t, "" if t == 17 else f"{v:g}") for t, v in enumerate(y)]
    rows += [("b", t, f"{v + 1:g}") for t, v in enumerate(y)]
    pd.DataFrame(rows, columns=["id", "t", "y"]).to_csv(tmp_path / "d.csv", index=False)
    cfg = tmp_path / "c.yaml"
    cfg.write_text(textwrap.dedent("""
        experiment: gaps
        horizon: 4
        datasets: [{name: d, path: d.csv, series: id, time: t, target: y, season: 1,
                    missing: interpolate}]
        windows: {scheme: expanding, train: 12, step: 4}
        baselines: [naive, mean]
        metrics: [mae, rmse, mase]
        execution: {jobs: 1, cache: false}
    """))
    result = runner.run(cfg, out_dir=tmp_path / "out", report=False, quiet=False)
    assert "1 missing actual(s) in the test blocks of 1 series are not scored" in (
        capsys.readouterr().err)
    assert result.manifest["data"]["d"]["unscored_actuals"] == 1
    fc = pd.read_parquet(tmp_path / "out" / "forecasts.parquet").astype(
        {"series": str, "forecaster": str})
    scores = result.scores
    fc["t"] = fc["time"].astype(str).astype(int)
    for name in ("naive", "mean"):
        # the test block holding t = 17 (step = horizon, so blocks do not overlap)
        block = fc[(fc.series == "a") & (fc.forecaster == name) & fc.t.between(16, 19)]
        assert len(block) == 4 and block["actual"].isna().sum() == 1
        seen = block.dropna(subset=["actual"])
        fold = block["fold"].iloc[0]
        row = scores[(scores.series == "a") & (scores.forecaster == name)
                     & (scores.fold == fold)]
        assert float(row["mae"].iloc[0]) == pytest.approx(
            mean_absolute_error(seen["actual"], seen["forecast"]))
        assert np.isfinite(row["rmse"].iloc[0]) and np.isfinite(row["mase"].iloc[0])
    # the forecasts were made: a missing actual never fails a task
    assert result.failed_tasks == 0
