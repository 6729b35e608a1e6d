"""The package's import layers (pyproject.toml, [tool.importlinter]), checked by import-linter.

A lower layer (config, data, windows, forecasters, ...) never imports a higher one (scoring,
output, report, cli, ...), so a newcomer can read the package top to bottom.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

REPO = Path(__file__).resolve().parent.parent
LINT = Path(sys.executable).with_name("lint-imports")


def _lint(package_parent: Path) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "PYTHONPATH": str(package_parent)}
    return subprocess.run(
        [str(LINT), "--config", str(REPO / "pyproject.toml"), "--no-cache"],
        cwd=package_parent, env=env, capture_output=True, text=True, timeout=300,
    )


def test_the_package_keeps_its_layers():
    done = _lint(REPO)
    assert done.returncode == 0, done.stdout + done.stderr
    assert "1 kept, 0 broken" in done.stdout


def test_a_lower_layer_importing_a_higher_one_breaks_the_contract(tmp_path):
    shutil.copytree(REPO / "runner", tmp_path / "runner",
                    ignore=shutil.ignore_patterns("__pycache__"))
    model = tmp_path / "runner" / "config" / "model.py"
    model.write_text(model.read_text() + "\nimport runner.scoring.leaderboard  # noqa\n")
    done = _lint(tmp_path)
    assert done.returncode != 0
    assert "BROKEN" in done.stdout and "runner.config.model -> runner.scoring.leaderboard" in (
        done.stdout.replace("\n", " ")
    ), done.stdout
