"""Derived candidates: combinations and honest per-series selection, from the run's forecasts.

Outside references: numpy's mean and median of the components' forecasts read back from
forecasts.parquet; an independent numpy computation of every selection on scores.parquet;
simulations with a known answer (a series family where naive is exactly better and one where
seasonal naive is, so the right choice is known at every fold; two forecasters with identical
forecasts, so every comparison is a tie). Open data: statsmodels' US macro dataset
(``statsmodels.datasets.macrodata``, quarterly, 203 rows).
"""

from __future__ import annotations

import json
import textwrap
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

import runner
from runner.errors import ConfigError
from runner.forecasters.registry import BY_KIND, KINDS
from runner.pipeline import prepare
from runner.scoring.derived import choices

# trending series (drift does well) and rates (naive or an average may do better), so the
# selection below has several forecasters to choose
MACRO = ["realgdp", "realinv", "cpi", "m1", "unemp", "infl", "tbilrate", "realint"]
TASKS = len(MACRO) * 6  # 6 folds per series


def _macro_csv(tmp: Path) -> None:
    from statsmodels.datasets import macrodata

    df = macrodata.load_pandas().data
    quarters = pd.period_range("1959Q1", periods=len(df), freq="Q").to_timestamp()
    wide = pd.DataFrame({"quarter": quarters.strftime("%Y-%m-%d")})
    for col in MACRO:
        wide[col] = df[col].to_numpy()
    wide.to_csv(tmp / "macro.csv", index=False)


def _config(tmp: Path, models: str, name: str = "c.yaml", extra: str = "") -> Path:
    text = textwrap.dedent("""\
        experiment: derived
        horizon: 4
        season: 4
        datasets: [{name: macro, path: macro.csv, layout: wide, time: quarter}]
        windows: {scheme: expanding, train: 150, step: 4, folds: 6}
        baselines: [naive, drift, mean, seasonal_naive, {moving_average: {size: 1}}]
        metrics: [mae, mase, coverage]
        intervals: [80]
        execution: {jobs: 1, cache: CACHE}
        """).replace("CACHE", str(tmp / "cache"))
    (tmp / name).write_text(text + extra + "models:\n" + textwrap.indent(models, "  "))
    return tmp / name


LINE = "- {name: line, kind: plugin, entry: 'fault_plugins:LineFit'}\n"
DERIVED = textwrap.dedent("""\
    - name: avg
      kind: combination
      params: {of: [naive, drift, line]}
    - name: mid
      kind: combination
      params: {of: [naive, drift, line], how: median}
    - name: pick
      kind: best_so_far
      params: {among: [naive, drift, line, seasonal_naive, avg], fallback: seasonal_naive}
    """)


@pytest.fixture(scope="module")
def macro_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("macro")
    _macro_csv(tmp)
    cold = runner.run(_config(tmp, LINE), out_dir=tmp / "cold", report=False)
    warm = runner.run(_config(tmp, LINE + DERIVED, "d.yaml"), out_dir=tmp / "out", report=False)
    return tmp, cold, warm


def test_the_kinds_table_marks_derived_kinds_and_execution_builds_no_task_for_them(macro_run):
    assert {k.name for k in KINDS if k.derived} == {"combination", "best_so_far"}
    assert all(BY_KIND[k].role == "candidate" for k in ("combination", "best_so_far"))
    from runner.execution.model_tasks import build_model_tasks

    _, _, warm = macro_run
    tasks, shared = build_model_tasks(warm.evaluation.plan)
    assert {shared.forecasters[t.forecaster].name for t in tasks} == {"line"}


def test_adding_derived_candidates_to_a_warm_config_computes_nothing_new(macro_run):
    tmp, cold, warm = macro_run
    line_tasks = TASKS  # the one model
    assert cold.evaluation.counts.computed == line_tasks
    # the second run adds two combinations and a selection: every model task is a cache hit
    counts = warm.evaluation.counts
    assert (counts.computed, counts.cached, counts.failed) == (0, line_tasks, 0)
    man = json.loads((tmp / "out" / "manifest.json").read_text())
    assert man["tasks"]["cached"] == line_tasks
    assert man["tasks"]["total"] == TASKS * 9  # 5 baselines + line + 3 derived
    kinds = {f["name"]: f["kind"] for f in man["forecasters"]}
    assert kinds["avg"] == "combination" and kinds["pick"] == "best_so_far"


