"""Nothing loaded for nothing: checking a config and rerunning a cached run import no fitting,
statistics-package or plotting library whose result is already known.

Each check runs in a fresh interpreter (this test process has those libraries loaded already)
and reads ``sys.modules`` at the end.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
from conftest import REPO

#: Modules that a run whose forecasts and plots are known does not need.
HEAVY = ("statsmodels.tsa", "scipy.stats", "matplotlib")

CONFIG = """
experiment: light
horizon: 3
datasets:
  - {name: d, path: d.csv, series: s, time: t, target: y, season: 4}
windows: {scheme: expanding, train: 24, step: 3, folds: 2}
models:
  - {name: arima, kind: arima, params: {order: [0, 1, 1]}}
  - {name: search, kind: arima_search}
  - {name: ets, kind: ets, grid: {trend: [add, null]}}
  - {name: theta, kind: theta}
intervals: [80]
execution: {jobs: 1, cache: cache}
"""


def _loaded(code: str, cwd: Path) -> list[str]:
    """Run ``code`` in a fresh interpreter; the HEAVY modules loaded at its end."""
    probe = (f"{code}\nimport sys, json\n"
             f"print(json.dumps([m for m in {HEAVY!r} if m in sys.modules]))")
    res = subprocess.run([sys.executable, "-c", probe], cwd=cwd, capture_output=True, text=True,
                         env={"PYTHONPATH": str(REPO), "PATH": ""}, timeout=600)
    assert res.returncode == 0, res.stderr
    return json.loads(res.stdout.strip().splitlines()[-1])


def _folder(tmp_path: Path, config: str = CONFIG) -> Path:
    rng = np.random.default_rng(0)  # invented series, for this test only
    rows = [{"s": s, "t": t, "y": float(20 + t * 0.3 + 3 * np.sin(t) + rng.normal())}
            for s in ("a", "b") for t in range(30)]
    pd.DataFrame(rows).to_csv(tmp_path / "d.csv", index=False)
    (tmp_path / "c.yaml").write_text(config)
    return tmp_path


def test_checking_model_params_imports_no_statsmodels(tmp_path: Path) -> None:
    folder = _folder(tmp_path)
    # prepare() builds every forecaster once to validate its params (validation.py)
    assert _loaded("from runner.pipeline import prepare; prepare('c.yaml')", folder) == []


def test_warm_rerun_imports_no_fitting_test_or_plotting_library(tmp_path: Path) -> None:
    # one quick model keeps the cold run short; its fit imports statsmodels like any other
    models = CONFIG[CONFIG.index("  - {name: arima") : CONFIG.index("  - {name: theta")]
    only_theta = CONFIG.replace(models, "")
    folder = _folder(tmp_path, only_theta)
    run = "from runner.cli import main; main(['run', 'c.yaml', '--out', 'out', '--quiet'])"
    cold = _loaded(run, folder)
    # it fitted (and drew: in the painter process where there is one, else here)
    assert "statsmodels.tsa" in cold
    assert len(list((folder / "out" / "plots").glob("*.png"))) >= 4
    # A comment changes the config's bytes, not its meaning: the rerun is a full one (an
    # unchanged config would find its results up to date and run nothing at all).
    with open(folder / "c.yaml", "a") as fh:
        fh.write("# rerun\n")
    assert _loaded(run, folder) == []  # everything cached, every plot unchanged
