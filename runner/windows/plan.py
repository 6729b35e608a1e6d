"""Expanding a validated config into the grid of (dataset, series, forecaster, fold) tasks."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from runner.config import Config, ForecasterSpec, load_config
from runner.data import Panel, load_panel
from runner.errors import DataError
from runner.windows.folds import Scheme, fold_bounds


@dataclass
class DatasetPlan:
    """The folds of one dataset: one row per (series, fold), indices into ``panel.values``."""

    panel: Panel
    forecasters: list[int]  # indices into Plan.forecasters that apply to this dataset
    reference: str
    series: np.ndarray  # series index of each task
    fold: np.ndarray  # 0-based chronological fold number within its series
    fold_group: np.ndarray  # fold counted so that folds at the same position align across series
    starts: np.ndarray
    ends: np.ndarray
    test_starts: np.ndarray
    skipped: list[str] = field(default_factory=list)

    @property
    def n_tasks(self) -> int:
        """(series, fold) pairs of this dataset."""
        return len(self.starts)


@dataclass
class Plan:
    """Everything a run needs, built before any forecast is made."""

    config: Config
    config_path: Path
    forecasters: list[ForecasterSpec]
    datasets: list[DatasetPlan]

    @property
    def n_tasks(self) -> int:
        """Total (dataset, series, forecaster, fold) tasks."""
        return sum(d.n_tasks * len(d.forecasters) for d in self.datasets)


def _scheme(cfg: Config, n: int) -> Scheme:
    w = cfg.windows
    return Scheme(
        kind=w.scheme,
        train=w.train_length(n),
        horizon=cfg.horizon,
        step=w.step or cfg.horizon,
        gap=w.gap,
        folds=w.folds,
        align=w.align,
    )


def _reference(cfg: Config, specs: list[ForecasterSpec], season: int, source: str) -> str:
    if cfg.reference is not None:
        return cfg.reference
    wanted = "seasonal_naive" if season > 1 else "naive"
    if not any(s.name == wanted and s.role == "baseline" for s in specs):
        raise DataError(
            f"{source}: reference: the default reference {wanted!r} is not among the baselines; "
            "add it or set reference"
        )
    return wanted


def plan_dataset(
    cfg: Config, panel: Panel, specs: list[ForecasterSpec], source: str
) -> DatasetPlan:
    """The folds of every series of ``panel`` long enough for the window scheme."""
    season = panel.season
    applicable = [
        i
        for i, s in enumerate(specs)
        if not (s.default and s.seasonal_only and season <= 1)
    ]
    reference = _reference(cfg, [specs[i] for i in applicable], season, source)
    parts: list[np.ndarray] = []
    series_idx: list[np.ndarray] = []
    skipped: list[str] = []
    lengths = np.diff(panel.offsets)
    for i, n in enumerate(lengths):
        scheme = _scheme(cfg, int(n))
        bounds = fold_bounds(int(n), scheme)
        if len(bounds) == 0:
            skipped.append(
                f"series {panel.keys[i]!r} has {n} observations, needs at least "
                f"{scheme.min_length} (train {scheme.train} + gap {scheme.gap} + "
                f"horizon {scheme.horizon})"
            )
            continue
        parts.append(bounds + panel.offsets[i])
        series_idx.append(np.full(len(bounds), i, dtype=np.int64))
    if not parts:
        first = skipped[0] if skipped else "it has no series"
        raise DataError(
            f"{panel.path}: dataset {panel.name!r}: no series is long enough for the windows; "
            f"{first}"
        )
    bounds = np.concatenate(parts)
    series = np.concatenate(series_idx)
    # fold numbers: chronological within a series, and aligned across series at the end the
    # scheme anchors (the latest folds line up with align=end, the earliest with align=start)
    change = np.r_[True, series[1:] != series[:-1]]
    first_of_series = np.maximum.accumulate(np.where(change, np.arange(len(series)), 0))
    fold = np.arange(len(series)) - first_of_series
    counts = np.bincount(series, minlength=len(lengths))[series]
    fold_group = fold - counts if cfg.windows.align == "end" else fold
    return DatasetPlan(
        panel=panel,
        forecasters=applicable,
        reference=reference,
        series=series,
        fold=fold,
        fold_group=fold_group,
        starts=bounds[:, 0],
        ends=bounds[:, 1],
        test_starts=bounds[:, 2],
        skipped=skipped,
    )


def build_plan(
    config: Config | str | Path, specs: list[ForecasterSpec], config_path: Path | None = None
) -> Plan:
    """Load every dataset of ``config`` and lay out the folds of ``specs``; raises on bad input.

    :func:`runner.pipeline.prepare` checks the forecasters and expands ``specs`` first.
    """
    if isinstance(config, (str, Path)):
        config_path = Path(config)
        cfg = load_config(config_path)
    else:
        cfg = config
        config_path = config_path or Path("config.yaml")
    base = config_path.parent
    plans = []
    for i, ds in enumerate(cfg.datasets):
        panel = load_panel(ds, base, cfg.season, entry=f"{config_path}: datasets[{i}]")
        plans.append(plan_dataset(cfg, panel, specs, str(config_path)))
    return Plan(cfg, config_path, specs, plans)