def test_combinations_are_the_mean_and_median_of_their_components_forecasts(macro_run):
    tmp, _, _ = macro_run
    fc = pq.read_table(tmp / "out" / "forecasts.parquet").to_pandas()
    fc = fc.astype({"series": str, "forecaster": str})
    wide = fc.pivot_table(index=["series", "fold", "step"], columns="forecaster",
                          values="forecast")
    parts = wide[["naive", "drift", "line"]].to_numpy()
    assert np.isfinite(parts).all() and len(parts) == TASKS * 4
    # numpy's mean and median over the three components, step by step (outside reference)
    np.testing.assert_allclose(wide["avg"], np.mean(parts, axis=1), rtol=1e-12)
    np.testing.assert_allclose(wide["mid"], np.median(parts, axis=1), rtol=1e-12)
    # no intervals: the combination has no stated coverage
    combos = fc[fc.forecaster.isin(["avg", "mid", "pick"])]
    assert combos[["interval_80_low", "interval_80_high"]].isna().all().all()
    board = pd.read_csv(tmp / "out" / "leaderboard.csv").set_index("forecaster")
    assert np.isnan(board.loc["avg", "coverage_80_mean"])
    assert board.loc["avg", "role"] == "candidate" and board.loc["avg", "kind"] == "combination"


def _independent_choices(scores: pd.DataFrame, among: list[str], fallback: str, metric: str):
    """Each (series, fold)'s chosen forecaster, recomputed with numpy from scores.parquet.

    With step = horizon and no gap, every earlier fold of a series has ended by the origin of
    a later one; no task fails here, so every listed forecaster is eligible throughout.
    """
    out = {}
    for series, block in scores.groupby("series"):
        table = block.pivot(index="fold", columns="forecaster", values=metric).sort_index()
        values = table[among].to_numpy()  # (folds, k)
        for k, fold in enumerate(table.index):
            if k == 0:
                out[(series, fold)] = fallback
            else:
                out[(series, fold)] = among[int(np.argmin(values[:k].mean(axis=0)))]
    return out


def test_selection_matches_an_independent_computation_on_scores(macro_run):
    tmp, _, warm = macro_run
    scores = pq.read_table(tmp / "out" / "scores.parquet").to_pandas()
    scores = scores.astype({"series": str, "forecaster": str})
    among = ["naive", "drift", "line", "seasonal_naive", "avg"]
    expected = _independent_choices(scores, among, "seasonal_naive", "mase")
    by_task = scores.set_index(["series", "fold", "forecaster"])["mase"]
    for (series, fold), chosen in expected.items():
        assert by_task[(series, fold, "pick")] == by_task[(series, fold, chosen)], (series, fold)
    # selection.csv counts the same choices
    table = pd.read_csv(tmp / "out" / "selection.csv")
    assert list(table.columns) == ["dataset", "selector", "chosen", "basis", "tasks", "failed"]
    counts = pd.Series(expected).groupby(
        [pd.Series(expected).values, [f == 0 for _, f in expected]]).size()
    got = table.set_index(["chosen", "basis"])["tasks"]
    assert got[("seasonal_naive", "fallback")] == len(MACRO)  # the first fold of each series
    assert len(got) >= 5  # several forecasters chosen: the check covers more than one
    for (chosen, first), n in counts.items():
        assert got[(chosen, "fallback" if first else "history")] == n
    assert table["tasks"].sum() == TASKS and (table["failed"] == 0).all()
    # the selector's own result holds the same choices, task by task
    dr = warm.evaluation.datasets[0]
    pick = next(r for r in dr.results if r.spec.name == "pick")
    keys = [(dr.plan.panel.keys[s], int(f)) for s, f in zip(dr.plan.series, dr.plan.fold)]
    assert [i["chosen"] for i in pick.info] == [expected[k] for k in keys]


