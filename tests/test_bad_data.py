"""Broken data files and a hostile machine: one clear line, exit code 2, nothing written.

Every case of the battery runs ``castgrid run`` (in this process, through
:func:`runner.cli.main`, unless a real permission check needs a process of its own) and checks
the whole contract of a user error: exit code 2, exactly one line on stderr that starts with
``castgrid: error:`` and names the file and the column (or the path), no traceback, no results
folder and no temporary folder left beside it. Then faults of the run itself (a plugin ending
its process, a closed pipe, a run killed while writing) and property-based tests of the reader
(hypothesis): any bytes, and random damage to a valid file, give a plan or that one line.

Outside references: the CSV rules are RFC 4180 (every record has the header's number of fields,
a field holding a comma is quoted); exit code 141 = 128 + SIGPIPE is what POSIX shells report
for a process a closed pipe stopped (common practice); the gzip and Parquet files are written
by Python's gzip module and by pyarrow, the reference Parquet implementation.
"""

from __future__ import annotations

import ctypes
import errno
import gzip
import io
import os
import signal
import subprocess
import sys
import tempfile
from collections.abc import Callable
from contextlib import contextmanager
from pathlib import Path

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import yaml
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st

from runner.cli import main

REPO = Path(__file__).resolve().parent.parent

#: Two series, 20 integer times each: long enough for train 10 + horizon 3 with 3+ folds.
ROWS = [(s, t, (t * 7 + ord(s)) % 11 + 1) for s in "ab" for t in range(1, 21)]
CSV = "id,t,y\n" + "".join(f"{s},{t},{v}\n" for s, t, v in ROWS)
MONTHS = pd.date_range("2020-01-01", periods=20, freq="MS").strftime("%Y-%m-%d")
DATED = "id,t,y\n" + "".join(f"{s},{MONTHS[t - 1]},{v}\n" for s, t, v in ROWS)
WIDE = "t,a,b\n" + "".join(f"{t},{t % 5 + 1},{t % 3 + 2}\n" for t in range(1, 21))
WITH_COV = "id,t,y,p\n" + "".join(f"{s},{t},{v},{t % 2}\n" for s, t, v in ROWS)
LINE_FIT = {"name": "line", "kind": "plugin", "entry": "fault_plugins:LineFit"}


def _config(dataset: dict | None = None, **top: object) -> dict:
    cfg: dict = {
        "experiment": "bad-data",
        "horizon": 3,
        "season": 1,
        "datasets": [{"name": "d", "path": "d.csv", "series": "id", "time": "t", "target": "y",
                      **(dataset or {})}],
        "windows": {"train": 10},
        "baselines": ["naive", "drift"],
        "execution": {"jobs": 1, "cache": False},
    }  # fmt: skip
    cfg.update(top)
    return {k: v for k, v in cfg.items() if v is not None}


Content = str | bytes | Callable[[Path], None]


def _write_files(folder: Path, files: dict[str, Content]) -> None:
    for name, content in files.items():
        path = folder / name
        if callable(content):
            content(path)
        elif isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content, encoding="utf-8")


def _setup(tmp: Path, files: dict[str, Content], cfg: dict) -> Path:
    _write_files(tmp, files)
    path = tmp / "c.yaml"
    path.write_text(yaml.safe_dump(cfg, sort_keys=False), encoding="utf-8")
    return path


def _assert_user_error(code: int, err: str, out: Path | None, *needles: str) -> None:
    """Exit 2, one ``castgrid: error:`` line naming what it must, nothing written."""
    assert code == 2, (code, err)
    assert "Traceback" not in err, err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("castgrid: error: "), err
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    if out is not None:
        assert not out.is_dir(), f"a results folder was written: {out}"
        left = [p.name for p in out.parent.glob(f".{out.name}.*")] if out.parent.is_dir() else []
        assert not left, f"temporary folders left behind: {left}"


def _run_in_process(capsys: pytest.CaptureFixture[str], cfg: Path, out: Path) -> tuple[int, str]:
    code = main(["run", str(cfg), "--out", str(out)])
    return code, capsys.readouterr().err


# ------------------------------------------------------------------ writers of broken files


def _gzip(text: str) -> bytes:
    return gzip.compress(text.encode())


def _parquet(columns: dict[str, pa.Array] | list[tuple[str, pa.Array]]) -> Callable[[Path], None]:
    def write(path: Path) -> None:
        items = list(columns.items()) if isinstance(columns, dict) else columns
        pq.write_table(pa.table([a for _, a in items], names=[n for n, _ in items]), path)

    return write


