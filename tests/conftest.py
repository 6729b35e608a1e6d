"""Shared helpers: running the castgrid command line as a user would."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent


def run_cli(
    *args: str, cwd: Path | None = None, timeout: float = 300
) -> subprocess.CompletedProcess:
    """Run ``python -m runner ARGS`` and capture its output."""
    return subprocess.run(
        [sys.executable, "-m", "runner", *args],
        cwd=cwd or REPO,
        capture_output=True,
        text=True,
        timeout=timeout,
    )


@pytest.fixture
def cli():
    """The :func:`run_cli` helper as a fixture."""
    return run_cli