def test_the_terminal_shows_one_line_per_selector_after_the_leaderboard(macro_run, capsys):
    from runner.cli import main

    tmp, _, _ = macro_run
    assert main(["run", str(tmp / "d.yaml"), "--out", str(tmp / "cli"), "--quiet"]) == 0
    lines = capsys.readouterr().out.rstrip().splitlines()
    table = pd.read_csv(tmp / "out" / "selection.csv")
    history = table[table.basis == "history"]
    expected = f"pick on macro ({TASKS} tasks): chose " + ", ".join(
        f"{c} {t}" for c, t in zip(history.chosen, history.tasks)
    ) + f"; fallback seasonal_naive {len(MACRO)}"
    assert lines[-1] == expected
    assert any(line.strip().startswith("1 ") for line in lines[:-1])  # the leaderboard first


# ------------------------------------------------------------------ known-answer simulations


def _two_family_csv(tmp: Path, n_series: int = 8, length: int = 60) -> None:
    """Simulation: half the series a straight line (naive errs by 1, 2, 3, 4 over 4 steps;
    seasonal naive with season 4 by 4 at every step), half a pattern repeating every 2 steps
    (seasonal naive exact, naive off by 10 every other step); noise sd 0.01 cannot change
    which is better at any fold."""
    rng = np.random.default_rng(13)
    t = np.arange(length, dtype=float)
    frame = pd.DataFrame({"t": np.arange(1, length + 1)})
    for i in range(n_series):
        base = 50.0 + 2.0 * t if i % 2 == 0 else 100.0 + 10.0 * (t % 2)
        frame[f"{'line' if i % 2 == 0 else 'wave'}{i}"] = base + rng.normal(0, 0.01, length)
    frame.to_csv(tmp / "sim.csv", index=False)


def _sim_run(tmp: Path, models: str, baselines: str = "[naive, seasonal_naive]",
             windows: str = "{train: 20, step: 4, folds: 6}"):
    (tmp / "s.yaml").write_text(textwrap.dedent(f"""\
        experiment: sim
        horizon: 4
        season: 4
        datasets: [{{name: sim, path: sim.csv, layout: wide, time: t}}]
        windows: {windows}
        baselines: {baselines}
        metrics: [mae, mase]
        execution: {{jobs: 1, cache: false}}
        models:
        """) + textwrap.indent(models, "  "))
    return runner.run(tmp / "s.yaml", write=False)


def test_the_selector_picks_the_better_forecaster_of_each_series_from_the_second_fold(tmp_path):
    _two_family_csv(tmp_path)
    result = _sim_run(tmp_path, "- {name: pick, kind: best_so_far, "
                                "params: {among: [naive, seasonal_naive]}}\n")
    dr = result.evaluation.datasets[0]
    pick = next(r for r in dr.results if r.spec.name == "pick")
    keys = [dr.plan.panel.keys[s] for s in dr.plan.series]
    for key, fold, info in zip(keys, dr.plan.fold, pick.info):
        if fold == 0:  # nothing earlier: the fallback, by default the reference
            assert info == {"chosen": "seasonal_naive", "basis": "fallback"}, (key, fold)
        else:
            best = "naive" if key.startswith("line") else "seasonal_naive"
            assert info == {"chosen": best, "basis": "history"}, (key, fold)
    # so from the second fold on it scores the better of the two on every task
    s = result.scores.set_index(["series", "fold", "forecaster"])["mase"].unstack()
    later = s[s.index.get_level_values("fold") > 0]
    np.testing.assert_array_equal(later["pick"], later[["naive", "seasonal_naive"]].min(axis=1))
    board = result.leaderboard.set_index("forecaster")
    assert board.loc["pick", "mase_mean"] < board.loc["naive", "mase_mean"]
    assert board.loc["pick", "mase_mean"] < board.loc["seasonal_naive", "mase_mean"]


def test_a_tie_goes_to_the_forecaster_listed_first(tmp_path):
    # moving_average of size 1 forecasts the last value: the same forecasts as naive, so every
    # comparison is an exact tie (common practice: a one-value average is the naive method)
    _two_family_csv(tmp_path, n_series=2)
    result = _sim_run(
        tmp_path,
        "- {name: a, kind: best_so_far, params: {among: [naive, 'moving_average[size=1]']}}\n"
        "- {name: b, kind: best_so_far, params: {among: ['moving_average[size=1]', naive]}}\n",
        baselines="[naive, seasonal_naive, {moving_average: {size: 1}}]",
    )
    dr = result.evaluation.datasets[0]
    by_name = {r.spec.name: r for r in dr.results}
    later = dr.plan.fold > 0
    assert {i["chosen"] for i, x in zip(by_name["a"].info, later) if x} == {"naive"}
    assert {i["chosen"] for i, x in zip(by_name["b"].info, later) if x} == {
        "moving_average[size=1]"}