def _parquet_bytes(cut: bool) -> Callable[[Path], None]:
    def write(path: Path) -> None:
        buf = io.BytesIO()
        pq.write_table(pa.table({"id": ["a"] * 20, "t": list(range(1, 21)),
                                 "y": [1.0] * 20}), buf)  # fmt: skip
        data = buf.getvalue()
        path.write_bytes(data[: len(data) // 2] if cut else data)

    return write


N = 20
_ID, _T = pa.array(["a"] * N), pa.array(list(range(1, N + 1)))
_Y = pa.array([1.0 * i for i in range(N)])


def _replace_line(text: str, line: int, new: str) -> str:
    lines = text.splitlines()
    lines[line - 1] = new
    return "\n".join(lines) + "\n"


def _drop_line(text: str, line: int) -> str:
    lines = text.splitlines()
    del lines[line - 1]
    return "\n".join(lines) + "\n"


def case(id_: str, files: dict[str, Content], dataset: dict | None = None,
         needles: tuple[str, ...] = (), **top: object):  # fmt: skip
    return pytest.param(files, dataset or {}, top, needles, id=id_)


#: The battery, grouped by kind of damage. Every case must end with exit 2 and one line.
BATTERY = [
    # --- the file itself: missing, unreadable, empty, not what its name says
    case("file-missing", {}, {"path": "nowhere.csv"}, ("nowhere.csv", "file not found")),
    case("file-is-a-folder", {"d.csv": lambda p: p.mkdir()}, None, ("d.csv", "found a folder")),
    case("file-wrong-extension", {"d.txt": CSV}, {"path": "d.txt"}, ("d.txt", ".parquet")),
    case("file-empty", {"d.csv": ""}, None, ("d.csv", "no columns")),
    case("file-blank-lines-only", {"d.csv": "\n\n\n"}, None, ("d.csv", "no columns")),
    case("file-header-only", {"d.csv": "id,t,y\n"}, None, ("d.csv", "no data rows")),
    case("file-not-utf8", {"d.csv": "id,t,y\nré,1,2\n".encode("latin-1")}, None,
         ("d.csv", "not UTF-8")),
    case("file-random-bytes", {"d.csv": bytes(range(256)) * 8}, None, ("d.csv",)),
    # hypothesis found this one: a vertical tab in the header split the message in two
    case("file-control-character-in-header", {"d.csv": CSV.replace("id,t,y", "id,t,y\x0b")},
         None, ("d.csv", 'column "y" not found', "y\\x0b")),
    case("file-semicolons", {"d.csv": CSV.replace(",", ";")}, None,
         ("d.csv", 'column "id" not found')),
    case("gzip-not-gzip", {"d.csv.gz": b"this is not gzip"}, {"path": "d.csv.gz"},
         ("d.csv.gz", "cannot read file")),
    case("gzip-truncated", {"d.csv.gz": _gzip(CSV)[:120]}, {"path": "d.csv.gz"},
         ("d.csv.gz", "cannot read file")),
    case("gzip-trailing-junk", {"d.csv.gz": _gzip(CSV) + b"junk"}, {"path": "d.csv.gz"},
         ("d.csv.gz", "cannot read file")),
    case("parquet-not-parquet", {"d.parquet": "id,t,y\n"}, {"path": "d.parquet"},
         ("d.parquet", "cannot read file")),
    case("parquet-truncated", {"d.parquet": _parquet_bytes(cut=True)}, {"path": "d.parquet"},
         ("d.parquet", "cannot read file")),
    # --- ragged rows: a row with more or fewer fields than the header (RFC 4180)
    case("ragged-unquoted-thousands", {"d.csv": _replace_line(CSV, 21, "a,20,1,234.5")}, None,
         ("d.csv", "line 21", "expected 3 fields", "found 4", "quote")),
    case("ragged-missing-field", {"d.csv": _replace_line(CSV, 5, "a,4")}, None,
         ("d.csv", "line 5", "expected 3 fields", "found 2")),
    case("ragged-trailing-comma", {"d.csv": _replace_line(CSV, 2, "a,1,9,")}, None,
         ("d.csv", "line 2", "found 4")),
    case("ragged-last-line-cut", {"d.csv": CSV.rstrip("\n")[:-2]}, None,
         ("d.csv", "line 41", "found 2")),
    case("ragged-in-gzip", {"d.csv.gz": _gzip(_replace_line(CSV, 30, "b,9,1,2"))},
         {"path": "d.csv.gz"}, ("d.csv.gz", "line 30", "found 4")),
    case("ragged-after-blank-lines", {"d.csv": CSV.replace("a,3,", "\n\na,3,1,")}, None,
         ("d.csv", "line 6", "found 4")),
    case("ragged-late-in-a-long-file",
         {"d.csv": "id,t,y\n" + "".join(f"a,{t},1\n" for t in range(1, 30001)) + "a,30001,1,5\n"},
         None, ("d.csv", "line 30002", "found 4")),
    case("ragged-line-separator-only", {"d.csv": _replace_line(CSV, 3, "\x85")}, None,
         ("d.csv", "line 3", "found 1", "\\x85")),
    case("ragged-covariate", {"d.csv": _replace_line(WITH_COV, 9, "a,8,1,0,1")},
         {"covariates": ["p"]}, ("d.csv", "line 9", "expected 4 fields", "found 5")),
    case("ragged-wide", {"d.csv": _replace_line(WIDE, 4, "3,1,2,3")},
         {"layout": "wide", "series": None, "target": None}, ("d.csv", "line 4", "found 4")),
    # --- duplicate column names: which one would be meant?
    # the issue's case: a 0/1 promotion flag under the target's name, left of the target
    case("dup-target", {"d.csv": "id,t,y,y\n" + "".join(f"{s},{t},{t % 2},{v}\n"
                                                         for s, t, v in ROWS)}, None,
         ("d.csv", 'column "y" appears 2 times', "columns 3, 4")),
    case("dup-series", {"d.csv": "id,id,t,y\n" + "".join(f"{s},{s},{t},{v}\n" for s, t, v in ROWS)},
         None, ("d.csv", 'column "id" appears 2 times')),
    case("dup-time", {"d.csv": "id,t,y,t\n" + "".join(f"{s},{t},{v},{t}\n" for s, t, v in ROWS)},
         None, ("d.csv", 'column "t" appears 2 times')),
    case("dup-covariate", {"d.csv": "id,t,y,p,p\n" + "".join(f"{s},{t},{v},0,1\n"
                                                             for s, t, v in ROWS)},
         {"covariates": ["p"]}, ("d.csv", 'column "p" appears 2 times')),
    case("dup-wide-series", {"d.csv": WIDE.replace("t,a,b", "t,a,a")},
         {"layout": "wide", "series": None, "target": None}, ("d.csv", 'column "a" appears 2')),
    case("dup-wide-time", {"d.csv": WIDE.replace("t,a,b", "t,t,b")},
         {"layout": "wide", "series": None, "target": None}, ("d.csv", 'column "t" appears 2')),
    case("dup-parquet-target", {"d.parquet": _parquet([("id", _ID), ("t", _T), ("y", _Y),
                                                       ("y", pa.array([0.0] * N))])},
         {"path": "d.parquet"}, ("d.parquet", 'column "y" appears 2')),
    case("dup-parquet-wide", {"d.parquet": _parquet([("t", _T), ("a", _Y), ("a", _Y)])},
         {"path": "d.parquet", "layout": "wide", "series": None, "target": None},
         ("d.parquet", 'column "a" appears 2')),
    # --- columns the config names and the file lacks
    case("missing-target", {"d.csv": CSV.replace("id,t,y", "id,t,units")}, None,
         ("d.csv", 'column "y" not found', "units")),
    case("missing-series", {"d.csv": CSV.replace("id,t,y", "shop,t,y")}, None,
         ("d.csv", 'column "id" not found')),
    case("missing-time", {"d.csv": CSV.replace("id,t,y", "id,time,y")}, None,
         ("d.csv", 'column "t" not found')),
    case("missing-covariate", {"d.csv": CSV}, {"covariates": ["promo"]},
         ("d.csv", 'column "promo" not found')),
    case("missing-case-differs", {"d.csv": CSV.replace("id,t,y", "id,t,Y")}, None,
         ("d.csv", 'column "y" not found')),
    case("wide-without-series", {"d.csv": "t\n1\n2\n"},
         {"layout": "wide", "series": None, "target": None}, ("d.csv", "wide needs series")),
    # --- values that are not numbers
    case("value-text", {"d.csv": _replace_line(CSV, 6, "a,5,abc")}, None,
         ("d.csv", 'column "y"', 'found "abc" (row 5)')),
    case("value-text-late", {"d.csv": "id,t,y\n" + "".join(f"a,{t},1\n" for t in range(1, 30001))
                             + "a,30001,lots\n"}, None,
         ("d.csv", 'column "y"', '"lots"', "row 30001")),
    case("value-quoted-thousands", {"d.csv": _replace_line(CSV, 8, 'a,7,"1,234.5"')}, None,
         ("d.csv", 'column "y"', 'found "1,234.5" (row 7)')),
    case("value-inf", {"d.csv": _replace_line(CSV, 24, "b,3,inf")}, None,
         ("d.csv", 'column "y"', "finite", "row 23")),
    case("value-minus-inf", {"d.csv": _replace_line(CSV, 25, "b,4,-inf")}, None,
         ("d.csv", 'column "y"', "finite", "row 24")),
    case("value-dates", {"d.csv": "id,t,y\n" + "".join(f"a,{t},{MONTHS[t - 1]}\n"
                                                       for t in range(1, 21))}, None,
         ("d.csv", 'column "y"', "found dates")),
    case("value-nul-byte", {"d.csv": _replace_line(CSV, 7, "a,6,4\x00")}, None,
         ("d.csv", 'column "y"', 'found "4\\x00" (row 6)')),
    case("value-quoted-newline", {"d.csv": _replace_line(CSV, 9, 'a,8,"4\n5"')}, None,
         ("d.csv", 'column "y"', 'found "4\\n5" (row 8)')),
    case("value-covariate-text", {"d.csv": _replace_line(WITH_COV, 4, "a,3,1,yes")},
         {"covariates": ["p"]}, ("d.csv", 'column "p"', 'found "yes" (row 3)')),
    # --- times that are not times
    case("time-words", {"d.csv": DATED.replace(MONTHS[4], "soon", 1)}, None,
         ("d.csv", 'column "t"', '"soon"', "row 5")),
    case("time-mixed-formats", {"d.csv": DATED.replace(MONTHS[2], "03/01/2020", 1)}, None,
         ("d.csv", 'column "t"', '"03/01/2020"')),
    case("time-empty", {"d.csv": CSV.replace("a,9,", "a,,")}, None,
         ("d.csv", 'column "t"', "empty time", "row 9")),
    case("time-na-token", {"d.csv": CSV.replace("a,9,", "a,NA,")}, None,
         ("d.csv", 'column "t"', "empty time")),
    case("time-fraction", {"d.csv": CSV.replace("b,2,", "b,2.5,")}, None,
         ("d.csv", 'column "t"', "2.5")),
    case("time-true-false", {"d.csv": "id,t,y\na,true,1\na,false,2\n"}, None,
         ("d.csv", 'column "t"', "true/false")),
    case("time-clock-only", {"d.csv": "id,t,y\na,12:00:00,1\na,13:00:00,2\n"}, None,
         ("d.csv", 'column "t"', "times of day")),
    case("time-infinite", {"d.csv": CSV.replace("a,5,", "a,1e400,")}, None,
         ("d.csv", 'column "t"', "found inf", "row 5")),
    case("time-too-many-digits", {"d.csv": CSV.replace("a,5,", f"a,{'9' * 30},")}, None,
         ("d.csv", 'column "t"', "18 digits", "row 5")),
    case("time-before-1677", {"d.csv": DATED.replace("2020-", "1500-")}, None,
         ("d.csv", 'column "t"', "1677")),
    case("time-off-frequency", {"d.csv": DATED.replace(MONTHS[5], "2020-06-15", 1)},
         {"frequency": "MS"}, ("d.csv", 'series "a"', "2020-06-15", "does not fit")),
    case("time-irregular", {"d.csv": "id,t,y\n" + "".join(
        f"a,{d},1\n" for d in ("2020-01-01", "2020-01-05", "2020-02-11", "2020-02-12"))}, None,
        ("d.csv", 'column "t"', "cannot infer the frequency")),
    case("time-coarser-step", {"d.csv": CSV + "".join(f"c,{t},1\n" for t in range(1, 41, 2))},
         None, ("d.csv", 'series "c"', "2 steps")),
    # --- a time twice in a series
    case("duplicate-time", {"d.csv": CSV + "a,3,5\n"}, None,
         ("d.csv", 'series "a"', "duplicate time 3")),
    case("duplicate-time-wide", {"d.csv": WIDE + "4,1,1\n"},
         {"layout": "wide", "series": None, "target": None}, ("d.csv", 'column "t"', "duplicate")),
    case("duplicate-time-two-keys", {"d.csv": "r,s,t,y\n" + "".join(
        f"n,{k},{t},1\n" for k in (1, 2) for t in range(1, 21)) + "n,2,7,1\n"},
        {"series": ["r", "s"]}, ("d.csv", 'series "n/2"', "duplicate time 7")),
    case("key-empty-series-name", {"d.csv": CSV.replace("b,4,", ",4,")}, None,
         ("d.csv", 'column "id"', "empty series name")),
    # --- gaps and missing values, under each missing policy
    case("gap-policy-error", {"d.csv": _drop_line(CSV, 8)}, None,
         ("d.csv", 'series "a"', "time 7 is missing")),
    case("gap-policy-interpolate-covariate", {"d.csv": _drop_line(WITH_COV, 8)},
         {"covariates": ["p"], "missing": "interpolate"}, ("d.csv", 'series "a"', '"p"')),
    case("gap-policy-zero-covariate", {"d.csv": _drop_line(WITH_COV, 8)},
         {"covariates": ["p"], "missing": "zero"}, ("d.csv", 'series "a"', '"p"')),
    case("na-value-policy-error", {"d.csv": _replace_line(CSV, 27, "b,6,")}, None,
         ("d.csv", 'series "b"', 'column "y"', "missing value")),
    case("na-covariate-value", {"d.csv": _replace_line(WITH_COV, 26, "b,5,2,")},
         {"covariates": ["p"], "missing": "zero"}, ("d.csv", 'series "b"', '"p"')),
    case("series-without-values", {"d.csv": "id,t,y\n" + "".join(f"a,{t},1\n" for t in range(1, 21))
                                   + "".join(f"b,{t},\n" for t in range(1, 21))},
         {"missing": "zero"}, ("d.csv", 'series "b"', "no values")),
    # --- too short for the windows
    case("series-too-short", {"d.csv": "id,t,y\n" + "".join(f"a,{t},1\n" for t in range(1, 9))},
         None, ("d.csv", "series 'a' has 8 observations")),
    case("series-horizon-beyond-data", {"d.csv": CSV}, None, ("d.csv", "needs at least 40"),
         horizon=30),
    # --- wide layout
    case("wide-text-in-series", {"d.csv": WIDE.replace("\n3,", "\n3,x")},
         {"layout": "wide", "series": None, "target": None}, ("d.csv", 'column "a"', '"x')),
    case("wide-column-without-values", {"d.csv": "t,a,b\n" + "".join(f"{t},1,\n"
                                                                   for t in range(1, 21))},
         {"layout": "wide", "series": None, "target": None}, ("d.csv", 'column "b"', "no values")),
    case("wide-missing-inside", {"d.csv": WIDE.replace("\n5,1,", "\n5,,")},
         {"layout": "wide", "series": None, "target": None},
         ("d.csv", 'column "a"', "missing value")),
    # --- Parquet with the wrong types
    case("parquet-target-text", {"d.parquet": _parquet({"id": _ID, "t": _T,
                                                       "y": pa.array(["1"] * (N - 1) + ["x"])})},
         {"path": "d.parquet"}, ("d.parquet", 'column "y"', '"x"', f"row {N}")),
    case("parquet-target-list", {"d.parquet": _parquet({"id": _ID, "t": _T,
                                                       "y": pa.array([[1.0]] * N)})},
         {"path": "d.parquet"}, ("d.parquet", 'column "y"', "list")),
    case("parquet-target-bytes", {"d.parquet": _parquet({"id": _ID, "t": _T,
                                                        "y": pa.array([b"\xff"] * N)})},
         {"path": "d.parquet"}, ("d.parquet", 'column "y"', "UTF-8")),
    case("parquet-target-duration", {"d.parquet": _parquet({
        "id": _ID, "t": _T, "y": pa.array(list(range(N)), type=pa.duration("s"))})},
        {"path": "d.parquet"}, ("d.parquet", 'column "y"', "duration")),
    case("parquet-time-clock", {"d.parquet": _parquet({
        "id": _ID, "t": pa.array(list(range(N)), type=pa.time32("s")), "y": _Y})},
        {"path": "d.parquet"}, ("d.parquet", 'column "t"', "times of day")),
    case("parquet-time-fraction", {"d.parquet": _parquet({
        "id": _ID, "t": pa.array([0.5 + i for i in range(N)]), "y": _Y})},
        {"path": "d.parquet"}, ("d.parquet", 'column "t"', "0.5")),
    case("parquet-series-struct", {"d.parquet": _parquet({
        "id": pa.array([{"k": 1}] * N), "t": _T, "y": _Y})},
        {"path": "d.parquet"}, ("d.parquet", 'column "id"', "struct")),
    case("parquet-dictionary-text", {"d.parquet": _parquet({
        "id": _ID, "t": _T, "y": pa.array(["1"] * (N - 1) + ["many"]).dictionary_encode()})},
        {"path": "d.parquet"}, ("d.parquet", 'column "y"', '"many"')),
    # --- dataset settings that are the config's mistake, named by their config entry
    case("frequency-unknown", {"d.csv": DATED}, {"frequency": "monthly"},
         ("c.yaml", "datasets[0].frequency", '"monthly"')),
    case("frequency-on-integer-time", {"d.csv": CSV}, {"frequency": "MS"},
         ("c.yaml", "datasets[0].frequency", "dates only")),
]


@pytest.mark.parametrize("files,dataset,top,needles", BATTERY)
def test_bad_data_file(tmp_path, capsys, files, dataset, top, needles):
    ds = {k: v for k, v in dataset.items() if v is not None}
    cfg = _config(ds, **top)
    for key, value in dataset.items():
        if value is None:
            del cfg["datasets"][0][key]
    cfg_path = _setup(tmp_path, files, cfg)
    out = tmp_path / "out"
    code, err = _run_in_process(capsys, cfg_path, out)
    _assert_user_error(code, err, out, *needles)


def test_battery_covers_every_kind():
    # The groups the issue asks for, each with several cases (this file's own bookkeeping).
    groups: dict[str, int] = {}
    for p in BATTERY:
        groups[p.id.split("-")[0]] = groups.get(p.id.split("-")[0], 0) + 1
    assert len(BATTERY) >= 50, len(BATTERY)
    for group in ("file", "gzip", "parquet", "ragged", "dup", "missing", "value", "time",
                  "duplicate", "gap", "na", "wide", "frequency", "series"):
        assert groups.get(group, 0) >= 2, (group, groups)


def test_unused_duplicate_column_is_no_error(tmp_path, capsys):
    # Only the columns castgrid reads must be unique: two "note" columns it never reads are fine.
    text = "id,t,y,note,note\n" + "".join(f"{s},{t},{v},x,y\n" for s, t, v in ROWS)
    cfg = _setup(tmp_path, {"d.csv": text}, _config())
    assert main(["check", str(cfg)]) == 0, capsys.readouterr().err


# ------------------------------------------------------------ the machine: paths and rights


def _model_config(cache: Path) -> dict:
    return _config(models=[LINE_FIT], execution={"jobs": 1, "cache": str(cache)})


ENVIRONMENT = [
    pytest.param("out-is-a-file", id="results-path-is-a-file"),
    pytest.param("out-parent-is-a-file", id="results-parent-is-a-file"),
    pytest.param("cache-file-is-a-folder", id="cache-file-is-a-folder"),
    pytest.param("cache-folder-is-a-file", id="cache-folder-is-a-file"),
    pytest.param("cache-parent-is-a-file", id="cache-parent-is-a-file"),
]


@pytest.mark.parametrize("kind", ENVIRONMENT)
def test_unusable_paths_fail_before_computing(tmp_path, capsys, monkeypatch, kind):
    import runner.scoring.evaluate as evaluate_module

    def no_computing(*a, **k):
        raise AssertionError("the run computed before checking its paths")

    monkeypatch.setattr(evaluate_module, "build_model_tasks", no_computing)
    cache, out = tmp_path / "cache", tmp_path / "out"
    named = out
    if kind == "out-is-a-file":
        out.write_text("mine")
    elif kind == "out-parent-is-a-file":
        (tmp_path / "f").write_text("mine")
        out = named = tmp_path / "f" / "out"
        named = tmp_path / "f"
    elif kind == "cache-file-is-a-folder":
        (cache / "forecasts.sqlite").mkdir(parents=True)
        named = cache / "forecasts.sqlite"
    elif kind == "cache-folder-is-a-file":
        cache.write_text("mine")
        named = cache
    else:
        (tmp_path / "f").write_text("mine")
        cache = named = tmp_path / "f"
        cache = cache / "cache"
    cfg = _setup(tmp_path, {"d.csv": CSV}, _model_config(cache))
    code, err = _run_in_process(capsys, cfg, out)
    _assert_user_error(code, err, out, str(named))
    if kind == "out-is-a-file":
        assert out.read_text() == "mine"


def test_disk_full_while_writing_is_one_line_and_nothing_written(tmp_path, capsys, monkeypatch):
    # What cannot be checked early (a full disk) is mapped at one place in the command line.
    import runner.output.writer as writer

    def full(frame, path):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))

    monkeypatch.setattr(writer, "_csv", full)
    cfg = _setup(tmp_path, {"d.csv": CSV}, _config())
    out = tmp_path / "out"
    code, err = _run_in_process(capsys, cfg, out)
    _assert_user_error(code, err, out, "horizon.csv", "no space left on device")


