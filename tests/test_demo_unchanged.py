"""The committed demo results are reproducible: rerun the demo config, diff against git.

The reference is results/demo (leaderboard.csv, leaderboard.md, manifest.json) as committed at
HEAD, read with ``git show`` through castgrid diff's ``REV:path`` support, never from the
working tree: ``make demo`` rewrites the working copy, and a test against it would then check
nothing. configs/demo.yaml runs on the invented bakery data into a temporary folder, with the
config's own forecast cache (results/.cache), so only a cold cache pays for the fits.

On another CPU or BLAS kernel the statsmodels fits may differ in their last digits; the test
asks for no change beyond castgrid diff's numerical tolerance (README, "Reproducibility"), and
the diff names the platform change. Outside a git checkout (a source archive) there is no
committed reference to compare with: the test is skipped and says so.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from runner.cli import main

ROOT = Path(__file__).resolve().parents[1]
REFERENCE = "HEAD:results/demo"


def _git(*argv: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(["git", *argv], cwd=ROOT, capture_output=True, text=True)


def _require_git_checkout() -> None:
    """Skip (with the reason) unless ROOT is the top of a git checkout with a HEAD commit."""
    if shutil.which("git") is None:
        pytest.skip("git is not installed: the committed demo reference is read with git")
    top = _git("rev-parse", "--show-toplevel")
    if top.returncode != 0 or Path(top.stdout.strip()).resolve() != ROOT:
        pytest.skip(f"{ROOT} is not a git checkout (a source archive?): there is no committed "
                    "results/demo to compare with")
    if _git("rev-parse", "--verify", "--quiet", "HEAD^{commit}").returncode != 0:
        pytest.skip(f"{ROOT} is a git checkout without a commit yet: nothing is committed")


def test_demo_rerun_matches_the_committed_results(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    _require_git_checkout()
    # Inside a checkout the reference must exist: a missing one is an error, not a skip.
    missing = [name for name in ("leaderboard.csv", "manifest.json")
               if _git("cat-file", "-e", f"{REFERENCE}/{name}").returncode != 0]
    assert not missing, (
        f"{REFERENCE}/{missing[0]} is not committed: run `castgrid run configs/demo.yaml` and "
        "commit results/demo"
    )
    out = tmp_path / "demo"
    done = subprocess.run(
        [sys.executable, "-m", "runner", "run", "configs/demo.yaml", "--out", str(out),
         "--quiet"],
        cwd=ROOT, capture_output=True, text=True, timeout=1800,
    )
    # 3 = done with failed tasks: still a result to compare (diff shows failed counts too)
    assert done.returncode in (0, 3), done.stderr[-2000:]

    monkeypatch.chdir(ROOT)
    code = main(["diff", REFERENCE, str(out), "--fail-if-worse", "0"])
    report = capsys.readouterr().out
    assert code == 0, report
    last = report.rstrip().splitlines()[-1]
    assert last == "no change: same config, data, forecasters and scores" or last.startswith(
        "no change beyond numerical tolerance: same config, data and forecasters;"), report