def test_a_choice_never_looks_at_the_fold_it_is_scored_on():
    # known answer: changing the scores of the fold being chosen for changes no choice
    rng = np.random.default_rng(3)
    series = np.repeat(np.arange(5), 6)
    test_starts = np.tile(np.arange(20, 44, 4), 5)
    badness = rng.random((3, 30))
    failed = np.zeros((3, 30), dtype=bool)
    first = choices(badness, failed, series, test_starts, test_starts, 4)
    for t in range(30):
        changed = badness.copy()
        changed[:, t] = rng.random(3) * 100
        again = choices(changed, failed, series, test_starts, test_starts, 4)
        assert again[t] == first[t]
        assert (again[:t][series[:t] == series[t]] == first[:t][series[:t] == series[t]]).all()
    assert (first[::6] == -1).all()  # the first fold of every series: the fallback


def test_history_holds_only_folds_whose_test_block_ended_by_the_origin():
    # step 2 < horizon 4: the block of the fold before ends 2 steps after the next origin, so it
    # is not known there yet (known answer by hand)
    series = np.zeros(4, dtype=np.int64)
    ends = np.array([10, 12, 14, 16])
    badness = np.array([[1.0, 5.0, 5.0, 5.0], [2.0, 0.0, 0.0, 0.0]])
    failed = np.zeros((2, 4), dtype=bool)
    got = choices(badness, failed, series, ends, ends, 4)
    # fold 1 (origin 12): fold 0 ends at 14 -> nothing known; fold 2 (origin 14): fold 0 known,
    # candidate 0 better there; fold 3 (origin 16): folds 0 and 1 known, mean 3 vs 1 -> 1
    assert got.tolist() == [-1, -1, 0, 1]


def test_a_forecaster_that_failed_earlier_on_a_series_is_not_chosen_there():
    series = np.zeros(3, dtype=np.int64)
    ends = np.array([10, 14, 18])
    badness = np.array([[0.1, 0.1, 0.1], [1.0, 1.0, 1.0]])
    failed = np.array([[False, True, False], [False, False, False]])
    # fold 1: only fold 0 known, candidate 0 fine there -> 0; fold 2: it failed at fold 1 -> 1
    assert choices(badness, failed, series, ends, ends, 4).tolist() == [-1, 0, 1]
    both = np.ones((2, 3), dtype=bool)
    assert choices(badness, both, series, ends, ends, 4).tolist() == [-1, -1, -1]


# ------------------------------------------------------------------ failures and fair ranking


def test_a_combination_fails_where_a_component_failed(tmp_path):
    _two_family_csv(tmp_path, n_series=2)
    # Raises refuses the training slice of length 40: 60 observations, the last of 6 folds
    # ends 4 before the end (align end), so the folds train on 36, 40, ..., 56 values and the
    # second fold of each series fails
    models = (
        "- {name: touchy, kind: plugin, entry: 'fault_plugins:Raises', "
        "params: {when_length: 40}}\n"
        "- {name: avg, kind: combination, params: {of: [naive, touchy]}}\n"
        "- {name: pick, kind: best_so_far, params: {among: [touchy, naive]}}\n"
    )
    result = _sim_run(tmp_path, models)
    dr = result.evaluation.datasets[0]
    by_name = {r.spec.name: r for r in dr.results}
    failed_fold = dr.plan.ends - dr.plan.starts == 40
    assert failed_fold.sum() == 2 and (dr.plan.fold[failed_fold] == 1).all()
    np.testing.assert_array_equal(by_name["touchy"].failed, failed_fold)
    np.testing.assert_array_equal(by_name["avg"].failed, failed_fold)
    for t in np.flatnonzero(failed_fold):
        assert by_name["avg"].reason[t] == "component-failed"
        assert by_name["avg"].message[t] == "component touchy (error) failed on this task"
    # touchy forecasts the last value, as naive does: at the second fold the tie goes to touchy
    # (listed first), which fails there, so the selector fails there too; from the third fold
    # touchy has failed on the series' history and is no longer eligible
    pick = by_name["pick"]
    np.testing.assert_array_equal(pick.failed, failed_fold)
    for t in range(dr.plan.n_tasks):
        fold, info = dr.plan.fold[t], pick.info[t]
        expected = {0: "seasonal_naive", 1: "touchy"}.get(int(fold), "naive")
        assert info["chosen"] == expected, (t, fold, info)
        if failed_fold[t]:
            assert pick.reason[t] == "component-failed"
            assert pick.message[t] == (
                "chosen component touchy (history) failed on this task (error)")
    board = result.leaderboard.set_index("forecaster")
    assert board.loc["avg", "failed"] == 2
    assert not board.loc["avg", "beats_reference"]  # a forecaster with failed tasks never does