def _drop_root_rights() -> None:
    """In the child: without CAP_DAC_OVERRIDE / CAP_DAC_READ_SEARCH root obeys file modes.

    Tests run as root here (and in CI); a user's read-only folder is only real for a process
    that cannot override permissions, so the capabilities are dropped from the bounding set
    before exec (PR_CAPBSET_DROP = 24). Not root: nothing to drop.
    """
    if os.geteuid() != 0:
        return
    libc = ctypes.CDLL(None, use_errno=True)
    for cap in (1, 2):  # CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH
        if libc.prctl(24, cap, 0, 0, 0) != 0:
            raise OSError(ctypes.get_errno(), "prctl(PR_CAPBSET_DROP)")


def _cli_without_root_rights(*args: str, cwd: Path, code: str | None = None):
    prog = ["-m", "runner", *args] if code is None else ["-c", code, *args]
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(REPO), str(REPO / "tests")]))
    return subprocess.run([sys.executable, *prog], cwd=cwd, capture_output=True, text=True,
                          preexec_fn=_drop_root_rights, env=env, timeout=300)  # fmt: skip


@contextmanager
def _read_only(path: Path):
    path.chmod(0o555)
    try:
        yield
    finally:
        path.chmod(0o755)


def test_read_only_is_real_for_the_child(tmp_path):
    # The premise of the permission tests below: the child cannot write a 0o555 folder.
    ro = tmp_path / "ro"
    ro.mkdir()
    with _read_only(ro):
        res = _cli_without_root_rights(str(ro / "x"), cwd=tmp_path,
                                       code="import sys; open(sys.argv[1], 'w')")
    assert res.returncode == 1 and "PermissionError" in res.stderr, res.stderr


