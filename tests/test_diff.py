"""``castgrid diff`` on folders built to differ in known ways, on disk and from git.

The folders are written in tmp_path following the results-folder contract (leaderboard.csv and
manifest.json, the two files diff reads); the numbers are invented for these tests.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import pytest

from runner.cli import main
from runner.compare.diff import Results, compare, relative_change, worsening
from runner.compare.diff_text import format_diff
from runner.errors import DataError

HEADER = ("dataset,rank,forecaster,kind,role,series,folds,tasks,failed,mae_mean,mae_sd,"
          "mase_mean,mase_sd,mase_rel,win_share,dm_better,dm_worse,wilcoxon_p,beats_reference")


def _row(ds: str, rank: int, name: str, kind: str, role: str, mae: float, mase: float,
         ref: float) -> str:
    if name == "seasonal_naive":
        sig = ",,,,,false"
    else:
        sig = f",0.6,2,0,0.03,{'true' if mase < ref else 'false'}"
    return (f"{ds},{rank},{name},{kind},{role},4,5,20,0,{mae:.6g},1.5,{mase:.6g},0.1,"
            f"{mase / ref:.6g}{sig}")


def write_folder(path: Path, shops: list[tuple[str, str, str, float, float]],
                 fingerprint: str, models: list[str]) -> Path:
    """A results folder with datasets shops (given rows, ranked here) and depots (fixed)."""
    path.mkdir(parents=True, exist_ok=True)
    lines = [HEADER]
    ref = next(r[4] for r in shops if r[0] == "seasonal_naive")
    for rank, (name, kind, role, mae, mase) in enumerate(sorted(shops, key=lambda r: r[4]), 1):
        lines.append(_row("shops", rank, name, kind, role, mae, mase, ref))
    lines.append(_row("depots", 1, "arima", "arima", "candidate", 7.0, 0.7, 1.1))
    lines.append(_row("depots", 2, "seasonal_naive", "seasonal_naive", "baseline", 11.0, 1.1,
                      1.1))
    (path / "leaderboard.csv").write_text("\n".join(lines) + "\n")
    config = {"experiment": "shop-demand", "horizon": 6, "models": models}
    manifest = {
        "experiment": "shop-demand",
        "config": config,
        "config_hash": format(abs(hash(json.dumps(config))), "x").rjust(16, "0"),
        "data": {
            "shops": {"path": "data/shops.csv", "fingerprint": fingerprint, "series": 4,
                      "observations": 240 if fingerprint == "aaaa1111" else 252},
            "depots": {"path": "data/depots.csv", "fingerprint": "dddd4444", "series": 4,
                       "observations": 100},
        },
        "versions": {"castgrid": "0.1.0"},
        "tasks": {"total": 40, "computed": 40, "cached": 0, "failed": 0, "skipped_series": 0},
        "rank_by": "mase",
        "metrics": ["mae", "mase"],
        "reference": {"shops": "seasonal_naive", "depots": "seasonal_naive"},
        "forecasters": [],
    }
    (path / "manifest.json").write_text(json.dumps(manifest, indent=2))
    return path


OLD_SHOPS = [
    ("arima", "arima", "candidate", 8.0, 0.80),
    ("theta", "theta", "candidate", 8.5, 0.85),
    ("croston", "plugin", "candidate", 9.0, 0.90),
    ("seasonal_naive", "seasonal_naive", "baseline", 10.0, 1.00),
    ("naive", "naive", "baseline", 12.0, 1.20),
]
NEW_SHOPS = [
    ("theta", "theta", "candidate", 8.4, 0.82),  # better, now first
    ("arima", "arima", "candidate", 8.9, 0.88),  # 10% worse, now second
    ("seasonal_naive", "seasonal_naive", "baseline", 10.0, 1.00),
    ("ets", "ets", "candidate", 10.4, 1.05),  # added
    ("naive", "naive", "baseline", 14.4, 1.44),  # a baseline 20% worse: never gates
]


@pytest.fixture
def pair(tmp_path: Path) -> tuple[Path, Path]:
    old = write_folder(tmp_path / "old", OLD_SHOPS, "aaaa1111", ["arima", "theta", "croston"])
    new = write_folder(tmp_path / "new", NEW_SHOPS, "bbbb2222", ["arima", "theta", "ets"])
    return old, new


def test_known_differences(pair: tuple[Path, Path]) -> None:
    d = compare(Results.load(str(pair[0])), Results.load(str(pair[1])))
    assert d.config_changed and d.config_changes == ["models"]
    shops, depots = d.datasets
    assert shops.name == "shops" and depots.name == "depots"
    assert shops.added == ["ets"] and shops.gone == ["croston"]
    assert shops.data_changed and not depots.data_changed
    ranks = {f.name: (f.old_rank, f.new_rank) for f in shops.forecasters}
    assert ranks["arima"] == (1, 2) and ranks["theta"] == (2, 1)  # the swap
    assert ranks["ets"] == (None, 4) and ranks["croston"] == (3, None)
    arima = next(f for f in shops.forecasters if f.name == "arima")
    assert arima.values["mase"] == (0.80, 0.88)
    assert arima.values["mae"] == (8.0, 8.9)
    assert not depots.changed()
    assert d.changed()


def test_text_output(pair: tuple[Path, Path]) -> None:
    d = compare(Results.load(str(pair[0])), Results.load(str(pair[1])))
    text = format_diff(d)
    assert "config: changed (models)" in text
    assert "data: CHANGED (fingerprint aaaa1111 -> bbbb2222; series 4; observations 240 -> 252)" \
        in text
    assert "added: ets" in text and "gone: croston" in text
    arima = next(line for line in text.splitlines() if " arima " in line and "1 -> 2" in line)
    # old, new, absolute change and relative change of the rank metric
    assert "0.8" in arima and "0.88" in arima and "0.08" in arima and "+10.00%" in arima
    assert arima.rstrip().endswith("worse")
    theta = next(line for line in text.splitlines() if " theta " in line)
    assert "2 -> 1" in theta and "-3.53%" in theta and theta.rstrip().endswith("better")
    # the other metric's change, absolute and relative
    mae = next(line for line in text.splitlines() if "arima" in line and " mae " in line)
    assert "8.9" in mae and "+11.25%" in mae
    assert "dataset depots" in text and "data: unchanged (series 4; observations 100)" in text
    # the folders record no platform, so a score that moved within its tolerance is noise
    assert text.splitlines()[-1] == ("changed: config changed; data changed for shops; "
                                     "1 forecaster(s) added, 1 gone; 3 mase score(s) changed; "
                                     "1 score(s) within tolerance")


def test_markdown_output(pair: tuple[Path, Path], capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["diff", str(pair[0]), str(pair[1]), "--format", "markdown"]) == 0
    out = capsys.readouterr().out
    assert "#### dataset shops" in out
    table = [line for line in out.splitlines() if line.startswith("|")]
    assert table[0].startswith("| rank | forecaster | role | mase old | mase new |")
    assert table[1].startswith("|---:|---|---|---:|---:|")
    # one number of decimals for the metric, from its scale (runner.output.numbers)
    assert any("| 1 -> 2 | arima | candidate | 0.8000 | 0.8800 | 0.0800 | +10.00% |" in line
               for line in table)
    assert all(line.endswith("|") for line in table)


def test_fail_if_worse_gates_on_candidates_only(pair: tuple[Path, Path],
                                                capsys: pytest.CaptureFixture[str]) -> None:
    old, new = str(pair[0]), str(pair[1])
    assert main(["diff", old, new, "--fail-if-worse", "5"]) == 4  # arima +10%
    out = capsys.readouterr().out
    assert "worse by more than 5% in mase: arima on shops (+10.00%)" in out
    assert "naive on" not in out.splitlines()[-1]  # naive got 20% worse but is a baseline
    assert main(["diff", old, new, "--fail-if-worse", "10.5"]) == 0
    assert main(["diff", old, new]) == 0  # without the option the diff only reports


def _folder_and_copy(tmp_path: Path) -> tuple[Path, Path]:
    """Results folder ``a`` of OLD_SHOPS with arima, and ``b`` a byte copy of it."""
    a = write_folder(tmp_path / "a", OLD_SHOPS, "aaaa1111", ["arima"])
    b = tmp_path / "b"
    shutil.copytree(a, b)
    return a, b


def test_identical_folders(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    a, b = _folder_and_copy(tmp_path)
    assert main(["diff", str(a), str(b), "--fail-if-worse", "0"]) == 0
    out = capsys.readouterr().out
    assert out.rstrip().endswith("no change: same config, data, forecasters and scores")
    assert "config: unchanged" in out and "CHANGED" not in out


def test_a_vanished_score_counts_as_worse(tmp_path: Path) -> None:
    a, b = _folder_and_copy(tmp_path)
    text = (b / "leaderboard.csv").read_text().replace(
        "shops,1,arima,arima,candidate,4,5,20,0,8,1.5,0.8,0.1,0.8,",
        "shops,,arima,arima,candidate,4,5,0,20,,,,,,")
    assert text != (b / "leaderboard.csv").read_text()
    (b / "leaderboard.csv").write_text(text)
    d = compare(Results.load(str(a)), Results.load(str(b)))
    assert [(ds, name) for ds, name, _ in d.worse_than(50)] == [("shops", "arima")]
    arima = next(line for line in format_diff(d).splitlines() if " arima " in line)
    assert "0 -> 20" in arima and arima.rstrip().endswith("worse")  # failed tasks shown


def test_direction_of_worse() -> None:
    assert worsening("mase", 1.0, 1.1) == pytest.approx(10.0)
    assert worsening("me", -2.0, 1.0) == pytest.approx(-50.0)  # closer to zero is better
    assert worsening("r2", 0.8, 0.6) == pytest.approx(25.0)  # higher is better
    assert relative_change(0.0, 0.0) == 0.0
    assert relative_change(0.0, 1.0) == float("inf")


def test_bad_folders_are_named(tmp_path: Path, pair: tuple[Path, Path],
                               capsys: pytest.CaptureFixture[str]) -> None:
    missing = tmp_path / "nowhere"
    assert main(["diff", str(missing), str(pair[1])]) == 2
    assert f"{missing}: results folder not found" in capsys.readouterr().err
    (pair[0] / "manifest.json").unlink()
    with pytest.raises(DataError, match=r"old/manifest\.json: file not found"):
        Results.load(str(pair[0]))
    board = pair[1] / "leaderboard.csv"
    board.write_text(board.read_text().replace("mase_mean", "mase_avg"))
    with pytest.raises(DataError, match=r"new/leaderboard\.csv: column 'mase_mean' is missing"):
        Results.load(str(pair[1]))
    board.write_text(HEADER + "\nshops,1,x,x,candidate,4,5,20,0,oops,1,1,1,1,,,,,false\n")
    with pytest.raises(DataError, match=r"leaderboard\.csv: line 2: column 'mae_mean': expected "
                                        r"a number, got 'oops'"):
        Results.load(str(pair[1]))
    (pair[1] / "manifest.json").write_text("{\n  oops")
    with pytest.raises(DataError, match=r"manifest\.json: line 2: not valid JSON"):
        Results.load(str(pair[1]))


def _git(repo: Path, *argv: str) -> None:
    subprocess.run(["git", "-c", "user.name=castgrid-test", "-c",
                    "user.email=test@example.invalid", *argv], cwd=repo, check=True,
                   capture_output=True)


@pytest.mark.skipif(shutil.which("git") is None, reason="needs git")
def test_diff_against_a_git_revision(tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                                     capsys: pytest.CaptureFixture[str]) -> None:
    repo = tmp_path / "repo"
    repo.mkdir()
    _git(repo, "init", "-q")
    write_folder(repo / "results" / "demo", OLD_SHOPS, "aaaa1111", ["arima", "theta"])
    _git(repo, "add", "results")
    _git(repo, "commit", "-q", "-m", "results of the first release")
    shutil.rmtree(repo / "results" / "demo")
    write_folder(repo / "results" / "demo", NEW_SHOPS, "bbbb2222", ["arima", "theta", "ets"])
    monkeypatch.chdir(repo)

    assert main(["diff", "HEAD:results/demo", "results/demo", "--fail-if-worse", "5"]) == 4
    out = capsys.readouterr().out
    assert out.startswith("old: HEAD:results/demo (experiment shop-demand")
    assert "added: ets" in out and "gone: croston" in out
    assert "data: CHANGED (fingerprint aaaa1111 -> bbbb2222" in out
    # the committed folder against itself: nothing changed
    assert main(["diff", "HEAD:results/demo", "HEAD:results/demo"]) == 0
    assert "no change" in capsys.readouterr().out

    assert main(["diff", "v9.9:results/demo", "results/demo"]) == 2
    assert "v9.9:results/demo: unknown git revision 'v9.9'" in capsys.readouterr().err
    assert main(["diff", "HEAD:results/other", "results/demo"]) == 2
    err = capsys.readouterr().err
    assert "HEAD:results/other/manifest.json: file not found at git revision 'HEAD'" in err

    outside = tmp_path / "outside"
    outside.mkdir()
    monkeypatch.chdir(outside)
    monkeypatch.setenv("GIT_CEILING_DIRECTORIES", str(tmp_path))
    assert main(["diff", "HEAD:results/demo", str(repo / "results" / "demo")]) == 2
    assert "not inside a git repository" in capsys.readouterr().err


PLATFORM = {"machine": "x86_64", "system": "Linux", "cpu": "Example CPU",
            "blas": [{"library": "openblas", "version": "0.3.31", "kernel": "SkylakeX",
                      "file": "libopenblas.so"}]}


#: arima's leaderboard row in OLD_SHOPS, up to its mase: rank ... failed, mae, mae sd, mase
ARIMA_ROW = "shops,1,arima,arima,candidate,4,5,20,0,{mae},1.5,{mase},"


def _arima_scores(mae: str, mase: str):
    """An ``edit_csv`` for :func:`_rewrite`: arima's mae and mase (8 and 0.8) replaced."""
    return lambda t: t.replace(ARIMA_ROW.format(mae="8", mase="0.8"),
                               ARIMA_ROW.format(mae=mae, mase=mase))