def test_a_component_that_does_not_apply_to_a_dataset_fails_every_task(tmp_path):
    # the default baselines leave seasonal_naive out of a dataset with season 1
    _two_family_csv(tmp_path, n_series=2)
    path = tmp_path / "m.yaml"
    path.write_text(textwrap.dedent("""\
        experiment: missing
        horizon: 4
        datasets:
          - {name: s4, path: sim.csv, layout: wide, time: t, season: 4}
          - {name: s1, path: sim.csv, layout: wide, time: t, season: 1}
        windows: {train: 20, step: 4, folds: 3}
        metrics: [mae, mase]
        execution: {jobs: 1, cache: false}
        models:
          - {name: avg, kind: combination, params: {of: [naive, seasonal_naive]}}
        """))
    result = runner.run(path, write=False)
    s4, s1 = result.evaluation.datasets
    avg4 = next(r for r in s4.results if r.spec.name == "avg")
    avg1 = next(r for r in s1.results if r.spec.name == "avg")
    assert not avg4.failed.any()
    assert avg1.failed.all() and set(avg1.reason) == {"component-missing"}
    assert avg1.message[0] == "component seasonal_naive does not apply to dataset s1"


# ------------------------------------------------------------------ config checks


@pytest.fixture
def sim_dir(tmp_path):
    _two_family_csv(tmp_path, n_series=2)
    return tmp_path


BAD = [
    ("{name: c, kind: combination, params: {of: [naive, nope]}}",
     "models[0].params.of: 'nope' is not a forecaster of this run; expected one of naive, "
     "seasonal_naive"),
    ("{name: c, kind: combination, params: {of: [naive]}}",
     "models[0].params.of: expected at least two forecaster names, got ['naive']"),
    ("{name: c, kind: combination, params: {of: naive}}",
     "models[0].params.of: expected a list of at least two forecaster names, got 'naive'"),
    ("{name: c, kind: combination, params: {of: [naive, naive]}}",
     "models[0].params.of: 'naive' is listed twice"),
    ("{name: c, kind: combination, params: {}}",
     "models[0].params.of: required: a list of at least two forecaster names of this run"),
    ("{name: c, kind: combination, params: {of: [naive, c]}}",
     "models[0].params.of: 'c' is itself a combination; a combination uses forecasters that "
     "forecast"),
    ("{name: c, kind: combination, params: {of: [naive, seasonal_naive], how: mode}}",
     "models[0].params.how: expected mean or median, got 'mode'"),
    ("{name: c, kind: combination, params: {of: [naive, seasonal_naive]}, "
     "grid: {how: [mean, trimmed]}}",
     "models[0].grid.how: expected mean or median, got 'trimmed'"),
    ("{name: c, kind: combination, params: {of: [naive, seasonal_naive], weights: [1, 2]}}",
     "models[0].params.weights: unknown parameter of combination c (expected of, how)"),
    ("{name: p, kind: best_so_far, params: {among: [naive, p]}}",
     "models[0].params.among: 'p' is itself a best_so_far; a best_so_far uses forecasters "
     "that forecast or a combination"),
    ("{name: p, kind: best_so_far, params: {among: [naive, seasonal_naive], fallback: 3}}",
     "models[0].params.fallback: expected a forecaster name, got 3"),
    ("{name: p, kind: best_so_far, params: {among: [naive, seasonal_naive], fallback: drift}}",
     "models[0].params.fallback: 'drift' is not a forecaster of this run"),
]


