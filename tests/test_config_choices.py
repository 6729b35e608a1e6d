"""Defaults that give way to what the config says, and what castgrid shows about its choices.

- ``rank_by`` and ``reference``: when the config's lists leave the default out, the rule of the
  README ("Defaults that give way") picks one, a note says which, the manifest records it.
- A top-level ``season`` that disagrees with a dataset's frequency is an error; the dataset's
  own ``season`` settles it.
- Grid combinations that cannot be built are dropped with a note.
- A plugin module next to its config is importable, in castgrid and in its workers.
- Unreliable metrics (MAPE, R-squared) are flagged in the terminal and the report too.
- ``castgrid schema`` accepts every config in the repository and every YAML block of the README.
- ``--quiet`` silences stderr, and the leaderboard stays on stdout.
"""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import jsonschema
import numpy as np
import pandas as pd
import pytest
import yaml

from runner.cli import main
from runner.config import parse_config
from runner.errors import brief, clip

REPO = Path(__file__).resolve().parent.parent

# invented values with a bump every 12th step, for the season-12 cases
CSV = "id,t,y\n" + "".join(
    f"{s},{t},{10 + (t * 7 + ord(s)) % 11 + 5 * (t % 12 == 0)}\n"
    for s in "ab" for t in range(1, 61)
)
# quarterly dates: frequency QS, whose customary season is 4 (common practice)
QCSV = "id,t,y\n" + "".join(
    f"{s},{2000 + i // 4}-{3 * (i % 4) + 1:02d}-01,{10 + (i * 5 + ord(s)) % 13}\n"
    for s in "ab" for i in range(40)
)


def config(**keys: object) -> str:
    """A small valid config; keyword arguments replace or add top-level keys (YAML flow)."""
    base: dict[str, object] = {
        "experiment": "choices",
        "horizon": 3,
        "season": 1,
        "datasets": [{"name": "d", "path": "d.csv", "series": "id", "time": "t", "target": "y"}],
        "windows": {"train": 24, "step": 6},
        "baselines": ["naive", "drift"],
        "execution": {"jobs": 1, "cache": False},
    }
    base.update(keys)
    return yaml.safe_dump({k: v for k, v in base.items() if v is not None}, sort_keys=False)


@pytest.fixture
def folder(tmp_path, monkeypatch):
    """A working folder with the data files; the import path is restored after the test."""
    (tmp_path / "d.csv").write_text(CSV)
    (tmp_path / "q.csv").write_text(QCSV)
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(sys, "path", list(sys.path))
    return tmp_path


def run(folder: Path, text: str, capsys, *args: str) -> tuple[int, str, str]:
    (folder / "c.yaml").write_text(text)
    code = main([*args[:1], str(folder / "c.yaml"), *args[1:]])
    out = capsys.readouterr()
    return code, out.out, out.err


# ----------------------------------------------------------------- defaults that give way


def test_rank_metric_and_reference_give_way_with_notes_and_manifest(folder, capsys):
    # before: "rank_by: 'mase' is not among metrics ['mae']" and, with a season of 12,
    # "the default reference 'seasonal_naive' is not among the baselines", both exit 2
    text = config(season=12, baselines=["drift", "naive"], metrics=["mae", "rmse"])
    code, out, err = run(folder, text, capsys, "run", "--out", "out")
    assert code == 0, err
    notes = [line for line in err.splitlines() if line.startswith("castgrid: note: ")]
    assert ("castgrid: note: rank_by: mae (the default mase is not among metrics; the first "
            "listed metric that can rank)") in notes
    assert ("castgrid: note: d: reference: drift (the default seasonal_naive is not among the "
            "baselines; the first listed baseline)") in notes
    man = json.loads((folder / "out" / "manifest.json").read_text())
    assert man["rank_by"] == "mae" and man["config"]["rank_by"] == "mae"
    assert man["reference"] == {"d": "drift"}
    assert len(man["notes"]) == 2 and all(n in " ".join(notes) for n in man["notes"])
    board = pd.read_csv(folder / "out" / "leaderboard.csv")
    assert "mae_rel" in board.columns
    # ranked by mae: rank order is the order of mae_mean (ties broken by name)
    assert list(board.sort_values("rank")["mae_mean"]) == sorted(board["mae_mean"])
    ref = board[board["forecaster"] == "drift"]
    assert float(ref["mae_rel"].iloc[0]) == 1.0


