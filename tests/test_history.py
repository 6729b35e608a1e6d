"""history.jsonl: appending one line per run, reading it back, and ``castgrid history``.

Leaderboards and manifests are written by hand per the results-folder contract (invented
numbers); timestamps are parsed back with the standard library's ISO 8601 reader.
"""

from __future__ import annotations

import io
import json
from datetime import datetime, timezone
from pathlib import Path

import pandas as pd
import pytest

from runner.cli import main
from runner.errors import DataError
from runner.output.history import append_history, parse_history, read_history
from runner.output.reader import ResultsFolder

MANIFEST = {
    "experiment": "shop-demand",
    "config_hash": "c0ffee" + "0" * 58,
    "data": {"shops": {"path": "data/shops.csv", "fingerprint": "feed01" + "1" * 58,
                       "series": 3, "observations": 120}},
    "rank_by": "mase",
    "metrics": ["mae", "mase"],
}
BOARD_CSV = """dataset,rank,forecaster,kind,role,mase_mean,mase_sd
shops,1,arima,arima,candidate,0.81,0.1
shops,2,seasonal_naive,seasonal_naive,baseline,1,0.1
shops,3,broken,plugin,candidate,,
"""


def _board(text: str = BOARD_CSV) -> pd.DataFrame:
    return pd.read_csv(io.StringIO(text))


def _at(day: int, hour: int = 9) -> datetime:
    return datetime(2025, 3, day, hour, 30, tzinfo=timezone.utc)


def test_append_writes_one_json_line_per_run(tmp_path: Path) -> None:
    append_history(tmp_path, MANIFEST, _board(), now=_at(1))
    manifest2 = {**MANIFEST, "config_hash": "beef" + "2" * 60}
    append_history(tmp_path, manifest2, _board(BOARD_CSV.replace("0.81", "0.79")), now=_at(2))
    lines = (tmp_path / "history.jsonl").read_text().splitlines()
    assert len(lines) == 2
    first = json.loads(lines[0])
    assert first == {
        "time": "2025-03-01T09:30:00Z",
        "experiment": "shop-demand",
        "config_hash": MANIFEST["config_hash"],
        "data": {"shops": MANIFEST["data"]["shops"]["fingerprint"]},
        "rank_by": "mase",
        "scores": {"shops": {"arima": 0.81, "seasonal_naive": 1.0, "broken": None}},
    }
    # ISO 8601 in UTC, read back by the standard library
    assert datetime.fromisoformat(first["time"].replace("Z", "+00:00")) == _at(1)
    assert json.loads(lines[1])["scores"]["shops"]["arima"] == 0.79


def test_append_starts_a_fresh_line_after_a_torn_write(tmp_path: Path) -> None:
    append_history(tmp_path, MANIFEST, _board(), now=_at(1))
    with (tmp_path / "history.jsonl").open("a") as fh:
        fh.write('{"time": "2025-03-02')  # a run killed in the middle of its line
    append_history(tmp_path, MANIFEST, _board(), now=_at(3))
    lines = (tmp_path / "history.jsonl").read_text().splitlines()
    assert len(lines) == 3 and json.loads(lines[2])["time"] == "2025-03-03T09:30:00Z"
    with pytest.raises(DataError, match=r"history\.jsonl: line 2: not valid JSON"):
        read_history(ResultsFolder.open(tmp_path))


def test_history_command_table(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    append_history(tmp_path, MANIFEST, _board(), now=_at(1))
    newer = BOARD_CSV.replace("0.81", "1.05")  # arima falls behind the reference
    append_history(tmp_path, MANIFEST, _board(newer), now=_at(2, 14))
    assert main(["history", str(tmp_path)]) == 0
    out = capsys.readouterr().out.splitlines()
    assert out[0] == "experiment shop-demand: 2 run(s), rank metric mase"
    header = next(line for line in out if line.startswith("forecaster"))
    assert "03-01 09:30 c0ffee" in header and "03-02 14:30 c0ffee" in header
    rows = [line.split() for line in out if line.split() and line.split()[0] in
            ("arima", "seasonal_naive", "broken", "(data)")]
    assert rows[0] == ["(data)", "feed01", "feed01"]
    # ordered by the latest run: the reference (1.0) before arima (1.05); no score last
    # one number of decimals for the whole table (the shared formatter: 4 significant digits
    # at the table's typical value)
    assert rows[1] == ["seasonal_naive", "1.000", "1.000"]
    assert rows[2] == ["arima", "0.810", "1.050"]
    assert rows[3] == ["broken", "-", "-"]
    assert main(["history", str(tmp_path), "--last", "1", "--format", "markdown"]) == 0
    md = capsys.readouterr().out
    assert "| arima | 1.050 |" in md and "0.81" not in md


@pytest.mark.parametrize(
    "content, message",
    [
        ('{"time": "x"\n', r"line 1: not valid JSON"),
        ("[1, 2]\n", r"line 1: expected a JSON object"),
        ('{"time": "t", "experiment": "e"}\n', r"line 1: key 'config_hash' is missing"),
        ('{"time": "t", "experiment": "e", "config_hash": "h", "data": {}, "rank_by": "mase",'
         ' "scores": []}\n', r"line 1: scores: expected an object"),
        ('{"time": "t", "experiment": "e", "config_hash": "h", "data": {}, "rank_by": "mase",'
         ' "scores": {"shops": {"a": "0.8"}}}\n',
         r"line 1: scores\.shops\.a: expected a number or null"),
        ("\n", r"no runs recorded"),
    ],
)
def test_bad_history_is_named_with_line(tmp_path: Path, content: str, message: str,
                                        capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "history.jsonl").write_text(content)
    assert main(["history", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert str(tmp_path / "history.jsonl") in err
    with pytest.raises(DataError, match=message):
        read_history(ResultsFolder.open(tmp_path))


def test_missing_history_file(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["history", str(tmp_path)]) == 2
    assert f"{tmp_path / 'history.jsonl'}: file not found" in capsys.readouterr().err
    assert main(["history", str(tmp_path / "absent")]) == 2


def test_blank_lines_are_skipped_and_line_numbers_count_them() -> None:
    good = ('{"time": "t", "experiment": "e", "config_hash": "h", "data": {}, '
            '"rank_by": "mase", "scores": {}}')
    assert len(parse_history(f"{good}\n\n{good}\n", "h.jsonl")) == 2
    with pytest.raises(DataError, match=r"h\.jsonl: line 3: not valid JSON"):
        parse_history(f"{good}\n\n{{bad\n", "h.jsonl")
