"""The committed demo results are reproducible: rerun the demo config, diff, nothing changed.

results/demo (leaderboard.csv, leaderboard.md, manifest.json) is the reference kept in the
repository; configs/demo.yaml runs on the invented bakery data. The run uses the config's own
forecast cache (results/.cache under the repository), so only a cold cache pays for the fits.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

from runner.cli import main

ROOT = Path(__file__).resolve().parents[1]
REFERENCE = ROOT / "results" / "demo"


def test_demo_rerun_matches_the_committed_results(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    assert (REFERENCE / "leaderboard.csv").is_file(), (
        "results/demo/leaderboard.csv is missing: run `castgrid run configs/demo.yaml` and "
        "commit results/demo"
    )
    out = tmp_path / "demo"
    done = subprocess.run(
        [sys.executable, "-m", "runner", "run", "configs/demo.yaml", "--out", str(out),
         "--quiet"],
        cwd=ROOT, capture_output=True, text=True, timeout=900,
    )
    # 3 = done with failed tasks: still a result to compare (diff shows failed counts too)
    assert done.returncode in (0, 3), done.stderr[-2000:]

    monkeypatch.chdir(ROOT)
    code = main(["diff", "results/demo", str(out), "--fail-if-worse", "0"])
    report = capsys.readouterr().out
    assert code == 0, report
    assert report.rstrip().endswith("no change: same config, data, forecasters and scores"), \
        report
    # the contract's guarantee behind "no change": a byte-identical leaderboard
    assert (out / "leaderboard.csv").read_bytes() == (REFERENCE / "leaderboard.csv").read_bytes()
