"""Runs in chunks of series: the same bytes whatever the chunk size, and no more than one
chunk's forecasts in memory.

The data are invented (seeded random walks, one constant series so that the scaled metrics are
undefined somewhere, one series too short for every fold, one series with a missing actual in
a test block) and a test plugin fails on one fold (tests/fault_plugins.py). The comparison is
of castgrid with itself: a run of one chunk against the same run in chunks of 2 and of 3
series, with row groups of forecasts.parquet of 3 series, so that blocks of the file straddle
chunks both ways.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

import runner
from runner.config import config_hash
from runner.output import parquet_files
from runner.output.uptodate import RECORD
from runner.pipeline import prepare
from runner.scoring.evaluate import evaluate, series_chunks
from runner.scoring.metrics import running_sum

CONFIG = """
experiment: chunked
horizon: 4
season: 4
datasets:
  - {{name: a, path: a.csv, series: s, time: t, target: y, missing: interpolate}}
  - {{name: b, path: b.csv, series: s, time: t, target: y}}
windows: {{scheme: expanding, train: 16, step: 4, folds: 3}}
models:
  - {{name: touchy, kind: plugin, entry: 'fault_plugins:Raises', params: {{when_length: 24}}}}
  - {{name: avg, kind: combination, params: {{of: [naive, touchy]}}}}
  - {{name: pick, kind: best_so_far, params: {{among: [naive, seasonal_naive, avg]}}}}
