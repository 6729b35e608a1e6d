"""The whole evaluation as one call: plan, forecast, score, rank, write.

>>> import runner
>>> result = runner.run("configs/demo.yaml")          # doctest: +SKIP
>>> result.leaderboard[["forecaster", "mase_mean"]]   # doctest: +SKIP
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from .config import Config
from .evaluate import Evaluation, evaluate
from .leaderboard import build_leaderboard
from .plan import Plan, build_plan


@dataclass
class RunResult:
    """What :func:`run` returns: the leaderboard, the task scores and where they were written."""

    leaderboard: pd.DataFrame
    scores: pd.DataFrame
    out_dir: Path | None
    manifest: dict[str, Any]
    evaluation: Evaluation

    @property
    def failed_tasks(self) -> int:
        """Number of tasks that failed."""
        return int(self.manifest["tasks"]["failed"])


def output_dir(cfg: Config, override: str | Path | None = None) -> Path:
    """results/<experiment>, or output.dir, or the ``--out`` override."""
    if override is not None:
        return Path(override)
    if cfg.output.dir:
        return Path(cfg.output.dir)
    return Path("results") / cfg.experiment


def scores_frame(ev: Evaluation) -> pd.DataFrame:
    """One row per dataset, series, forecaster and fold with every metric column."""
    frames = []
    for dr in ev.datasets:
        dp = dr.plan
        for r in dr.results:
            frame = pd.DataFrame({
                "dataset": dp.panel.name,
                "series": [dp.panel.keys[i] for i in dp.series],
                "forecaster": r.spec.name,
                "fold": dp.fold,
            })
            for col, sc in r.scores.items():
                frame[col] = sc.per_task
            frames.append(frame)
    return pd.concat(frames, ignore_index=True)


def run(
    config: str | Path | Config | Plan,
    *,
    out_dir: str | Path | None = None,
    write: bool = True,
    use_cache: bool = True,
    jobs: int | None = None,
    quiet: bool = True,
    report: bool = True,
) -> RunResult:
    """Run an evaluation from a config file path (or a parsed config, or a plan).

    Writes the results folder unless ``write`` is False, and returns the leaderboard and the
    per-task scores as DataFrames. Bad config or data raise :class:`runner.ConfigError` /
    :class:`runner.DataError` before anything is written.
    """
    from .results import manifest as build_manifest
    from .results import write_results

    plan = config if isinstance(config, Plan) else build_plan(config)
    ev = evaluate(plan, use_cache=use_cache, jobs=jobs, quiet=quiet)
    board = build_leaderboard(ev)
    target = output_dir(plan.config, out_dir) if write else None
    if target is not None:
        man = write_results(ev, board, target, build_plots=report)
    else:
        man = build_manifest(ev)
    return RunResult(board, scores_frame(ev), target, man, ev)