@pytest.mark.parametrize(
    "metrics,expected",
    [
        (["mae", "mase"], "mase"),  # the default, listed: no note
        (["smape", "rmse"], "smape"),  # the first listed
        (["mape", "r2", "rmse"], "rmse"),  # a flagged metric is passed over when another ranks
        (["r2", "mape"], "mape"),  # ... but used when it is the only one that can rank
    ],
)
def test_the_rank_metric_rule(folder, capsys, metrics, expected):
    code, out, _ = run(folder, config(metrics=metrics), capsys, "check")
    assert code == 0
    assert f"ranked by {expected}" in out.splitlines()[0]
    assert ("note: rank_by:" in out) == (expected != "mase")


@pytest.mark.parametrize(
    "season,baselines,expected,note",
    [
        (1, ["drift", "seasonal_naive"], "drift", True),  # a seasonal one suits no season 1
        (1, ["seasonal_naive"], "seasonal_naive", True),  # ... unless it is the only one
        (1, ["drift", "naive"], "naive", False),  # the default, listed
        (12, ["mean", "naive", "seasonal_naive"], "seasonal_naive", False),  # the default
        (12, [{"moving_average": {"size": 4}}, "naive"], "moving_average[size=4]", True),
    ],
)
def test_the_reference_rule(folder, capsys, season, baselines, expected, note):
    code, out, _ = run(folder, config(season=season, baselines=baselines), capsys, "check")
    assert code == 0, out
    assert f"reference {expected}" in out
    assert ("note: d: reference:" in out) == note


def test_an_explicit_choice_stays_an_error(folder, capsys):
    code, _, err = run(folder, config(metrics=["mae"], rank_by="mase"), capsys, "check")
    assert code == 2 and "rank_by: 'mase' is not among metrics" in err


def test_ranking_by_a_flagged_metric_warns_and_every_view_shows_the_flags(folder, capsys):
    text = config(metrics=["mae", "mape", "r2"], rank_by="mape")
    code, out, err = run(folder, text, capsys, "run", "--out", "out")
    assert code == 0, err
    assert "castgrid: warning: rank_by: mape is unreliable for comparing forecasts" in err
    assert re.search(r"rank\s+forecaster\s+role\s+mape †", out), out
    assert "† mape: unreliable for comparing forecasts (undefined or explosive" in out
    assert "† r2: unreliable for comparing forecasts (not a forecast accuracy measure)." in out
    page = (folder / "out" / "report.html").read_text()
    assert "† mape: unreliable for comparing forecasts" in page
    assert "† r2: unreliable for comparing forecasts" in page
    assert re.search(r"<th[^>]*title=\"† r2: [^\"]*\">r2 †</th>", page), "r2 column not marked"
    man = json.loads((folder / "out" / "manifest.json").read_text())
    assert man["warnings"] and "mape is unreliable" in man["warnings"][0]


def test_quiet_silences_stderr_and_keeps_the_leaderboard(folder, capsys):
    code, out, err = run(folder, config(metrics=["mae"]), capsys, "run", "--out", "out",
                         "--quiet")
    assert code == 0
    assert err == ""  # no progress, no note, no summary
    assert out.startswith("d\n") and "naive" in out and "mae" in out


# ----------------------------------------------------------------- season


def test_a_top_level_season_never_overrides_a_frequency_silently(folder, capsys):
    q = [{"name": "q", "path": "q.csv", "series": "id", "time": "t", "target": "y"}]
    code, _, err = run(folder, config(season=12, datasets=q, windows={"train": 20}), capsys,
                       "check")
    # before: ran with season 12 on quarterly data, without a word
    assert code == 2
    assert "datasets[0].season: the top-level season 12 disagrees with the frequency QS-JAN" \
        in err
    # the dataset's own season settles it, either way
    for own in (4, 12):
        q_own = [{**q[0], "season": own}]
        code, out, _ = run(folder, config(season=12, datasets=q_own, windows={"train": 20}),
                           capsys, "check")
        assert code == 0 and f"season {own}\n" in out
    # an agreeing top-level season, and integer time (no frequency), are used as given
    code, out, _ = run(folder, config(season=4, datasets=q, windows={"train": 20}), capsys,
                       "check")
    assert code == 0 and "season 4\n" in out
    code, out, _ = run(folder, config(season=12), capsys, "check")
    assert code == 0 and "season 12\n" in out