@pytest.mark.parametrize("which", ["results-parent", "results-folder", "cache-folder",
                                   "data-file"])
def test_permission_denied_is_one_line(tmp_path, which):
    cache = tmp_path / "cache"
    cache.mkdir()
    (tmp_path / "res").mkdir()
    out = tmp_path / "res" / "out"
    cfg = _setup(tmp_path, {"d.csv": CSV}, _model_config(cache))
    target = {"results-parent": tmp_path / "res", "results-folder": out, "cache-folder": cache,
              "data-file": tmp_path / "d.csv"}[which]  # fmt: skip
    if which == "results-folder":
        out.mkdir()
        (out / "leaderboard.csv").write_text("earlier results\n")
    target.chmod(0o000 if which == "data-file" else 0o555)
    try:
        res = _cli_without_root_rights("run", str(cfg), "--out", str(out), cwd=tmp_path)
    finally:
        target.chmod(0o755 if target.is_dir() else 0o644)
    if which == "results-folder":
        assert (out / "leaderboard.csv").read_text() == "earlier results\n"
        out = None  # it existed before: it must be untouched, checked above
    named = "d.csv" if which == "data-file" else str(target)
    _assert_user_error(res.returncode, res.stderr, out, named)
    # Found before computing: no model task ran (no progress line, nothing cached).
    assert "model tasks" not in res.stderr
    assert not (cache / "forecasts.sqlite").exists()


