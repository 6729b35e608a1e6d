"""No value from at or after a forecast origin reaches a forecast made at that origin.

Rolling-origin evaluation is only honest when each forecast is made from the data before its
origin (common practice: Tashman 2000, "Out-of-sample tests of forecasting accuracy", IJF 16;
Hyndman & Athanasopoulos, FPP3 section 5.10, "time series cross-validation"). The check is a
simulation with a known answer: for every built-in forecaster and every ``missing`` policy, a
run on some data gives forecasts; then every value at or after one origin is changed by large
amounts (some observed values removed, some missing ones supplied) and the run repeated. The
forecasts made at that origin must be bit-for-bit the same, point and interval bounds, and the
forecasts made at later origins must have changed (so the change did reach the run).

The origin of a forecast block is the first time its forecaster must not see: the step after
the last training observation. It is read from the results files (``forecasts.parquet``: the
time of forecast step 1, minus the window gap), not from internals, so the test holds however
the folds are laid out. The data are invented (a seasonal series with trend and noise) on an
integer time axis.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

import runner

LENGTH = 40
SEASON = 4
HORIZON = 4
#: Forecasters under test: the six benchmarks and the three statsmodels candidates, with small
#: settings so that a run takes a few seconds.
BASELINES = ["naive", {"moving_average": {"size": 3}}, "seasonal_naive", "season_average",
             "drift", "mean"]
MODELS = [
    {"name": "arima", "kind": "arima", "params": {"order": [1, 1, 0]}},
    {"name": "ets", "kind": "ets", "params": {"error": "add", "trend": None}},
    {"name": "theta", "kind": "theta"},
]
FORECASTERS = {"naive", "moving_average[size=3]", "seasonal_naive", "season_average", "drift",
               "mean", "arima", "ets", "theta"}
#: Times left missing in the base data (zero and interpolate): with the default windows they
#: sit at the ends and the starts of training slices and in test blocks, where a fill that
#: looks across an origin would show.
GAPS = {"a": {11, 12, 15, 16, 23, 27, 28, 31, 35}, "b": {12, 19, 20, 26, 27, 32, 35}}
#: Missing times (rows absent from the file) among them; the others are empty cells.
ABSENT_ROWS = {"b": {19, 20, 27}}


def _series(rng: np.random.Generator) -> dict[str, np.ndarray]:
    t = np.arange(LENGTH)
    out = {}
    for k, name in enumerate(("a", "b")):
        season = (8.0 + 3 * k) * np.sin(2 * np.pi * t / SEASON)
        out[name] = 100.0 + 20 * k + 0.8 * t + season + rng.normal(0, 2.0, LENGTH)
    return out


def _rows(values: dict[str, np.ndarray], gaps: dict[str, set[int]]) -> pd.DataFrame:
    rows = []
    for name, v in values.items():
        for t, x in enumerate(v):
            if t in gaps.get(name, set()) and t in ABSENT_ROWS.get(name, set()):
                continue  # a missing time
            rows.append((name, t, np.nan if t in gaps.get(name, set()) else x))
    return pd.DataFrame(rows, columns=["id", "t", "y"])


def _run(folder: Path, frame: pd.DataFrame, policy: str, gap: int, tag: str) -> pd.DataFrame:
    """One run of every built-in on ``frame``; its forecasts.parquet with each block's origin."""
    frame.to_csv(folder / f"{tag}.csv", index=False)
    config = folder / f"{tag}.yaml"
    config.write_text(yaml.safe_dump({
        "experiment": f"lookahead-{tag}",
        "horizon": HORIZON,
        "season": SEASON,
        "datasets": [{"name": "d", "path": f"{tag}.csv", "layout": "long", "series": "id",
                      "time": "t", "target": "y", "missing": policy}],
        "windows": {"scheme": "sliding", "train": 16, "step": 4, "folds": 3, "gap": gap},
        "baselines": BASELINES,
        "models": MODELS,
        "intervals": [80],
        "execution": {"jobs": 1, "cache": False},
    }))
    runner.run(config, out_dir=folder / tag, report=False)
    fc = pd.read_parquet(folder / tag / "forecasts.parquet")
    fc = fc.astype({"series": str, "forecaster": str})
    fc["time"] = fc["time"].astype(str).astype(int)
    fc["origin"] = fc["time"] - (fc["step"] - 1) - gap
    return fc.set_index(["series", "forecaster", "origin", "step"]).sort_index()


def _perturbed(
    values: dict[str, np.ndarray], gaps: dict[str, set[int]], origin: int, rng: np.random.Generator
) -> tuple[dict[str, np.ndarray], dict[str, set[int]]]:
    """Every value at or after ``origin`` changed; with gaps allowed, some observed values
    removed and some missing ones supplied (never the last value of a series)."""
    new_values, new_gaps = {}, {}
    for name, v in values.items():
        v = v.copy()
        after = np.arange(origin, LENGTH)
        v[after] += rng.choice([-1.0, 1.0], len(after)) * rng.uniform(1e3, 1e5, len(after))
        new_values[name] = v
        g = set(gaps.get(name, set()))
        if g:
            later = [t for t in range(origin, LENGTH - 1)]
            g = {t for t in g if t < origin} | set(rng.choice(later, len(later) // 3,
                                                              replace=False).tolist())
        new_gaps[name] = g
    return new_values, new_gaps


def _bits(frame: pd.DataFrame) -> dict[str, bytes]:
    cols = [c for c in frame.columns if c == "forecast" or c.startswith("interval_")]
    return {c: frame[c].to_numpy(np.float64).tobytes() for c in cols}


@pytest.mark.parametrize(
    ("policy", "gap"), [("error", 0), ("zero", 0), ("interpolate", 0), ("interpolate", 1)]
)
def test_no_value_at_or_after_an_origin_changes_its_forecasts(
    tmp_path: Path, policy: str, gap: int
) -> None:
    rng = np.random.default_rng(7)
    values = _series(rng)
    gaps = {} if policy == "error" else GAPS
    base = _run(tmp_path, _rows(values, gaps), policy, gap, "base")
    assert set(base.index.get_level_values("forecaster")) == FORECASTERS
    origins = sorted(set(base.index.get_level_values("origin")))
    assert len(origins) == 3, origins
    intervals = [c for c in base.columns if c.startswith("interval_")]
    assert intervals, "the run asked for 80% intervals"

    for k, origin in enumerate(origins):
        new_values, new_gaps = _perturbed(values, gaps, origin, rng)
        again = _run(tmp_path, _rows(new_values, new_gaps), policy, gap, f"at{origin}")
        at = base.xs(origin, level="origin")
        # every forecaster forecast this origin (a failed task would make the check empty)
        assert not at["forecast"].isna().any(), at[at["forecast"].isna()]
        assert _bits(again.xs(origin, level="origin")) == _bits(at), (
            f"a value at or after origin {origin} changed forecasts made at that origin "
            f"(missing: {policy}, gap {gap})"
        )
        # the change reached the run: every forecaster's forecasts at later origins moved
        for later in origins[k + 1 :]:
            for name in FORECASTERS:
                old = base.xs((name, later), level=("forecaster", "origin"))["forecast"]
                new = again.xs((name, later), level=("forecaster", "origin"))["forecast"]
                assert not np.array_equal(old.to_numpy(), new.to_numpy(), equal_nan=True), (
                    name, later)