def _rewrite(folder: Path, edit_csv=None, platform=None) -> None:
    if edit_csv is not None:
        board = folder / "leaderboard.csv"
        text = board.read_text()
        new = edit_csv(text)
        assert new != text
        board.write_text(new)
    if platform is not None:
        man = json.loads((folder / "manifest.json").read_text())
        man["platform"] = platform
        (folder / "manifest.json").write_text(json.dumps(man))


def _two_kernels(tmp_path: Path) -> tuple[Path, Path]:
    """Two copies of one results folder, recorded on SkylakeX and on Haswell."""
    a, b = _folder_and_copy(tmp_path)
    _rewrite(a, platform=PLATFORM)
    other = json.loads(json.dumps(PLATFORM))
    other["blas"][0]["kernel"] = "Haswell"
    _rewrite(b, platform=other)
    return a, b


def test_a_platform_change_is_named_and_noise_is_within_tolerance(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    a, b = _two_kernels(tmp_path)
    # arima's mase 0.8 -> 0.804 (+0.5%) and mae 8 -> 7.96 (-0.5%): within 2%
    _rewrite(b, _arima_scores("7.96", "0.804"))
    d = compare(Results.load(str(a)), Results.load(str(b)))
    assert d.platform_changes == [
        "BLAS openblas 0.3.31 SkylakeX -> openblas 0.3.31 Haswell"]
    assert not d.changed() and d.within_tolerance() == 2
    assert d.worse_than(0) == []
    assert main(["diff", str(a), str(b), "--fail-if-worse", "0"]) == 0
    out = capsys.readouterr().out
    assert "platform: changed (BLAS openblas 0.3.31 SkylakeX -> openblas 0.3.31 Haswell)" in out
    arima = next(line for line in out.splitlines() if " arima " in line and "0.804" in line)
    assert arima.rstrip().endswith("within tolerance") and "+0.50%" in arima
    mae = next(line for line in out.splitlines() if "arima" in line and " mae " in line)
    assert mae.rstrip().endswith("within tolerance")
    assert out.rstrip().splitlines()[-1] == (
        "no change beyond numerical tolerance: same config, data and forecasters; "
        "2 score(s) differ within tolerance (platform changed)")


def test_on_one_platform_every_difference_is_real(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # the same platform gives the same bits (SPEC): there a +0.05% move is a change
    a, b = _folder_and_copy(tmp_path)
    _rewrite(a, platform=PLATFORM)
    _rewrite(b, _arima_scores("8", "0.8004"), platform=PLATFORM)
    d = compare(Results.load(str(a)), Results.load(str(b)))
    assert d.platform_changes == [] and d.changed() and d.within_tolerance() == 0
    assert main(["diff", str(a), str(b), "--fail-if-worse", "0"]) == 4
    out = capsys.readouterr().out
    assert "platform: unchanged (x86_64, BLAS openblas 0.3.31 SkylakeX): scores are compared " \
        "exactly" in out
    arima = next(line for line in out.splitlines() if " arima " in line and "0.8004" in line)
    assert "worse" in arima and "within tolerance" not in arima


def test_a_change_beyond_tolerance_is_real_on_any_platform(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    a, b = _folder_and_copy(tmp_path)
    # +2.5%: past the 2% tolerance, so it is worse and gates at 1%
    _rewrite(b, _arima_scores("8", "0.82"))
    d = compare(Results.load(str(a)), Results.load(str(b)))
    assert d.changed() and d.within_tolerance() == 0
    assert [name for _, name, _ in d.worse_than(1)] == ["arima"]
    assert main(["diff", str(a), str(b), "--fail-if-worse", "1"]) == 4
    out = capsys.readouterr().out
    assert "platform: not recorded: scores are compared within the numerical tolerance" in out
    assert out.rstrip().splitlines()[-3] == "changed: 1 mase score(s) changed"


def test_noise_tolerance_of_each_metric() -> None:
    from runner.scoring.metrics import (
        NOISE_RELATIVE,
        NOISE_RELATIVE_INTERVAL,
        noise_tolerance,
    )

    assert noise_tolerance("mase", 0.8, 120, 6, 4) == pytest.approx(0.8 * NOISE_RELATIVE)
    assert noise_tolerance("me", -2.0, 120, 6, 4) == pytest.approx(2.0 * NOISE_RELATIVE)
    assert noise_tolerance("winkler_95", 600.0, 120, 6, 4) == pytest.approx(
        600 * NOISE_RELATIVE_INTERVAL)
    # coverage: one actual crossing a bound in each of 4 folds of 5 tasks x 6 steps
    # moves the mean of the fold means by 4 x (100 / 30) / 4 points
    assert noise_tolerance("coverage_80", 80.0, 20, 6, 4) == pytest.approx(100 * 4 / 120)
    # with 120 tasks that is 0.56 points, below the 1-point floor
    assert noise_tolerance("coverage_80", 80.0, 120, 6, 4) == pytest.approx(1.0)
    assert noise_tolerance("mase", float("nan"), 120, 6, 4) == 0.0


def _segments(folder: Path, rows: list[tuple[str, int, str, float, bool]],
              series: int = 4) -> None:
    """leaderboard_segments.csv of one segment (format kiosk, ``series`` series, 5 folds):
    rows of (forecaster, rank, role, mase, beats)."""
    lines = ["dataset,attribute,segment,rank,forecaster,kind,role,series,folds,tasks,failed,"
             "mase_mean,beats_reference"]
    lines += [f"shops,format,kiosk,{rank},{name},{name},{role},{series},5,{5 * series},0,"
              f"{mase!r},{'true' if beats else 'false'}" for name, rank, role, mase, beats in rows]
    (folder / "leaderboard_segments.csv").write_text("\n".join(lines) + "\n")


def test_segment_noise_is_within_tolerance_like_the_leaderboard(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Measured on the demo under two OpenBLAS kernels: every segment row's mase moved by far
    # less than the 2% tolerance, two candidates within noise of each other swapped places,
    # and diff called the run changed although the leaderboard itself was within tolerance.
    a, b = _two_kernels(tmp_path)
    _segments(a, [("arima", 1, "candidate", 0.94039, True),
                  ("theta", 2, "candidate", 0.94040, True),
                  ("seasonal_naive", 3, "baseline", 1.0, False)])
    # +0.0005% and -0.003%: within 2% of the value, and theta now ranks first
    _segments(b, [("theta", 1, "candidate", 0.94037, True),
                  ("arima", 2, "candidate", 0.940395, True),
                  ("seasonal_naive", 3, "baseline", 1.0, False)])
    d = compare(Results.load(str(a)), Results.load(str(b)))
    rows = {s.forecaster: s for s in d.datasets[0].segments}
    assert rows["theta"].within_tolerance() and rows["arima"].within_tolerance()
    assert rows["theta"].rank == (2, 1) and not any(s.changed() for s in rows.values())
    assert not d.changed()
    assert main(["diff", str(a), str(b), "--fail-if-worse", "0"]) == 0
    out = capsys.readouterr().out
    assert "segments: unchanged (3 rows of leaderboard_segments.csv)" in out
    assert out.rstrip().splitlines()[-1] == (
        "no change beyond numerical tolerance: same config, data and forecasters; "
        "2 score(s) differ within tolerance (platform changed)")

    # theta 2.5% better: a real change; the swap it causes is shown with it, and arima's own
    # move (within tolerance) is labelled so
    _segments(b, [("theta", 1, "candidate", 0.917, True),
                  ("arima", 2, "candidate", 0.940395, True),
                  ("seasonal_naive", 3, "baseline", 1.0, False)])
    d = compare(Results.load(str(a)), Results.load(str(b)))
    changed = {s.forecaster for s in d.datasets[0].segments if s.changed()}
    assert changed == {"theta", "arima"} and d.changed()
    text = format_diff(d)
    assert "segments that changed (2 of 3 rows of leaderboard_segments.csv):" in text
    arima = next(x for x in text.splitlines() if "kiosk" in x and " arima " in x)
    assert arima.rstrip().endswith("within tolerance")
    theta = next(x for x in text.splitlines() if "kiosk" in x and " theta " in x)
    assert theta.rstrip().endswith("better")


def test_a_small_segment_gets_the_tolerance_of_a_mean_over_fewer_series(tmp_path: Path) -> None:
    # A mean over n series of independent per-series noise moves by 1/sqrt(n) (common
    # practice): a segment of 1 of the dataset's 4 series gets twice the leaderboard's 2%.
    a, b = _two_kernels(tmp_path)
    _segments(a, [("arima", 1, "candidate", 0.8, True)], series=1)
    for new, noise in ((0.8 * 1.03, True), (0.8 * 1.05, False)):  # +3%, +5%
        _segments(b, [("arima", 1, "candidate", new, True)], series=1)
        d = compare(Results.load(str(a)), Results.load(str(b)))
        row = d.datasets[0].segments[0]
        assert row.tolerance == pytest.approx(0.8 * 0.02 * 2)
        assert row.within_tolerance() is noise and row.changed() is not noise