def test_permission_error_after_computing_is_one_line(tmp_path):
    # A check fooled (os.access says yes) leaves the real error to the write itself: the
    # kernel's PermissionError is still one line naming the path, exit 2, nothing left over.
    (tmp_path / "res").mkdir()
    out = tmp_path / "res" / "out"
    cfg = _setup(tmp_path, {"d.csv": CSV}, _config())
    fooled = ("import os, sys; os.access = lambda *a, **k: True; from runner.cli import main; "
              "sys.exit(main(sys.argv[1:]))")
    with _read_only(tmp_path / "res"):
        res = _cli_without_root_rights("run", str(cfg), "--out", str(out), cwd=tmp_path,
                                       code=fooled)
    _assert_user_error(res.returncode, res.stderr, out, str(tmp_path / "res"),
                       "permission denied")


# --------------------------------------------------------------------- faults of the run


def test_closed_stdout_ends_quietly_for_every_command(tmp_path):
    """``castgrid diff A B | head``: exit 141 (128 + SIGPIPE, common practice), no message."""
    demo = REPO / "results" / "demo"
    for args in (["diff", str(demo), str(demo)], ["schema"]):
        proc = subprocess.Popen([sys.executable, "-m", "runner", *args], cwd=REPO,
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE)  # fmt: skip
        proc.stdout.close()  # the reader is gone before castgrid writes a byte
        err = proc.stderr.read().decode()
        proc.stderr.close()
        assert proc.wait(timeout=120) == 141, err
        assert err == "", err


