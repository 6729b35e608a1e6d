"""Outputs sized for the job: which forecasts are kept (output.forecasts), compact Parquet
(dictionary text, zstd, float64), and ``castgrid check``'s estimate of output size and memory.

The data are invented random walks (seeded, for these tests only); the Parquet files are read
back with pyarrow, the reference reader of the format.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import runner

SERIES, LENGTH = 30, 60


def _config(tmp_path: Path, forecasts: str | None = None, extra: str = "") -> Path:
    rng = np.random.default_rng(7)
    rows = [{"item": f"i{s:02d}", "t": t, "y": float(v)}
            for s in range(SERIES)
            for t, v in enumerate(100 + rng.normal(0, 2, LENGTH).cumsum())]
    pd.DataFrame(rows).to_csv(tmp_path / "d.csv", index=False)
    output = f"output: {{forecasts: {forecasts}}}\n" if forecasts else ""
    cfg = tmp_path / f"c-{forecasts}.yaml"
    cfg.write_text(
        "experiment: sized\nhorizon: 6\nseason: 12\n"
        "datasets:\n  - {name: d, path: d.csv, series: item, time: t, target: y}\n"
        "windows: {scheme: expanding, train: 30, step: 6, folds: 4}\n"
        "models:\n  - {name: avg, kind: combination, params: {of: [naive, drift]}}\n"
        "intervals: [80]\nexecution: {jobs: 1, cache: false}\n" + output + extra
    )
    return cfg


@pytest.fixture(scope="module")
def runs(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """The same run with each output.forecasts choice (and the key left out)."""
    folder = tmp_path_factory.mktemp("sized")
    out = {}
    for mode in (None, "all", "compared", "none"):
        out[str(mode)] = folder / f"out-{mode}"
        runner.run(_config(folder, mode), out_dir=out[str(mode)])
    return out


def test_default_keeps_every_forecaster(runs: dict[str, Path]) -> None:
    kept = pd.read_parquet(runs["None"] / "forecasts.parquet")
    board = pd.read_csv(runs["None"] / "leaderboard.csv")
    assert set(kept["forecaster"].astype(str)) == set(board["forecaster"])
    assert (runs["None"] / "forecasts.parquet").read_bytes() == (
        runs["all"] / "forecasts.parquet").read_bytes()


def test_compared_keeps_candidates_and_the_reference(runs: dict[str, Path]) -> None:
    kept = pd.read_parquet(runs["compared"] / "forecasts.parquet")
    # common practice: the seasonal naive is the reference for a seasonal series (season 12)
    assert set(kept["forecaster"].astype(str)) == {"avg", "seasonal_naive"}
    every = pd.read_parquet(runs["all"] / "forecasts.parquet")
    same = every[every["forecaster"].astype(str).isin(["avg", "seasonal_naive"])]
    pd.testing.assert_frame_equal(
        kept.astype({"forecaster": str}).reset_index(drop=True),
        same.astype({"forecaster": str}).reset_index(drop=True),
    )


def test_none_writes_no_forecasts_and_changes_no_score(runs: dict[str, Path]) -> None:
    assert not (runs["none"] / "forecasts.parquet").exists()
    for mode in ("all", "compared"):
        assert (runs[mode] / "leaderboard.csv").read_bytes() == (
            runs["none"] / "leaderboard.csv").read_bytes()
        assert pq.read_table(runs[mode] / "scores.parquet").equals(
            pq.read_table(runs["none"] / "scores.parquet"))
    page = (runs["none"] / "report.html").read_text()
    assert "output.forecasts: none" in page


def test_parquet_is_compact_and_exact(runs: dict[str, Path]) -> None:
    for name in ("forecasts.parquet", "scores.parquet"):
        f = pq.ParquetFile(runs["all"] / name)
        meta = f.metadata.row_group(0)
        assert {meta.column(i).compression for i in range(meta.num_columns)} == {"ZSTD"}
        schema = f.schema_arrow
        for text in ("dataset", "series", "forecaster"):
            assert pa.types.is_dictionary(schema.field(text).type), (name, text)
    schema = pq.read_schema(runs["all"] / "forecasts.parquet")
    for col in ("actual", "forecast", "interval_80_low", "interval_80_high"):
        assert schema.field(col).type == pa.float64()


def test_bad_forecasts_choice_is_one_line(tmp_path: Path, cli) -> None:
    res = cli("check", str(_config(tmp_path, "some")))
    assert res.returncode == 2
    assert re.search(r"output\.forecasts: .*'all', 'compared' or 'none'", res.stderr), res.stderr
    assert len(res.stderr.strip().splitlines()) == 1


def test_check_estimates_size_within_a_factor_of_two(tmp_path: Path, cli) -> None:
    cfg = _config(tmp_path, "all")
    res = cli("check", str(cfg))
    assert res.returncode == 0, res.stderr
    line = next(x for x in res.stdout.splitlines() if x.startswith("estimated output"))
    assert re.search(r"estimated peak memory [\d.]+ (MiB|GiB)$", line), line
    units = {"B": 1, "KiB": 2**10, "MiB": 2**20}
    sizes = {name: float(num) * units[unit]
             for name, num, unit in re.findall(r"(\w+\.parquet) ([\d.]+) (KiB|MiB|B)\b", line)}
    assert set(sizes) == {"forecasts.parquet", "scores.parquet"}, line
    runner.run(cfg, out_dir=tmp_path / "out")
    for name, guess in sizes.items():
        real = (tmp_path / "out" / name).stat().st_size
        assert real / 2 <= guess <= real * 2, (name, guess, real)