# ----------------------------------------------------------------- grids


def test_impossible_grid_combinations_are_dropped_with_a_note(folder, capsys):
    ets = {"name": "ets", "kind": "ets",
           "grid": {"trend": ["add", None], "damped": [True, False]}}
    code, out, err = run(folder, config(models=[ets]), capsys, "check")
    # before: "models[0].grid.damped: true needs a trend (add or mul)", exit 2
    assert code == 0, err
    assert ("note: models[0]: grid combination ets[trend=null,damped=true] dropped: it cannot "
            "be built (grid.damped: true needs a trend (add or mul))") in out
    names = re.search(r"forecasters \(\d+\): (.*); reference", out).group(1).split(", ")
    assert [n for n in names if n.startswith("ets")] == [
        "ets[trend=add,damped=true]", "ets[trend=add,damped=false]",
        "ets[trend=null,damped=false]"]


# ----------------------------------------------------------------- plugins next to the config

PLUGIN = """
import numpy as np


class Shifted:
    version = "1"

    def __init__(self, shift=0.0):
        self.shift = shift

    def fit(self, y, *, season, covariates=None):
        self.last_ = float(y[-1])
        return self

    def predict(self, horizon, *, covariates=None, levels=()):
        return np.full(horizon, self.last_ + self.shift)
"""


@pytest.mark.parametrize(
    "execution",
    [{"jobs": 2, "cache": False}, {"jobs": 1, "engine": "dask", "cache": False}],
    ids=["local-workers", "dask"],
)
def test_a_plugin_next_to_its_config_is_found_without_pythonpath(tmp_path, execution):
    conf = tmp_path / "experiments"
    conf.mkdir()
    (conf / "d.csv").write_text(CSV)
    (conf / "castgrid_shifted_plugin.py").write_text(PLUGIN)
    plug = {"name": "shifted", "kind": "plugin", "entry": "castgrid_shifted_plugin:Shifted",
            "params": {"shift": 0.0}}
    (conf / "c.yaml").write_text(config(models=[plug], execution=execution))
    elsewhere = tmp_path / "cwd"
    elsewhere.mkdir()
    env = {k: v for k, v in os.environ.items() if k != "PYTHONPATH"}
    env["PYTHONPATH"] = str(REPO)  # castgrid itself, not the config's folder
    res = subprocess.run(
        [sys.executable, "-m", "runner", "run", str(conf / "c.yaml"), "--out", "out"],
        cwd=elsewhere, capture_output=True, text=True, timeout=300, env=env,
    )
    # before: "models[0].entry: castgrid_shifted_plugin:Shifted: cannot import module"
    assert res.returncode == 0, res.stderr[-2000:]
    board = pd.read_csv(elsewhere / "out" / "leaderboard.csv")
    row = board.set_index("forecaster").loc[["shifted", "naive"]]
    # a shift of 0 is the naive method: same scores, computed in the workers
    assert row["failed"].tolist() == [0, 0]
    np.testing.assert_allclose(row["mase_mean"].iloc[0], row["mase_mean"].iloc[1], rtol=1e-12)


# ----------------------------------------------------------------- the JSON Schema


def _schema() -> dict:
    from runner.cli.schema import config_schema

    schema = config_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    return schema


#: What a README fragment (a block without `experiment:`) is completed with to make a config.
MINIMAL = {"experiment": "readme", "horizon": 6, "season": 12,
           "datasets": [{"name": "shops", "path": "shops.csv", "series": "shop",
                         "time": "month", "target": "units"}],
           "windows": {"train": 48}}