def _exits_config(tmp_path: Path, jobs: int) -> Path:
    exits = {"name": "exits", "kind": "plugin", "entry": "fault_plugins:Exits",
             "params": {"when_length": 13, "code": 0}}  # fmt: skip
    return _setup(tmp_path, {"d.csv": CSV},
                  _config(models=[exits], execution={"jobs": jobs, "cache": False}))


def test_plugin_ending_its_process_with_code_0_never_passes_for_a_run(tmp_path):
    """jobs=1: the plugin's ``os._exit(0)`` costs its tasks (crash), the run ends with 3."""
    cfg = _exits_config(tmp_path, jobs=1)
    out = tmp_path / "out"
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(REPO), str(REPO / "tests")]))
    res = subprocess.run([sys.executable, "-m", "runner", "run", str(cfg), "--out", str(out)],
                         capture_output=True, text=True, env=env, timeout=300)  # fmt: skip
    assert res.returncode == 3, (res.returncode, res.stderr)
    failures = pd.read_csv(out / "failures.csv")
    # origins (shared, from the first time) train on 10, 13 and 16 values; the plugin exits on
    # 13, once per series
    assert sorted(failures["series"]) == ["a", "b"]
    assert set(failures["reason"]) == {"crash"}
    assert failures["message"].str.contains("exit code 0").all()
    scores = pd.read_parquet(out / "scores.parquet")
    ok = scores[scores["forecaster"] == "exits"]["mae"].notna()
    assert ok.sum() == 4  # the other two folds of each series were forecast


