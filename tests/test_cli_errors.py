"""Bad input through the command line: exit 2, one clear line, no traceback, nothing written."""

from __future__ import annotations

from pathlib import Path

import pytest

GOOD = """
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

CSV = "id,t,y\n" + "".join(f"{s},{t},{(t * 7 + ord(s)) % 11}\n" for s in "ab" for t in range(1, 21))


def _write(tmp: Path, config: str, data: str = CSV) -> Path:
    (tmp / "d.csv").write_text(data)
    cfg = tmp / "c.yaml"
    cfg.write_text(config)
    return cfg


def _assert_clean_failure(res, out: Path, *needles: str) -> None:
    assert res.returncode == 2, (res.returncode, res.stdout, res.stderr)
    err = res.stderr.strip()
    assert "Traceback" not in res.stderr
    assert err.startswith("castgrid: error: "), err
    assert len(err.splitlines()) <= 3, err
    for needle in needles:
        assert needle in err, (needle, err)
    assert not out.exists(), "a results folder was written for bad input"


@pytest.mark.parametrize(
    "change,needles",
    [
        (("horizon: 3", "horizon: 3\nhorizn: 4"), ["c.yaml", "horizn", "unknown key"]),
        (("horizon: 3", "horizon: three"), ["c.yaml", "horizon", "integer", '"three"']),
        (("baselines: [naive, drift]", "baselines: [naive, drfit]"), ["baselines", "drfit"]),
        (("horizon: 3", "horizon: 0"), ["horizon", ">= 1"]),
        (("windows: {train: 10}", "windows: {train: half}"), ["windows.train", '"half"']),
        (("windows: {train: 10}", "windows: {train: 50}"), ["d.csv", "needs at least 53"]),
        (("    target: y", "    target: z"), ["d.csv", '"z"']),
        (("path: d.csv", "path: nowhere.csv"), ["nowhere.csv"]),
        (("experiment: bad-input", "experiment: [x"), ["c.yaml"]),
        (("experiment: bad-input", "experiment: bad input"), ["experiment", '"bad input"']),
        # Names an earlier release used: the error names the new one.
        (("baselines: [naive, drift]", "baselines: [naive, window_average]"),
         ["baselines", "'window_average' is now called 'moving_average'"]),
        (("baselines: [naive, drift]", "models: [{name: m, kind: auto_arima}]"),
         ["models[0].kind", "'auto_arima' is now called 'arima_search'"]),
        (("baselines: [naive, drift]",
          "models: [{name: m, kind: arima_search, params: {max_order: 4}}]"),
         ["models[0]", "max_order", "'terms_up_to'"]),
        (("baselines: [naive, drift]",
          "models: [{name: m, kind: arima_search, grid: {max_p: [1, 2]}}]"),
         ["models[0]", "grid.max_p", "'p_up_to'"]),
    ],
)
def test_bad_config_exits_2_with_one_line(tmp_path, cli, change, needles):
    cfg = _write(tmp_path, GOOD.replace(*change))
    out = tmp_path / "out"
    res = cli("run", str(cfg), "--out", str(out))
    _assert_clean_failure(res, out, *needles)
    res = cli("check", str(cfg))
    assert res.returncode == 2 and "Traceback" not in res.stderr


@pytest.mark.parametrize(
    "data,needles",
    [
        (CSV.replace("a,5,", "a,5,abc#"), ["d.csv", "y"]),  # non-numeric target
        (CSV + "a,3,1\n", ["d.csv", "a", "duplicate"]),  # duplicate timestamp
        ("".join(line + "\n" for line in CSV.splitlines() if line != "a,7,3"),
         ["d.csv", "a"]),  # gap in the time index
    ],
)
def test_bad_data_exits_2_with_one_line(tmp_path, cli, data, needles):
    cfg = _write(tmp_path, GOOD, data)
    out = tmp_path / "out"
    res = cli("run", str(cfg), "--out", str(out))
    _assert_clean_failure(res, out, *needles)


def test_missing_config_file(tmp_path, cli):
    res = cli("run", str(tmp_path / "none.yaml"), "--out", str(tmp_path / "out"))
    _assert_clean_failure(res, tmp_path / "out", "none.yaml", "not found")


def test_short_series_are_skipped_with_a_warning_and_counted(tmp_path, cli):
    data = CSV + "".join(f"c,{t},{t}\n" for t in range(1, 8))
    cfg = _write(tmp_path, GOOD, data)
    out = tmp_path / "out"
    res = cli("run", str(cfg), "--out", str(out))
    assert res.returncode == 0, res.stderr
    assert "skipped series 'c' has 7 observations, needs at least 13" in res.stderr
    import json

    man = json.loads((out / "manifest.json").read_text())
    assert man["tasks"]["skipped_series"] == 1
    check = cli("check", str(cfg))
    assert check.returncode == 0 and "too short: series 'c'" in check.stdout
