"""Expanding a validated config into the grid of (dataset, series, forecaster, fold) tasks."""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from runner.config import Config, ForecasterSpec, load_config
from runner.data import Panel, load_panel, season_for_frequency
from runner.errors import ConfigError, DataError
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
    #: what castgrid chose for this dataset where a default gave way (the reference)
    notes: list[str] = field(default_factory=list)

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
    #: what castgrid chose where a default gave way to what the config says (rank metric,
    #: dropped grid combinations); shown as notes and kept in the manifest
    notes: list[str] = field(default_factory=list)
    #: choices the config made that may mislead (ranking by a metric flagged as unreliable)
    warnings: list[str] = field(default_factory=list)

    def all_notes(self) -> list[str]:
        """The run's notes, then each dataset's (prefixed with the dataset's name)."""
        return self.notes + [f"{d.panel.name}: {n}" for d in self.datasets for n in d.notes]

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


def _reference(cfg: Config, specs: list[ForecasterSpec], season: int) -> tuple[str, str | None]:
    """The reference baseline of a dataset, and a note when the default gave way.

    A ``reference`` the config sets is used as is (checked by
    :func:`runner.forecasters.specs.check_specs`). Otherwise the default, seasonal naive when
    the season is above 1 and naive otherwise, is used when it is among the baselines; else the
    first listed baseline that suits the season (a seasonal one only when the season is above
    1), else the first listed baseline. ``specs`` hold at least one baseline (check_specs
    rejects an empty list).
    """
    if cfg.reference is not None:
        return cfg.reference, None
    wanted = "seasonal_naive" if season > 1 else "naive"
    baselines = [s for s in specs if s.role == "baseline"]
    if any(s.name == wanted for s in baselines):
        return wanted, None
    suited = [s for s in baselines if season > 1 or not s.seasonal_only] or baselines
    chosen = suited[0].name
    return chosen, (f"reference: {chosen} (the default {wanted} is not among the baselines; "
                    "the first listed baseline)")


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
    reference, note = _reference(cfg, [specs[i] for i in applicable], season)
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
        notes=[note] if note else [],
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
        panel = load_panel(ds, base, cfg.season)
        _check_season(cfg, i, panel, str(config_path))
        plans.append(plan_dataset(cfg, panel, specs, str(config_path)))
    return Plan(cfg, config_path, specs, plans)


def _check_season(cfg: Config, i: int, panel: Panel, source: str) -> None:
    """A top-level ``season`` must agree with the season a dataset's frequency gives.

    The top-level season is the default of datasets that set none; a quarterly dataset under a
    top-level ``season: 12`` would otherwise be evaluated with a 12-quarter season without a
    word. The dataset's own ``season`` settles it either way.
    """
    ds = cfg.datasets[i]
    if ds.season is not None or cfg.season is None or panel.frequency is None:
        return
    derived = season_for_frequency(panel.frequency)
    if derived is not None and derived != cfg.season:
        raise ConfigError(
            f"{source}: datasets[{i}].season: the top-level season {cfg.season} disagrees with "
            f"the frequency {panel.frequency} of dataset {ds.name!r}, whose season is {derived}; "
            f"set season on the dataset ({derived} for the frequency's cycle, or {cfg.season} "
            "to keep the top-level one)"
        )