def test_kind_plugin_runs_in_a_worker_and_built_ins_in_process(monkeypatch):
    # The mechanism behind the test above, without processes to wait for: which tasks go where.
    import runner.execution.engines as engines
    from runner.config import ForecasterSpec
    from runner.execution.tasks import ModelTask, SharedData

    specs = [ForecasterSpec(name="ets", kind="ets", role="candidate", params={}),
             ForecasterSpec(name="p", kind="plugin", role="candidate", params={},
                            entry="fault_plugins:LineFit")]  # fmt: skip
    tasks = [ModelTask(i, i % 2, 0, 0, 10, 10, 1) for i in range(4)]
    shared = SharedData([], [], specs, 3, ())
    seen: dict[str, list[int]] = {}

    def fake(name):
        def run(part, shared, fit_timeout, stop, on_done, results, jobs=None):
            seen[name] = [t.index for t in part]
            results[:] = [engines.not_run(t.index) for t in part]

        return run

    import runner.execution.serial as serial
    import runner.execution.workers as workers

    monkeypatch.setattr(serial, "run_serial", fake("serial"))
    monkeypatch.setattr(workers, "run_workers", fake("workers"))
    engines.execute(tasks, shared, jobs=1)
    assert seen == {"serial": [0, 2], "workers": [1, 3]}


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_leftovers_of_a_killed_run_are_removed_by_the_next(tmp_path, capsys):
    from runner.output.writer import _host_tag

    cfg = _setup(tmp_path, {"d.csv": CSV}, _config())
    out = tmp_path / "out"
    host, dead = _host_tag(), _dead_pid()
    killed = tmp_path / f".out.tmp-{host}-{dead}-k1ll3d00"
    killed.mkdir()
    (killed / "leaderboard.csv").write_text("half")
    alive = tmp_path / f".out.tmp-{host}-{os.getpid()}-running"  # a live process's: kept
    other_host = tmp_path / f".out.tmp-00000000-{dead}-elsewher"  # another machine's: kept
    foreign = tmp_path / ".out.keep-me"  # not castgrid's pattern: kept
    for p in (alive, other_host, foreign):
        p.mkdir()
    assert main(["run", str(cfg), "--out", str(out)]) == 0, capsys.readouterr().err
    assert not killed.exists()
    assert alive.exists() and other_host.exists() and foreign.exists()
    assert (out / "leaderboard.csv").exists()


def test_run_killed_between_the_renames_gets_its_results_back(tmp_path, capsys):
    from runner.output.writer import _host_tag, sweep_leftovers

    out = tmp_path / "out"
    old = tmp_path / f".out.old-{_host_tag()}-{_dead_pid()}-k1ll3d00"
    old.mkdir()
    (old / "history.jsonl").write_text('{"run": 1}\n')
    sweep_leftovers(out)
    assert (out / "history.jsonl").read_text() == '{"run": 1}\n' and not old.exists()


