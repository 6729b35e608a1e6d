"""Expanding a validated config into the grid of (dataset, series, forecaster, fold) tasks."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from runner.config import Config, ForecasterSpec, load_config
from runner.config.model import FROM_FILE
from runner.data import Panel, attach_attributes, load_panel, season_for_frequency
from runner.errors import ConfigError, DataError
from runner.windows.axis import TimeAxis, time_axis
from runner.windows.folds import (
    Scheme,
    anchored_origins,
    bounds_at,
    fold_bounds,
    usable_origins,
)


@dataclass
class DatasetPlan:
    """The folds of one dataset: one row per (series, fold), indices into ``panel.values``.

    Tasks are ordered by series, then chronologically. ``origin`` is each task's origin as a
    position on the dataset's time axis (the position of its last training observation), and
    ``fold`` numbers the dataset's origins from the oldest (0), so fold k is the same origin,
    the same calendar period, for every series.
    """

    panel: Panel
    forecasters: list[int]  # indices into Plan.forecasters that apply to this dataset
    reference: str
    series: np.ndarray  # series index of each task
    fold: np.ndarray  # index of the task's origin in ``origins``
    origin: np.ndarray  # the task's origin: a position on the dataset's time axis
    origins: np.ndarray  # the dataset's origins (sorted positions) that some series uses
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

    def origin_labels(self) -> np.ndarray:
        """Each of the dataset's origins as the time of its last training observation (text).

        Formatted like every other time of the panel (:meth:`Panel.format_time`), so a fold is
        named the same way in every output.
        """
        _, first_task = np.unique(self.fold, return_index=True)
        return self.panel.format_time(self.ends[first_task] - 1)


@dataclass
class Plan:
    """Everything a run needs, built before any forecast is made."""

    config: Config
    config_path: Path
    forecasters: list[ForecasterSpec]
    datasets: list[DatasetPlan]
    #: forecasts read from files, per recorded candidate (:mod:`runner.forecasters.recorded`)
    recorded: dict[str, Any] = field(default_factory=dict)
    #: what castgrid chose where a default gave way to what the config says (rank metric,
    #: dropped grid combinations); shown as notes and kept in the manifest
    notes: list[str] = field(default_factory=list)
    #: choices the config made that may mislead (ranking by a metric flagged as unreliable)
    warnings: list[str] = field(default_factory=list)
    #: the files the run read, hashed before reading (runner.output.uptodate.Inputs; set by
    #: runner.pipeline.prepare), for the results folder's rerun.json (runner.output.uptodate)
    inputs: Any = None

    def all_notes(self) -> list[str]:
        """The run's notes, then each dataset's (prefixed with the dataset's name)."""
        return self.notes + [f"{d.panel.name}: {n}" for d in self.datasets for n in d.notes]

    @property
    def n_tasks(self) -> int:
        """Total (dataset, series, forecaster, fold) tasks."""
        return sum(d.n_tasks * len(d.forecasters) for d in self.datasets)


def _scheme(cfg: Config, span: int) -> Scheme:
    w = cfg.windows
    return Scheme(
        kind=w.scheme,
        train=w.train_length(span),
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


#: Origins from outside the config (``windows.origins: from_file``): given a panel and its time
#: axis, the sorted positions on that axis where forecasts were made, or None when nothing
#: gives origins for that dataset.
OriginSource = Callable[[Panel, TimeAxis], "np.ndarray | None"]


def plan_dataset(
    cfg: Config, panel: Panel, specs: list[ForecasterSpec], source: str,
    file_origins: OriginSource | None = None,
) -> DatasetPlan:
    """The folds of every series of ``panel`` that has data for at least one origin."""
    season = panel.season
    applicable = [
        i
        for i, s in enumerate(specs)
        if not (s.default and s.seasonal_only and season <= 1)
    ]
    reference, note = _reference(cfg, [specs[i] for i in applicable], season)
    axis = time_axis(panel)
    scheme = _scheme(cfg, axis.span)
    first = axis.positions[panel.offsets[:-1]]
    last = axis.positions[panel.offsets[1:] - 1]
    if scheme.align == "end":
        series, origin = _origins_from_series_ends(panel, first, scheme)
    else:
        series, origin = _shared_origins(cfg, panel, axis, first, last, scheme, source,
                                         file_origins)
    if not len(series):
        first_skip = (_too_short(panel, axis, first, last, scheme, [0])[0]
                      if panel.n_series else "it has no series")
        raise DataError(
            f"{panel.path}: dataset {panel.name!r}: no series has data for any origin; "
            f"{first_skip}"
        )
    unused = np.setdiff1d(np.arange(panel.n_series), series)
    skipped = _too_short(panel, axis, first, last, scheme, unused)
    origins = np.unique(origin)
    bounds = bounds_at(origin, first[series], scheme) + panel.offsets[series][:, None]
    return DatasetPlan(
        panel=panel,
        forecasters=applicable,
        reference=reference,
        series=series,
        fold=np.searchsorted(origins, origin).astype(np.int64),
        origin=origin,
        origins=origins,
        starts=bounds[:, 0],
        ends=bounds[:, 1],
        test_starts=bounds[:, 2],
        skipped=skipped,
        notes=[note] if note else [],
    )


def _origins_from_series_ends(
    panel: Panel, first: np.ndarray, scheme: Scheme
) -> tuple[np.ndarray, np.ndarray]:
    """``align: end``: each series' own origins, counted back from its last observation."""
    series_idx: list[np.ndarray] = []
    origin: list[np.ndarray] = []
    for i, n in enumerate(np.diff(panel.offsets)):
        bounds = fold_bounds(int(n), scheme)
        series_idx.append(np.full(len(bounds), i, dtype=np.int64))
        origin.append(first[i] + bounds[:, 1] - 1)
    if not series_idx:
        return np.empty(0, np.int64), np.empty(0, np.int64)
    return np.concatenate(series_idx), np.concatenate(origin).astype(np.int64)


def _shared_origins(
    cfg: Config, panel: Panel, axis: TimeAxis, first: np.ndarray, last: np.ndarray,
    scheme: Scheme, source: str, file_origins: OriginSource | None = None,
) -> tuple[np.ndarray, np.ndarray]:
    """Origins on the dataset's time axis, and for each series the ones it has data for."""
    w = cfg.windows
    where = f"{source}: windows"
    if w.origins == FROM_FILE:
        return _file_origins(panel, axis, first, last, scheme, where, file_origins)
    if w.origins is not None:
        origins = np.array(sorted(_position(axis, t, panel, f"{where}.origins") for t in w.origins),
                           dtype=np.int64)
    elif w.first_origin is not None:
        start = _position(axis, w.first_origin, panel, f"{where}.first_origin")
        origins = anchored_origins(axis.span, scheme, first=start)
        if not len(origins):
            raise ConfigError(
                f"{where}.first_origin: {w.first_origin} leaves no full test block in dataset "
                f"{panel.name!r} (gap {scheme.gap} + horizon {scheme.horizon} after it; its "
                f"last time is {axis.time_text(axis.span - 1)})"
            )
    else:
        origins = anchored_origins(axis.span, scheme)
    used = _used(origins, first, last, scheme)
    if w.origins is not None or w.first_origin is not None:
        if not used[0] or (w.origins is not None and not used.all()):
            bad = int(np.argmin(used))
            field_name = "origins" if w.origins is not None else "first_origin"
            raise ConfigError(
                f"{where}.{field_name}: no series of dataset {panel.name!r} has data for origin "
                f"{axis.time_text(int(origins[bad]))} (it needs train {scheme.train} "
                f"observations up to the origin and gap {scheme.gap} + horizon "
                f"{scheme.horizon} after it; the dataset's times run from "
                f"{axis.time_text(0)} to {axis.time_text(axis.span - 1)})"
            )
    origins = origins[used]
    if scheme.folds is not None:
        origins = origins[-scheme.folds :]
    return _series_at(origins, first, last, scheme, panel.n_series)


def _used(origins: np.ndarray, first: np.ndarray, last: np.ndarray, scheme: Scheme) -> np.ndarray:
    """Which of the sorted ``origins`` some series has data for."""
    lo, hi = usable_origins(origins, first, last, scheme)
    # a difference array over origin indices
    cover = np.zeros(len(origins) + 1, dtype=np.int64)
    np.add.at(cover, lo, 1)
    np.add.at(cover, hi, -1)
    return np.cumsum(cover[:-1]) > 0


def _file_origins(
    panel: Panel, axis: TimeAxis, first: np.ndarray, last: np.ndarray, scheme: Scheme,
    where: str, file_origins: OriginSource | None,
) -> tuple[np.ndarray, np.ndarray]:
    """``origins: from_file``: the origins a file's forecasts were made at that the window
    scheme can use; the others are left out (the file's reader counts their rows)."""
    given = None if file_origins is None else file_origins(panel, axis)
    if given is None:
        raise ConfigError(
            f"{where}.origins: from_file takes the origins from the forecasts file of a "
            f"candidate of kind recorded, and dataset {panel.name!r} has none (add one, or "
            "list the origins)"
        )
    origins = np.unique(np.asarray(given, dtype=np.int64))
    used = _used(origins, first, last, scheme)
    if not used.any():
        found = (f"its origins on the dataset's time axis run from "
                 f"{axis.time_text(int(origins[0]))} to {axis.time_text(int(origins[-1]))}"
                 if len(origins) else "none of its origins is a time of the dataset")
        raise ConfigError(
            f"{where}.origins: from_file: no origin of the forecasts file(s) fits the window "
            f"scheme in dataset {panel.name!r}: none has train {scheme.train} observations up "
            f"to it and gap {scheme.gap} + horizon {scheme.horizon} after it in any series "
            f"({found}; the dataset's times run from {axis.time_text(0)} to "
            f"{axis.time_text(axis.span - 1)})"
        )
    origins = origins[used]
    if scheme.folds is not None:
        origins = origins[-scheme.folds :]
    return _series_at(origins, first, last, scheme, panel.n_series)


def _series_at(
    origins: np.ndarray, first: np.ndarray, last: np.ndarray, scheme: Scheme, n_series: int
) -> tuple[np.ndarray, np.ndarray]:
    """Every (series, origin) pair where the series has data for the origin, series-major."""
    lo, hi = usable_origins(origins, first, last, scheme)
    counts = hi - lo
    series = np.repeat(np.arange(n_series, dtype=np.int64), counts)
    within = np.arange(int(counts.sum()), dtype=np.int64) - np.repeat(np.cumsum(counts) - counts,
                                                                      counts)
    return series, origins[np.repeat(lo, counts) + within]


def _position(axis: TimeAxis, value: int | str, panel: Panel, where: str) -> int:
    try:
        pos = axis.position_of(value)
    except ValueError as exc:
        raise ConfigError(f"{where}: {value}: {exc} (dataset {panel.name!r})") from None
    if pos is None:
        freq = f"frequency {panel.frequency}" if panel.frequency else f"step {panel.step}"
        raise ConfigError(
            f"{where}: {value} is not a time of dataset {panel.name!r} ({freq}, times from "
            f"{axis.time_text(0)} to {axis.time_text(axis.span - 1)})"
        )
    return pos


def _too_short(
    panel: Panel, axis: TimeAxis, first: np.ndarray, last: np.ndarray, scheme: Scheme,
    which: np.ndarray | list[int],
) -> list[str]:
    """Why each series in ``which`` got no fold, one line each."""
    out = []
    for i in which:
        n = int(panel.offsets[i + 1] - panel.offsets[i])
        times = f"{axis.time_text(int(first[i]))} to {axis.time_text(int(last[i]))}"
        if n < scheme.min_length:
            out.append(
                f"series {panel.keys[i]!r} has {n} observations, needs at least "
                f"{scheme.min_length} (train {scheme.train} + gap {scheme.gap} + "
                f"horizon {scheme.horizon}; its times run from {times})"
            )
        else:
            out.append(
                f"series {panel.keys[i]!r} ({n} observations, {times}) has no origin of the "
                f"dataset with train {scheme.train} observations up to it and gap "
                f"{scheme.gap} + horizon {scheme.horizon} after it"
            )
    return out


def build_plan(
    config: Config | str | Path, specs: list[ForecasterSpec], config_path: Path | None = None,
    file_origins: OriginSource | None = None,
) -> Plan:
    """Load every dataset of ``config`` and lay out the folds of ``specs``; raises on bad input.

    :func:`runner.pipeline.prepare` checks the forecasters and expands ``specs`` first, and
    passes ``file_origins`` (the origins of the recorded candidates' files) when the config
    says ``windows.origins: from_file``.
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
        attach_attributes(panel, ds, base)
        _check_season(cfg, i, panel, str(config_path))
        plans.append(plan_dataset(cfg, panel, specs, str(config_path), file_origins))
        unsegmented = [s for s in cfg.segments if s not in cfg.dataset_segments(ds)]
        if unsegmented:
            plans[-1].notes.append(f"not segmented by {', '.join(unsegmented)} (not among "
                                   "its attributes)")
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
