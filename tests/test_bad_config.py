"""The battery of broken configs: every one exits 2 with one line naming the file and the field.

Each case runs ``castgrid run`` on a small valid config with one thing broken, in-process
(:func:`runner.cli.main`, for speed) and a few through a real subprocess. Every case must give
exit code 2, exactly one stderr line starting ``castgrid: error: `` that names the config file
and the field (or the line, for YAML syntax), no traceback, and no results folder.

Groups: YAML syntax, encoding, duplicate keys, aliases, types, ranges, unknown names, renamed
names, cross-field rules, environment. The property-based tests at the end (hypothesis) feed the
loader arbitrary bytes and mutations of a valid config: the answer is a config or one line.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from runner.cli import main
from runner.config import Config, load_config
from runner.config.loading import MAX_VALUES
from runner.errors import CastgridError, ConfigError

GOOD = """\
experiment: bad-input
horizon: 3
season: 1
datasets:
  - name: d
    path: d.csv
    series: id
    time: t
    target: y
windows: {train: 10}
baselines: [naive, drift]
execution: {jobs: 1, cache: false}
"""

CSV = "id,t,y\n" + "".join(
    f"{s},{t},{(t * 7 + ord(s)) % 11}\n" for s in "ab" for t in range(1, 31)
)
# quarterly dates, for the season rule (frequency QS gives a season of 4, common practice)
QCSV = "id,t,y\n" + "".join(
    f"{s},{2000 + i // 4}-{3 * (i % 4) + 1:02d}-01,{(i * 5 + ord(s)) % 13}\n"
    for s in "ab" for i in range(40)
)
MODEL = "models:\n  - name: m\n    kind: {kind}\n    params: {params}\n"


def edit(old: str, new: str, base: str = GOOD) -> str:
    """``base`` with ``old`` replaced by ``new`` (``old`` must be there: a typo in a case would
    otherwise test the valid config)."""
    assert old in base, old
    return base.replace(old, new, 1)


def plus(text: str) -> str:
    """GOOD with ``text`` appended (a top-level key)."""
    return GOOD + text


def model(kind: str, params: str = "{}", extra: str = "") -> str:
    return plus(MODEL.format(kind=kind, params=params) + extra)


def bomb(levels: int = 7, width: int = 9, indent: int = 8) -> str:
    """Nested anchors, each a list of ``width`` aliases of the previous one: width**levels
    values once expanded (the "billion laughs" pattern)."""
    pad = " " * indent
    lines = [f"{pad}- &l0 [{', '.join(['1'] * width)}]"]
    for i in range(1, levels):
        lines.append(f"{pad}- &l{i} [{', '.join([f'*l{i - 1}'] * width)}]")
    return "\n".join(lines)


PLUGIN_OK = """
import numpy as np

class Last:
    def __init__(self, shift=0.0):
        self.shift = shift
    def fit(self, y, *, season, covariates=None):
        self.last_ = float(y[-1])
        return self
    def predict(self, horizon, *, covariates=None, levels=()):
        return np.full(horizon, self.last_ + self.shift)