def test_warnings_of_one_kind_share_a_line(tmp_path, capsys):
    """A constant series made one line per forecaster and metric; short series one each."""
    constant = "".join(f"c,{t},5\n" for t in range(1, 21))
    short = "".join(f"s{k},{t},1\n" for k in range(5) for t in range(1, 8))
    cfg = _setup(tmp_path, {"d.csv": CSV + constant + short},
                 _config(baselines=None, metrics=["mae", "mase", "rmsse"], rank_by="mae"))
    assert main(["run", str(cfg), "--out", str(tmp_path / "out")]) == 0
    err = capsys.readouterr().err.splitlines()
    warnings = [ln for ln in err if ln.startswith("castgrid: warning:")]
    undefined = [ln for ln in warnings if "undefined" in ln]
    assert len(undefined) == 1, warnings
    assert "mase, rmsse undefined" in undefined[0] and "1 series (c)" in undefined[0]
    assert "4 forecaster(s)" in undefined[0]  # naive, moving_average, drift, mean
    skipped = [ln for ln in warnings if "skipped" in ln]
    assert len(skipped) == 1, warnings
    assert "series 's0' has 7 observations" in skipped[0]
    assert "(and 4 more like it: 's1', 's2', 's3' and 1 more)" in skipped[0]


# ------------------------------------------------------------------ properties (hypothesis)

#: What damage a mutation may write into a cell (junk seen in real files, and worse).
JUNK = ["", "NA", "abc", "1,234.5", '"', '""', "\x00", "inf", "-", "2021-13-01", "1e400",
        " ", "é", "\r", "\n", "0x1F", "1_000", "true", "12:00", "9" * 30, "-0", "\ufeff",
        "2021-01-01", "3.5", ",", "#N/A"]  # fmt: skip


class _Hang(Exception):
    pass


@contextmanager
def _no_hang(seconds: float = 20.0):
    """Fail the example instead of hanging the suite (SIGALRM; POSIX main thread)."""

    def alarm(signum, frame):
        raise _Hang(f"no answer within {seconds} s")

    previous = signal.signal(signal.SIGALRM, alarm)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


def _plan_or_one_line(data: bytes, name: str = "d.csv", run: bool = False) -> int:
    """``castgrid check`` (or ``run``) on ``data``: exit 0, or exit 2 with one clean line."""
    import contextlib

    with tempfile.TemporaryDirectory() as folder:
        tmp = Path(folder)
        cfg = _setup(tmp, {name: data}, _config({"path": name}))
        out = tmp / "out"
        err = io.StringIO()
        with _no_hang(), contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
            args = ["run", str(cfg), "--out", str(out)] if run else ["check", str(cfg)]
            code = main(args)
        text = err.getvalue()
        if code == 0:
            assert "Traceback" not in text
            if run:
                assert (out / "leaderboard.csv").exists()
        else:
            _assert_user_error(code, text, out, name)
        return code


_settings = settings(deadline=None, max_examples=100, derandomize=True, database=None,
                     suppress_health_check=[HealthCheck.too_slow])  # fmt: skip


@_settings
@given(st.binary(max_size=600))
def test_any_bytes_give_a_plan_or_one_line(data):
    _plan_or_one_line(data)


@_settings
@given(st.binary(max_size=300))
def test_any_bytes_after_a_valid_header_give_a_plan_or_one_line(data):
    _plan_or_one_line(b"id,t,y\n" + data)


@_settings
@given(st.binary(max_size=300))
def test_any_gzip_bytes_give_a_plan_or_one_line(data):
    _plan_or_one_line(gzip.compress(b"id,t,y\n" + data), name="d.csv.gz")


@st.composite
def damaged_csv(draw) -> bytes:
    """A valid file with a few cells deleted, added, swapped or replaced by junk."""
    rows = [line.split(",") for line in CSV.splitlines()]
    for _ in range(draw(st.integers(1, 4))):
        op = draw(st.sampled_from(["delete", "add", "swap", "junk", "drop-row", "copy-row",
                                   "rename-column"]))  # fmt: skip
        r = draw(st.integers(0, len(rows) - 1))
        c = draw(st.integers(0, len(rows[r]) - 1)) if rows[r] else 0
        if op == "delete" and rows[r]:
            del rows[r][c]
        elif op == "add":
            rows[r].insert(c, draw(st.sampled_from(JUNK)))
        elif op == "swap":
            r2 = draw(st.integers(0, len(rows) - 1))
            if rows[r] and rows[r2]:
                c2 = draw(st.integers(0, len(rows[r2]) - 1))
                rows[r][c], rows[r2][c2] = rows[r2][c2], rows[r][c]
        elif op == "junk" and rows[r]:
            rows[r][c] = draw(st.sampled_from(JUNK))
        elif op == "drop-row" and len(rows) > 1:
            del rows[r]
        elif op == "copy-row":
            rows.insert(r, list(rows[r]))
        elif op == "rename-column" and rows[0]:
            c0 = draw(st.integers(0, len(rows[0]) - 1))
            rows[0][c0] = draw(st.sampled_from(["id", "t", "y", "", "Y"]))
    return "".join(",".join(row) + "\n" for row in rows).encode()


@_settings
@given(damaged_csv())
def test_damaged_csv_gives_a_plan_or_one_line(data):
    _plan_or_one_line(data)


@settings(deadline=None, max_examples=4, derandomize=True, database=None)
@given(damaged_csv())
@example(CSV.encode())  # undamaged: a whole run, results written
@example(_replace_line(CSV, 2, "a,1,2,3").encode())
def test_damaged_csv_run_writes_all_or_nothing(data):
    # The whole run: results only when the data is good, never a partial folder.
    code = _plan_or_one_line(data, run=True)
    if data == CSV.encode():
        assert code == 0