def _as_editor_reads(value):
    """YAML 1.1 (PyYAML) reads an unquoted 2022-06-01 as a date; YAML 1.2, which editors'
    schema checkers speak, reads it as text, and so does castgrid's config (a time of the
    dataset). Validate what an editor sees."""
    import datetime

    if isinstance(value, dict):
        return {k: _as_editor_reads(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_as_editor_reads(v) for v in value]
    if isinstance(value, (datetime.date, datetime.datetime)):
        return value.isoformat()
    return value


def _documents() -> dict[str, dict]:
    docs = {}
    for path in sorted([*REPO.glob("configs/*.yaml"), *REPO.glob("examples/**/*.yaml")]):
        docs[str(path.relative_to(REPO))] = _as_editor_reads(yaml.safe_load(path.read_text()))
    readme = (REPO / "README.md").read_text()
    for i, block in enumerate(re.findall(r"```yaml\n(.*?)```", readme, re.S)):
        data = _as_editor_reads(yaml.safe_load(block))
        assert isinstance(data, dict), f"README yaml block {i} is not a mapping"
        # fragments are wrapped into a minimal config: their keys replace the minimal ones
        docs[f"README.md yaml block {i}"] = data if "experiment" in data else {**MINIMAL, **data}
    return docs


def test_every_config_and_readme_block_validates_against_the_schema():
    validator = jsonschema.Draft202012Validator(_schema())
    docs = _documents()
    assert sum(k.startswith("README") for k in docs) >= 5
    assert "configs/plugin-example.yaml" in docs and "configs/demo.yaml" in docs
    for name, data in docs.items():
        errors = [f"{list(e.path)}: {e.message}" for e in validator.iter_errors(data)]
        assert not errors, (name, errors)
        parse_config(data, name)  # and castgrid's own loader agrees


def test_the_schema_lists_the_names_a_run_accepts():
    from runner.forecasters.registry import KINDS
    from runner.scoring.metrics import METRICS

    schema = _schema()
    props, defs = schema["properties"], schema["$defs"]
    baseline_enum = props["baselines"]["anyOf"][0]["items"]["anyOf"][0]["enum"]
    assert baseline_enum == [k.name for k in KINDS if k.role == "baseline"]
    assert defs["ModelConfig"]["properties"]["kind"]["enum"] == [
        *(k.name for k in KINDS if k.role == "candidate"), "plugin", "panel_plugin"]
    assert props["metrics"]["anyOf"][0]["items"]["enum"] == [m.name for m in METRICS]
    assert props["rank_by"]["anyOf"][0]["enum"] == [m.name for m in METRICS if m.can_rank]
    assert defs["WindowsConfig"]["properties"]["scheme"]["enum"] == ["expanding", "sliding"]
    assert defs["DatasetConfig"]["properties"]["missing"]["enum"] == ["error", "interpolate",
                                                                     "zero"]
    assert defs["ExecutionConfig"]["properties"]["on_error"]["enum"] == ["record", "stop"]


@pytest.mark.parametrize(
    "change",
    [{"intervals": [0.8]}, {"horizon": "12"}, {"horizon": True}, {"rank_by": "r2"},
     {"metrics": ["maze"]}, {"baselines": ["drfit"]}, {"horizn": 3}],
)
def test_the_schema_rejects_what_castgrid_rejects(change):
    validator = jsonschema.Draft202012Validator(_schema())
    data = {**MINIMAL, **change}
    assert list(validator.iter_errors(data)), change


def test_the_schema_accepts_rank_by_left_to_its_default():
    # rank_by: null means "the default rule" (README, "Defaults that give way")
    assert jsonschema.Draft202012Validator(_schema()).is_valid({**MINIMAL, "rank_by": None})
    parse_config({**MINIMAL, "rank_by": None}, "c.yaml")


# ----------------------------------------------------------------- short messages


def test_brief_is_bounded_whatever_the_value():
    nested: list = [1] * 9
    for _ in range(9):  # 387 million values if expanded; brief stops after 80 characters
        nested = [nested] * 9
    assert len(brief(nested)) <= 80 and brief(nested).endswith("...")
    assert brief("x" * 10**6).startswith('"xxx') and len(brief("x" * 10**6)) == 80
    assert brief(10**5000) == "<an integer of about 5000 digits>"
    cyclic: list = []
    cyclic.append(cyclic)
    assert len(brief(cyclic)) <= 80
    assert brief({"order": [1, 1, 1]}) == json.dumps({"order": [1, 1, 1]})
    assert clip("a\nb  c") == "a b c" and len(clip("y" * 1000)) == 320