"""

# (group, id, config text or bytes, needles that must be in the message, extra files)
CASES: list[tuple[str, str, str | bytes, list[str], dict[str, str]]] = [
    # ------------------------------------------------------------------ YAML syntax
    ("yaml", "unclosed-flow-list", edit("experiment: bad-input", "experiment: [x"),
     ["line 2", "flow sequence"], {}),
    ("yaml", "unclosed-quote", edit("experiment: bad-input", 'experiment: "bad'),
     ["line", "quoted scalar"], {}),
    ("yaml", "tab-indent", edit("horizon: 3", "\thorizon: 3"), ["line 2", "'\\t'"], {}),
    ("yaml", "bad-indent", edit("    path: d.csv", "   path: d.csv"), ["line 6"], {}),
    ("yaml", "two-documents", GOOD + "---\nhorizon: 4\n", ["another document"], {}),
    ("yaml", "control-char", edit("bad-input", "bad\x07input"),
     ["line 1", "control character #x0007"], {}),
    ("yaml", "undefined-alias", edit("horizon: 3", "horizon: *h"),
     ["line 2", "undefined alias"], {}),
    ("yaml", "python-tag", edit("horizon: 3", "horizon: !!python/object:os.system {}"),
     ["line 2", "constructor"], {}),
    ("yaml", "duplicate-anchor", edit("horizon: 3", "horizon: &a 3\nseason2: &a 1"),
     ["line 3", "duplicate anchor"], {}),
    ("yaml", "top-level-list", "- experiment\n- horizon\n", ["top level", "got ["], {}),
    ("yaml", "empty-file", "", ["top level", "got null"], {}),
    ("yaml", "scalar-file", "just words\n", ["top level", '"just words"'], {}),
    ("yaml", "hex-without-digits", edit("horizon: 3", "horizon: 0x_"),
     ["line 2", "not a valid int", "quote it"], {}),
    ("yaml", "impossible-date", edit("bad-input\n", "bad-input\ndescription: 2021-13-45\n"),
     ["line 2", "not a valid timestamp"], {}),
    ("yaml", "5000-digit-int", edit("horizon: 3", "horizon: " + "9" * 5000),
     ["line 2", "not a valid int"], {}),
    ("yaml", "unhashable-key", plus("? [a, b]\n: 1\n"), ["line", "unhashable key"], {}),
    # ------------------------------------------------------------------ encoding
    ("encoding", "latin-1", edit("bad-input", "caf\xe9").encode("latin-1"),
     ["line 1", "not UTF-8", "0xe9"], {}),
    ("encoding", "latin-1-later-line",
     edit("    target: y", "    target: \xfc").encode("latin-1"), ["line 9", "not UTF-8"], {}),
    ("encoding", "utf-16", GOOD.encode("utf-16"), ["UTF-16", "UTF-8"], {}),
    # ------------------------------------------------------------------ duplicate keys
    ("duplicate", "top-level-windows", plus("windows: {train: 20}\n"),
     ["line 13", "windows: duplicate key", "first at line 10"], {}),
    ("duplicate", "horizon", edit("horizon: 3", "horizon: 3\nhorizon: 4"),
     ["line 3", "horizon: duplicate key", "first at line 2"], {}),
    ("duplicate", "dataset-field", edit("    time: t", "    time: t\n    time: y"),
     ["datasets[0].time: duplicate key"], {}),
    ("duplicate", "flow-mapping", edit("{train: 10}", "{train: 10, train: 12}"),
     ["windows.train: duplicate key"], {}),
    ("duplicate", "baseline-param",
     edit("[naive, drift]", "[naive, {moving_average: {size: 3, size: 4}}]"),
     ["baselines[1].moving_average.size: duplicate key"], {}),
    ("duplicate", "model-kind", plus("models:\n  - name: m\n    kind: arima\n    kind: ets\n"),
     ["models[0].kind: duplicate key"], {}),
    ("duplicate", "same-value-two-spellings", model("arima", "{1: a, 0x1: b}"),
     ["models[0].params.0x1: duplicate key"], {}),
    ("duplicate", "yes-and-true", plus("execution2:\n  yes: 1\n  true: 2\n"),
     ["execution2.true: duplicate key"], {}),
    # ------------------------------------------------------------------ aliases
    ("alias", "laughs-in-arima-order",
     plus("models:\n  - name: m\n    kind: arima\n    params:\n      order:\n" + bomb() + "\n"),
     ["models[0].params.order", f"more than {MAX_VALUES} values"], {}),
    ("alias", "laughs-in-plugin-param",
     plus("models:\n  - name: m\n    kind: plugin\n    entry: castgrid_bc_plug:Last\n"
          "    params:\n      shift:\n" + bomb(8, 8) + "\n"),
     ["models[0].params.shift", "aliases expand"], {"castgrid_bc_plug.py": PLUGIN_OK}),
    ("alias", "laughs-at-top-level", plus("junk:\n" + bomb(7, 10, indent=2) + "\n"),
     ["junk", "aliases expand"], {}),
    ("alias", "self-containing-list", plus("junk: &a [1, *a]\n"),
     ["junk[1]", "contains it"], {}),
    ("alias", "self-containing-mapping", model("arima", "&p {order: *p}"),
     ["models[0].params.order", "contains it"], {}),
    # ------------------------------------------------------------------ types
    ("type", "horizon-yes", edit("horizon: 3", "horizon: yes"),
     ["horizon: expected an integer, got true", "yes/no"], {}),
    ("type", "horizon-quoted", edit("horizon: 3", 'horizon: "12"'),
     ['horizon: expected an integer, got "12"', "quotes"], {}),
    ("type", "horizon-decimal", edit("horizon: 3", "horizon: 12.0"),
     ["horizon: expected an integer, got 12.0"], {}),
    ("type", "season-quoted", edit("season: 1", 'season: "4"'), ["season: expected an integer"],
     {}),
    ("type", "dataset-season-bool", edit("    target: y", "    target: y\n    season: on"),
     ["datasets[0].season: expected an integer, got true"], {}),
    ("type", "step-quoted", edit("{train: 10}", '{train: 10, step: "3"}'),
     ["windows.step: expected an integer"], {}),
    ("type", "folds-decimal", edit("{train: 10}", "{train: 10, folds: 2.0}"),
     ["windows.folds: expected an integer"], {}),
    ("type", "gap-no", edit("{train: 10}", "{train: 10, gap: no}"),
     ["windows.gap: expected an integer, got false"], {}),
    ("type", "train-decimal", edit("{train: 10}", "{train: 10.5}"),
     ["windows.train", "got 10.5"], {}),
    ("type", "jobs-quoted", edit("jobs: 1", 'jobs: "1"'), ["execution.jobs: expected an integer"],
     {}),
    ("type", "fit-timeout-bool", edit("cache: false", "cache: false, fit_timeout: yes"),
     ["execution.fit_timeout: expected a number, got true"], {}),
    ("type", "fit-timeout-inf", edit("cache: false", "cache: false, fit_timeout: .inf"),
     ["execution.fit_timeout"], {}),
    ("type", "cache-zero", edit("cache: false", "cache: 0"),
     ["execution.cache: expected a folder path or false, got 0"], {}),
    ("type", "cache-true", edit("cache: false", "cache: true"),
     ["execution.cache", "got true"], {}),
    ("type", "interval-quoted", plus('intervals: ["80"]\n'), ["intervals[0]: expected a number"],
     {}),
    ("type", "intervals-not-list", plus("intervals: 80\n"), ["intervals: expected a list"], {}),
    ("type", "metrics-not-list", plus("metrics: mae\n"), ["metrics: expected a list"], {}),
    ("type", "covariates-not-list", edit("    target: y", "    target: y\n    covariates: p"),
     ["datasets[0].covariates: expected a list"], {}),
    ("type", "datasets-mapping", edit("  - name: d", "    name: d").replace("    path", "    path"),
     ["datasets: expected a list"], {}),
    ("type", "windows-number", edit("windows: {train: 10}", "windows: 10"),
     ["windows: expected a mapping, got 10"], {}),
    ("type", "experiment-number", edit("experiment: bad-input", "experiment: 2021"),
     ["experiment: expected text, got 2021"], {}),
    ("type", "series-number", edit("    series: id", "    series: 5"),
     ["datasets[0].series: expected text or a list, got 5"], {}),
    ("type", "params-list", model("arima", "[1, 1, 1]"), ["models[0].params: expected a mapping"],
     {}),
    ("type", "grid-not-list", plus("models:\n  - name: m\n    kind: ets\n    grid: {trend: add}\n"),
     ["models[0].grid.trend: expected a list"], {}),
    ("type", "set-tag", plus("metrics: !!set {mae}\n"), ["metrics: expected a list"], {}),
    ("type", "arima-order-text", model("arima", '{order: "1,1,1"}'),
     ['models[0].params.order: expected 3 non-negative integers, got "1,1,1"'], {}),
    # ------------------------------------------------------------------ ranges
    ("range", "horizon-zero", edit("horizon: 3", "horizon: 0"), ["horizon", ">= 1", "got 0"], {}),
    ("range", "horizon-negative", edit("horizon: 3", "horizon: -2"), ["horizon", ">= 1"], {}),
    ("range", "season-zero", edit("season: 1", "season: 0"), ["season", ">= 1"], {}),
    ("range", "train-zero", edit("{train: 10}", "{train: 0}"), ["windows.train", "got 0"], {}),
    ("range", "train-share-over-100", edit("{train: 10}", '{train: "150%"}'),
     ["windows.train", '"150%"'], {}),
    ("range", "train-too-long", edit("{train: 10}", "{train: 50}"),
     ["d.csv", "needs at least 53", "train 50"], {}),
    ("range", "step-zero", edit("{train: 10}", "{train: 10, step: 0}"), ["windows.step", ">= 1"],
     {}),
    ("range", "gap-negative", edit("{train: 10}", "{train: 10, gap: -1}"), ["windows.gap", ">= 0"],
     {}),
    ("range", "jobs-zero", edit("jobs: 1", "jobs: 0"), ["execution.jobs", "got 0"], {}),
    ("range", "jobs-minus-two", edit("jobs: 1", "jobs: -2"), ["execution.jobs", "got -2"], {}),
    ("range", "fit-timeout-zero", edit("cache: false", "cache: false, fit_timeout: 0"),
     ["execution.fit_timeout", "> 0"], {}),
    ("range", "interval-fraction", plus("intervals: [0.8]\n"),
     ["intervals", "0.8 looks like a fraction: write 80"], {}),
    ("range", "interval-100", plus("intervals: [100]\n"), ["intervals", "got 100"], {}),
    ("range", "interval-twice", plus("intervals: [80, 80]\n"), ["intervals", "listed twice"], {}),
    ("range", "no-datasets", edit(GOOD[GOOD.index("datasets:"):GOOD.index("windows")],
                                  "datasets: []\n"),
     ["datasets", "at least 1"], {}),
    ("range", "no-metrics", plus("metrics: []\n"), ["metrics", "at least one"], {}),
    ("range", "metric-twice", plus("metrics: [mae, mae]\n"), ["metrics", "listed twice"], {}),
    ("range", "theta-below-1", model("theta", "{theta: 0.5}"), ["models[0].params.theta", ">= 1"],
     {}),
    # ------------------------------------------------------------------ unknown names
    ("unknown", "top-level-key", plus("horizn: 4\n"), ["horizn: unknown key"], {}),
    ("unknown", "dataset-key", edit("    target: y", "    target: y\n    colour: red"),
     ["datasets[0].colour: unknown key"], {}),
    ("unknown", "windows-key", edit("{train: 10}", "{train: 10, size: 3}"),
     ["windows.size: unknown key"], {}),
    ("unknown", "execution-key", edit("jobs: 1", "jobs: 1, workers: 2"),
     ["execution.workers: unknown key"], {}),
    ("unknown", "baseline", edit("[naive, drift]", "[naive, drfit]"),
     ["baselines[1]", '"drfit"'], {}),
    ("unknown", "model-kind", model("prophet"), ["models[0].kind", '"prophet"'], {}),
    ("unknown", "baseline-as-model", model("naive"), ["models[0].kind", "list it under baselines"],
     {}),
    ("unknown", "metric", plus("metrics: [mae, maze]\n"), ["metrics", '"maze"'], {}),
    ("unknown", "rank-by", plus("rank_by: maze\n"), ["rank_by", '"maze"'], {}),
    ("unknown", "reference", plus("reference: seasonal_naive\n"),
     ["reference", '"seasonal_naive" is not one of the baselines'], {}),
    ("unknown", "layout", edit("    series: id", "    layout: tall\n    series: id"),
     ["datasets[0].layout", "'long'"], {}),
    ("unknown", "scheme", edit("{train: 10}", "{train: 10, scheme: rolling}"),
     ["windows.scheme", "'expanding'"], {}),
    ("unknown", "missing-policy", edit("    target: y", "    target: y\n    missing: drop"),
     ["datasets[0].missing", "'interpolate'"], {}),
    ("unknown", "on-error", edit("jobs: 1", "jobs: 1, on_error: ignore"),
     ["execution.on_error", "'record'"], {}),
    ("unknown", "engine", edit("jobs: 1", "jobs: 1, engine: spark"),
     ["execution.engine", "'dask'"], {}),
    ("unknown", "model-param", model("arima", "{odrer: [1, 1, 1]}"),
     ["models[0].params.odrer: unknown parameter"], {}),
    ("unknown", "baseline-param", edit("[naive, drift]", "[naive, {drift: {size: 2}}]"),
     ["baselines[1].drift.size: unknown parameter"], {}),
    ("unknown", "ets-trend-value", model("ets", "{trend: additive}"),
     ["models[0].params.trend", '"additive"'], {}),
    ("unknown", "plugin-module",
     plus("models:\n  - name: m\n    kind: plugin\n    entry: castgrid_no_such_mod:X\n"),
     ["models[0].entry", "castgrid_no_such_mod"], {}),
    ("unknown", "plugin-attribute",
     plus("models:\n  - name: m\n    kind: plugin\n    entry: castgrid_bc_attr:Nope\n"),
     ["models[0].entry", "no attribute 'Nope'"], {"castgrid_bc_attr.py": PLUGIN_OK}),
    # ------------------------------------------------------------------ renamed names
    ("renamed", "window-average", edit("[naive, drift]", "[naive, window_average]"),
     ["baselines", "'window_average' is now called 'moving_average'"], {}),
    ("renamed", "window-average-with-params",
     edit("[naive, drift]", "[naive, {window_average: {size: 3}}]"),
     ["baselines", "now called 'moving_average'"], {}),
    ("renamed", "auto-arima", model("auto_arima"),
     ["models[0].kind", "'auto_arima' is now called 'arima_search'"], {}),
    ("renamed", "max-order", model("arima_search", "{max_order: 4}"),
     ["models[0]", "params.max_order", "'terms_up_to'"], {}),
    ("renamed", "grid-max-p",
     plus("models:\n  - name: m\n    kind: arima_search\n    grid: {max_p: [1, 2]}\n"),
     ["models[0]", "grid.max_p", "'p_up_to'"], {}),
    ("renamed", "seed", plus("seed: 0\n"), ["seed", "remove the key"], {}),
    # ------------------------------------------------------------------ cross-field rules
    ("cross", "wide-with-series", edit("    series: id", "    layout: wide\n    series: id"),
     ["datasets[0]", "remove series and target"], {}),
    ("cross", "long-without-target", edit("    target: y\n", ""),
     ["datasets[0]", "layout long needs target"], {}),
    ("cross", "plugin-without-entry", model("plugin"), ["models[0]", "needs entry"], {}),
    ("cross", "entry-on-builtin", model("arima", "{}", "    entry: a:B\n"),
     ["models[0]", "entry is only for kind plugin"], {}),
    ("cross", "entry-malformed",
     plus("models:\n  - name: m\n    kind: plugin\n    entry: module.Class\n"),
     ["models[0]", '"module:attribute"'], {}),
    ("cross", "param-in-params-and-grid",
     model("ets", "{trend: add}", "    grid: {trend: [add, null]}\n"),
     ["models[0]", "in both params and grid"], {}),
    ("cross", "dataset-name-twice",
     edit("windows:", "  - {name: d, path: d.csv, series: id, time: t, target: y}\nwindows:"),
     ["datasets: name \"d\" is used twice"], {}),
    ("cross", "forecaster-name-twice",
     plus("models:\n  - {name: m, kind: theta}\n  - {name: m, kind: theta}\n"),
     ["forecaster name", '"m" is used twice'], {}),
    ("cross", "rank-by-not-listed", plus("metrics: [mae]\nrank_by: rmse\n"),
     ["rank_by", "'rmse' is not among metrics"], {}),
    ("cross", "rank-by-cannot-rank", plus("metrics: [mae, r2]\nrank_by: r2\n"),
     ["rank_by", "'r2' cannot order a leaderboard"], {}),
    ("cross", "no-metric-can-rank", plus("metrics: [r2]\n"),
     ["metrics", "can order a leaderboard"], {}),
    ("cross", "interval-metric-without-levels", plus("metrics: [mae, coverage]\n"),
     ["metrics", "need intervals"], {}),
    ("cross", "empty-baselines", edit("[naive, drift]", "[]"),
     ["baselines", "at least one baseline"], {}),
    ("cross", "damped-without-trend", model("ets", "{damped: true}"),
     ["models[0].params.damped", "needs a trend"], {}),
    ("cross", "grid-no-combination-works",
     plus("models:\n  - name: m\n    kind: ets\n    grid: {damped: [true]}\n"),
     ["models[0].grid.damped", "needs a trend"], {}),
    ("cross", "grid-value-works-nowhere",
     plus("models:\n  - name: m\n    kind: ets\n    grid: {trend: [add, addd], damped: [false]}\n"),
     ["models[0].grid.trend", '"addd"'], {}),
    ("cross", "top-season-vs-quarterly",
     edit("season: 1", "season: 12").replace("path: d.csv", "path: q.csv"),
     ["datasets[0].season", "top-level season 12", "season is 4"], {}),
    ("cross", "arima-seasonal-needs-season", model("arima", "{seasonal_order: [0, 1, 1, 1]}"),
     ["models[0].params.seasonal_order"], {}),
    # ------------------------------------------------------------------ environment
    ("environment", "data-file-missing", edit("path: d.csv", "path: nowhere.csv"),
     ["nowhere.csv"], {}),
    ("environment", "plugin-import-fails",
     plus("models:\n  - name: m\n    kind: plugin\n    entry: castgrid_bc_boom:Last\n"),
     ["models[0].entry", "ZeroDivisionError"], {"castgrid_bc_boom.py": "1 / 0\n"}),
    ("environment", "plugin-syntax-error",
     plus("models:\n  - name: m\n    kind: plugin\n    entry: castgrid_bc_syntax:Last\n"),
     ["models[0].entry", "SyntaxError"], {"castgrid_bc_syntax.py": "def (:\n"}),
    ("environment", "plugin-constructor-raises",
     plus("models:\n  - name: m\n    kind: plugin\n    entry: castgrid_bc_ctor:Last\n"),
     ["models[0].entry", "RuntimeError", "licence"],
     {"castgrid_bc_ctor.py": "class Last:\n    def __init__(self):\n"
                             "        raise RuntimeError('licence server down')\n"}),
]
assert len({(c[0], c[1]) for c in CASES}) == len(CASES), "case ids must be distinct"


def _write(tmp: Path, config: str | bytes, files: dict[str, str]) -> Path:
    (tmp / "d.csv").write_text(CSV)
    (tmp / "q.csv").write_text(QCSV)
    for name, text in files.items():
        (tmp / name).write_text(text)
    cfg = tmp / "c.yaml"
    if isinstance(config, bytes):
        cfg.write_bytes(config)
    else:
        cfg.write_text(config, encoding="utf-8")
    return cfg


def _assert_one_clean_line(code: int, err: str, tmp: Path, needles: list[str], file: str) -> None:
    assert code == 2, (code, err)
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    line = lines[0]
    assert line.startswith("castgrid: error: "), line
    assert file in line, (file, line)
    for needle in needles:
        assert needle in line, (needle, line)
    assert len(line) < 700, f"message of {len(line)} characters"
    assert not (tmp / "out").exists(), "a results folder was written for bad input"
    assert not (tmp / "results").exists(), "a results folder was written for bad input"


@pytest.fixture
def isolated(tmp_path, monkeypatch):
    """A fresh folder as working directory, and an import path restored after the test."""
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(sys, "path", list(sys.path))
    return tmp_path


@pytest.mark.parametrize(
    "group,config,needles,files",
    [pytest.param(g, c, n, f, id=f"{g}:{i}") for g, i, c, n, f in CASES],
)
def test_broken_config_exits_2_with_one_line(isolated, capsys, group, config, needles, files):
    cfg = _write(isolated, config, files)
    code = main(["run", str(cfg), "--out", str(isolated / "out")])
    err = capsys.readouterr().err
    file = next((n for n in needles if n.endswith(".csv")), "c.yaml")
    _assert_one_clean_line(code, err, isolated, needles, file)


def test_the_battery_is_large_and_covers_every_group():
    groups: dict[str, int] = {}
    for g, *_ in CASES:
        groups[g] = groups.get(g, 0) + 1
    assert len(CASES) >= 60
    assert set(groups) == {"yaml", "encoding", "duplicate", "alias", "type", "range", "unknown",
                           "renamed", "cross", "environment"}


SUBPROCESS = ["duplicate:top-level-windows", "encoding:latin-1", "alias:laughs-in-arima-order",
              "type:horizon-yes", "cross:top-season-vs-quarterly", "yaml:tab-indent"]


@pytest.mark.parametrize("case_id", SUBPROCESS)
def test_broken_config_through_a_real_process(tmp_path, cli, case_id):
    g, i = case_id.split(":")
    _, _, config, needles, files = next(c for c in CASES if c[0] == g and c[1] == i)
    cfg = _write(tmp_path, config, files)
    res = cli("run", str(cfg), "--out", str(tmp_path / "out"), cwd=tmp_path)
    _assert_one_clean_line(res.returncode, res.stderr, tmp_path, needles, "c.yaml")
    assert res.stdout == ""


# --------------------------------------------------------------------- the loader on its own


def test_duplicate_keys_were_silently_merged_by_plain_yaml():
    """What the strict loader guards against (the behaviour before it): plain YAML keeps the
    last of two keys."""
    text = plus("windows: {train: 20}\n")
    assert yaml.safe_load(text)["windows"] == {"train": 20}


def test_aliases_within_the_cap_and_merge_keys_still_work(tmp_path):
    text = edit("execution: {jobs: 1, cache: false}",
                "common: &common {jobs: 1}\nexecution:\n  <<: *common\n  cache: false")
    text = text.replace("common: &common {jobs: 1}\n", "")
    text = "x-defaults: &common {jobs: 1}\n" + text
    (tmp_path / "c.yaml").write_text(text)
    # the anchor's own key is unknown to castgrid, so it is reported as such; the merge works
    with pytest.raises(ConfigError, match="x-defaults: unknown key"):
        load_config(tmp_path / "c.yaml")
    shared = edit("[naive, drift]", "&b [naive, drift]") + "models:\n" + "".join(
        f"  - {{name: m{i}, kind: theta}}\n" for i in range(3))
    (tmp_path / "c.yaml").write_text(shared)
    cfg = load_config(tmp_path / "c.yaml")
    assert [b.kind for b in cfg.baselines] == ["naive", "drift"]


def test_an_alias_bomb_is_refused_before_it_is_expanded(tmp_path):
    # 9**9 = 387 million values if expanded: refused from the node graph, in well under a second
    text = plus("models:\n  - name: m\n    kind: arima\n    params:\n      order:\n"
                + bomb(levels=9) + "\n")
    (tmp_path / "c.yaml").write_text(text)
    with pytest.raises(ConfigError, match="aliases expand to more than"):
        load_config(tmp_path / "c.yaml")


# --------------------------------------------------------------------- property-based


def _one_line_or_config(path: Path) -> None:
    try:
        cfg = load_config(path)
    except ConfigError as exc:
        msg = str(exc)
        assert msg and "\n" not in msg, msg
        assert msg.startswith(str(path)), msg
        assert len(msg) < 1000, len(msg)
    else:
        assert isinstance(cfg, Config)


@settings(max_examples=300, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(raw=st.binary(max_size=400))
def test_any_bytes_give_a_config_or_one_line(tmp_path, raw):
    path = tmp_path / "c.yaml"
    path.write_bytes(raw)
    _one_line_or_config(path)


_TOKENS = ["yes", "no", "on", "~", "null", '"12"', "12.0", "-1", "0", "1e999", ".nan", "[]",
           "{}", "[1, [2, [3]]]", "&a", "*a", "*b", "!!int", "!!str", "!!binary x", "!!set",
           "? ", "- ", ": ", "\t", "'", '"', "#", "%YAML 1.1", "---", "...", "|", ">", "@",
           "0x_", "2021-13-45", "é", "\u2028", "{a: 1, a: 2}", "<<: *a", "mae", "naive",
           "80", "0.8", "seasonal_naive", "plugin", "x:y", "50%"]


@st.composite
def _mutated(draw):
    lines = GOOD.splitlines()
    for _ in range(draw(st.integers(1, 4))):
        op = draw(st.sampled_from(["replace-value", "insert", "delete", "duplicate", "swap",
                                   "indent", "token"]))
        i = draw(st.integers(0, len(lines) - 1))
        if op == "replace-value" and ":" in lines[i]:
            head = lines[i].split(":", 1)[0]
            lines[i] = f"{head}: {draw(st.sampled_from(_TOKENS))}"
        elif op == "insert":
            lines.insert(i, draw(st.sampled_from(_TOKENS)) + draw(st.text(max_size=12)))
        elif op == "delete" and len(lines) > 1:
            del lines[i]
        elif op == "duplicate":
            lines.insert(i, lines[i])
        elif op == "swap":
            j = draw(st.integers(0, len(lines) - 1))
            lines[i], lines[j] = lines[j], lines[i]
        elif op == "indent":
            lines[i] = " " * draw(st.integers(0, 5)) + lines[i].lstrip()
        else:
            pos = draw(st.integers(0, len(lines[i])))
            lines[i] = lines[i][:pos] + draw(st.sampled_from(_TOKENS)) + lines[i][pos:]
    return "\n".join(lines) + "\n"


@settings(max_examples=250, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=_mutated())
def test_mutated_configs_give_a_plan_or_one_line(tmp_path, text):
    """Through the whole check (config, names, forecasters, data, folds): a plan or one line."""
    from runner.pipeline import prepare

    (tmp_path / "d.csv").write_text(CSV)
    path = tmp_path / "c.yaml"
    path.write_text(text, encoding="utf-8")
    try:
        prepare(path)
    except CastgridError as exc:
        msg = str(exc)
        assert msg and "\n" not in msg, msg
        assert len(msg) < 1000, len(msg)


@settings(max_examples=150, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(value=st.recursive(
    st.none() | st.booleans() | st.integers() | st.floats() | st.text(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner,
                                                                max_size=4),
    max_leaves=20,
), key=st.sampled_from(["horizon", "season", "windows", "datasets", "baselines", "models",
                        "metrics", "rank_by", "reference", "intervals", "execution", "output",
                        "experiment", "description"]))
def test_any_value_at_any_key_gives_a_config_or_one_line(tmp_path, key, value):
    data = yaml.safe_load(GOOD)
    data[key] = value
    path = tmp_path / "c.yaml"
    path.write_text(yaml.safe_dump(data, allow_unicode=True), encoding="utf-8")
    _one_line_or_config(path)