metrics: [mae, rmse, mase, smape, coverage]
intervals: [80]
execution: {{jobs: 1, cache: false, chunk: {chunk}}}
"""
CHUNKS = (10_000, 2, 3)


def _write(folder: Path, chunk: int) -> Path:
    rng = np.random.default_rng(4)
    for name, n in (("a", 7), ("b", 4)):
        rows = []
        for i in range(n):
            length = 28 + (i % 3) * 4 if i != 1 else 12  # series 1: too short for any fold
            y = 50 + rng.normal(0, 2, length).cumsum() + 5 * np.sin(np.arange(length))
            if i == 2:
                y = np.full(length, 7.0)  # constant: mase and smape undefined in places
            if name == "a" and i == 4:
                y[-2] = np.nan  # a missing actual in the last test block: not scored
            rows += [{"s": f"{name}{i}", "t": t, "y": float(v)} for t, v in enumerate(y)]
        pd.DataFrame(rows).to_csv(folder / f"{name}.csv", index=False)
    cfg = folder / f"c{chunk}.yaml"
    cfg.write_text(CONFIG.format(chunk=chunk))
    return cfg


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    folder = tmp_path_factory.mktemp("chunks")
    outs = []
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(parquet_files, "GROUP_SERIES", 3)
        for chunk in CHUNKS:
            out = folder / f"out{chunk}"
            runner.run(_write(folder, chunk), out_dir=out)
            outs.append(out)
    return outs


def _files(out: Path) -> dict[str, bytes]:
    return {str(p.relative_to(out)): p.read_bytes() for p in sorted(out.rglob("*"))
            if p.is_file()}


def test_every_file_is_the_same_bytes_whatever_the_chunk(runs: list[Path]) -> None:
    whole = _files(runs[0])
    assert {"leaderboard.csv", "horizon.csv", "scores.parquet", "forecasts.parquet",
            "failures.csv", "selection.csv", "manifest.json", "report.html"} <= set(whole)
    for out in runs[1:]:
        chunked = _files(out)
        assert sorted(chunked) == sorted(whole)
        for name, data in whole.items():
            if name == "history.jsonl":  # its line holds the time of the run
                lines = [json.loads(x) for x in (data, chunked[name])]
                for line in lines:
                    line.pop("time")
                assert lines[0] == lines[1]
                continue
            if name == RECORD:
                # it holds the config file's bytes (the chunk is set there) and the digest of
                # each file, history.jsonl's (the time) too: the other digests are the same
                digests = [json.loads(x)["outputs"] for x in (data, chunked[name])]
                for d in digests:
                    d.pop("history.jsonl")
                assert digests[0] == digests[1]
                continue
            assert chunked[name] == data, (out.name, name)
    board = pd.read_csv(runs[0] / "leaderboard.csv")
    assert board["failed"].sum() > 0  # the plugin's fold, and what is made from it
    manifest = json.loads(whole["manifest.json"])
    assert manifest["data"]["a"]["unscored_actuals"] == 1
    assert "chunk" not in manifest["config"]["execution"]


def test_forecasts_file_has_a_row_group_per_block_of_series(runs: list[Path]) -> None:
    file = pq.ParquetFile(runs[1] / "forecasts.parquet")
    frame = _decoded(runs[1] / "forecasts.parquet")
    kept = frame.groupby("dataset")["forecaster"].nunique()
    # blocks of 3 series: a0-a2 (a1 has no task), a3-a5, a6; b0-b2, b3
    assert file.metadata.num_row_groups == 3 * kept["a"] + 2 * kept["b"]
    for g in range(file.metadata.num_row_groups):
        group = file.read_row_group(g).to_pandas()
        assert group["forecaster"].nunique() == 1
        numbers = group["series"].astype(str).str[1:].astype(int)
        assert (numbers // 3).nunique() == 1
    assert len(frame) == len(frame.drop_duplicates(["dataset", "series", "forecaster", "fold",
                                                    "step"]))


def _decoded(path: Path) -> pd.DataFrame:
    frame = pq.read_table(path).to_pandas()
    for col in ("dataset", "series", "forecaster"):
        frame[col] = frame[col].astype(str)
    return frame


def test_the_chunk_is_left_out_of_the_config_hash(tmp_path: Path) -> None:
    hashes = {config_hash(prepare(_write(tmp_path, chunk)).config) for chunk in CHUNKS}
    assert len(hashes) == 1


def test_per_step_sums_carry_from_chunk_to_chunk_bit_for_bit(tmp_path: Path) -> None:
    evs = [evaluate(prepare(_write(tmp_path, chunk)), quiet=True) for chunk in CHUNKS]
    for d in range(2):
        for rs in zip(*(ev.datasets[d].results for ev in evs)):
            for col, sc in rs[0].scores.items():
                for other in rs[1:]:
                    assert np.array_equal(other.scores[col].step_sum, sc.step_sum)
                    assert np.array_equal(other.scores[col].per_step, sc.per_step,
                                          equal_nan=True)
                    assert np.array_equal(other.scores[col].per_task, sc.per_task,
                                          equal_nan=True)
            for other in rs[1:]:
                assert np.array_equal(other.versus_reference, rs[0].versus_reference,
                                      equal_nan=True)


def test_running_sum_adds_in_sequence() -> None:
    # a pairwise sum of these rows gives 1.0; in sequence the 1.0 is lost under 1e16 (common
    # practice: floating-point addition is not associative)
    rows = np.array([[1e16], [1.0], [-1e16], [0.0]])
    assert running_sum(np.zeros(1), rows)[0] == ((1e16 + 1.0) - 1e16) + 0.0
    assert running_sum(running_sum(np.zeros(1), rows[:2]), rows[2:]) == running_sum(
        np.zeros(1), rows)


def test_a_chunk_holds_its_series_whole_and_no_more(tmp_path: Path) -> None:
    plan = prepare(_write(tmp_path, 2))
    seen = []
    ev = evaluate(plan, quiet=True, sink=lambda c: seen.append(
        (c.dataset, c.tasks, np.unique(c.plan.series).tolist())))
    for d, dp in enumerate(plan.datasets):
        mine = [(t, s) for dd, t, s in seen if dd == d]
        assert [t for t, _ in mine] == list(series_chunks(dp, 2))
        assert all(len(s) <= 2 for _, s in mine)
        covered = np.concatenate([np.arange(t.start, t.stop) for t, _ in mine])
        assert covered.tolist() == list(range(dp.n_tasks))  # every task once, in order
        assert sorted(x for _, s in mine for x in s) == sorted(set(dp.series.tolist()))
        # nothing of the forecasts is kept once the chunks are written
        assert all(r.point is None for r in ev.datasets[d].results)


def test_scoring_prints_nothing_and_returns_its_notes(tmp_path: Path, capfd) -> None:
    ev = evaluate(prepare(_write(tmp_path, 2)), quiet=False)
    # the engine's progress line of the plugin's tasks, and nothing else
    err = capfd.readouterr().err.splitlines()
    assert err and all(line.startswith("castgrid: model tasks") for line in err), err
    a = ev.datasets[0]
    assert any("1 missing actual(s)" in note for note in a.notes)
    assert any("undefined" in w for w in a.warnings)  # the constant series' mase


def test_a_reader_of_a_few_series_reads_their_row_groups_only(tmp_path: Path) -> None:
    from runner.output.reader import ResultsFolder, _row_groups, read_arrow

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(parquet_files, "GROUP_ROWS", 8)  # two tasks (horizon 4) per row group
        runner.run(_write(tmp_path, 10_000), out_dir=tmp_path / "out")
    path = tmp_path / "out" / "forecasts.parquet"
    file = pq.ParquetFile(path)
    sizes = [file.metadata.row_group(g).num_rows for g in range(file.metadata.num_row_groups)]
    assert max(sizes) == 8
    wanted = [("dataset", "=", "a"), ("forecaster", "=", "naive"), ("series", "in", ["a3"])]
    groups = _row_groups(file.metadata, wanted)
    # a3's tasks lie in one or two groups of two tasks, out of many
    assert 0 < len(groups) <= 2 < file.metadata.num_row_groups // 4
    read = read_arrow(ResultsFolder.open(tmp_path / "out"), "forecasts.parquet", None, wanted)
    frame = _decoded(path)
    expected = frame[(frame["dataset"] == "a") & (frame["forecaster"] == "naive")
                     & (frame["series"] == "a3")]
    got = read.to_pandas()
    assert len(got) == len(expected) > 0
    assert np.array_equal(got["forecast"].to_numpy(), expected["forecast"].to_numpy())


def test_a_failed_forecasts_write_leaves_nothing_behind(tmp_path: Path) -> None:
    cfg = _write(tmp_path, 2)
    calls = []

    def full_disk(self, table, group_rows=None):
        calls.append(1)
        if len(calls) == 2:  # the second block, written on the sink's thread
            raise OSError(28, "No space left on device")
        return original(self, table, group_rows)

    original = parquet_files.ParquetFile.write
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(parquet_files.ParquetFile, "write", full_disk)
        with pytest.raises(OSError, match="No space left"):
            runner.run(cfg, out_dir=tmp_path / "out")
    assert len(calls) == 2  # it stopped at the failed block
    assert not (tmp_path / "out").exists()
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []


def test_forecasters_computed_side_by_side_give_the_same_bits(tmp_path: Path) -> None:
    from runner.scoring import evaluate as evaluate_module

    plan = prepare(_write(tmp_path, 3))
    evs = []
    for threshold in (0, 10**12):  # every chunk on threads; none
        with pytest.MonkeyPatch.context() as mp:
            mp.setattr(evaluate_module, "THREADED_VALUES", threshold)
            evs.append(evaluate(plan, quiet=True))
    for d in range(len(plan.datasets)):
        for a, b in zip(evs[0].datasets[d].results, evs[1].datasets[d].results):
            assert a.spec.name == b.spec.name
            for col, sc in a.scores.items():
                assert np.array_equal(sc.per_task, b.scores[col].per_task, equal_nan=True)
                assert np.array_equal(sc.step_sum, b.scores[col].step_sum)
            assert np.array_equal(a.versus_reference, b.versus_reference, equal_nan=True)