@pytest.mark.parametrize("entry, message", BAD, ids=[m.split(":")[1] for _, m in BAD])
def test_bad_derived_entries_name_the_field(sim_dir, entry, message):
    path = sim_dir / "bad.yaml"
    path.write_text(textwrap.dedent(f"""\
        experiment: bad
        horizon: 4
        season: 4
        datasets: [{{name: sim, path: sim.csv, layout: wide, time: t}}]
        windows: {{train: 20}}
        baselines: [naive, seasonal_naive]
        models:
          - {entry}
          - {{name: ok, kind: combination, grid: {{how: [mean]}},
             params: {{of: [naive, seasonal_naive]}}}}
        """))
    with pytest.raises(ConfigError) as err:
        prepare(path)
    assert str(err.value).startswith(f"{path}: {message}"), str(err.value)


def test_a_selection_may_choose_among_combinations_and_grids_expand(sim_dir):
    path = sim_dir / "ok.yaml"
    path.write_text(textwrap.dedent("""\
        experiment: ok
        horizon: 4
        season: 4
        datasets: [{name: sim, path: sim.csv, layout: wide, time: t}]
        windows: {train: 20, step: 4, folds: 4}
        baselines: [naive, seasonal_naive]
        metrics: [mae, mase]
        execution: {jobs: 1, cache: false}
        models:
          - {name: pick, kind: best_so_far, params: {among: [naive, 'c[how=median]']}}
          - {name: c, kind: combination, params: {of: [naive, seasonal_naive]},
             grid: {how: [mean, median]}}
        """))
    result = runner.run(path, write=False)
    assert set(result.leaderboard["forecaster"]) == {
        "naive", "seasonal_naive", "pick", "c[how=mean]", "c[how=median]"}
    dr = result.evaluation.datasets[0]
    by_name = {r.spec.name: r for r in dr.results}
    # listed before the combination in the config, computed after it
    chose_c = [i["chosen"] == "c[how=median]" for i in by_name["pick"].info]
    np.testing.assert_array_equal(by_name["pick"].point[chose_c],
                                  by_name["c[how=median]"].point[chose_c])


def test_bad_config_is_one_line_and_exit_2(sim_dir, cli):
    path = sim_dir / "bad.yaml"
    path.write_text(textwrap.dedent("""\
        experiment: bad
        horizon: 4
        season: 4
        datasets: [{name: sim, path: sim.csv, layout: wide, time: t}]
        windows: {train: 20}
        models:
          - {name: c, kind: combination, params: {of: [naive, etz]}}
        """))
    done = cli("check", str(path), cwd=sim_dir)
    assert done.returncode == 2
    assert done.stderr.count("\n") == 1 and "models[0].params.of: 'etz'" in done.stderr
    assert "Traceback" not in done.stderr


def test_the_schema_lists_the_derived_kinds():
    from runner.cli.schema import config_schema

    kinds = config_schema()["$defs"]["ModelConfig"]["properties"]["kind"]["enum"]
    assert {"combination", "best_so_far"} <= set(kinds)


def test_the_readme_configs_are_valid(tmp_path):
    # the complete configs of the README's section on derived candidates pass every check
    import re

    repo = Path(__file__).resolve().parents[1]
    text = (repo / "README.md").read_text()
    section = text[text.index("### Candidates made from other forecasts"):
                   text.index("## Forecasts made elsewhere")]
    blocks = [b for b in re.findall(r"```yaml\n(.*?)```", section, re.S)
              if b.startswith("experiment:")]
    assert len(blocks) == 2
    kinds = []
    for i, block in enumerate(blocks):
        path = tmp_path / f"readme{i}.yaml"
        path.write_text(block.replace("data/demo_shops.csv", str(repo / "data/demo_shops.csv")))
        plan = prepare(path)
        kinds.append({s.kind for s in plan.forecasters})
    assert "combination" in kinds[0] and "best_so_far" in kinds[1]
