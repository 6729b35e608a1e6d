"""``kind: recorded``: forecasts made elsewhere, read from a file and scored like castgrid's own.

A planning system, a pipeline in another language or a spreadsheet process has exported the
forecasts it made; castgrid cannot refit that system, so it reads the forecasts and scores them
on the same (series, origin, step) tasks, with the same metrics, significance tests and
leaderboard, as every forecaster it runs itself.

The file (CSV, gzip CSV or Parquet) has one row per series, origin and forecast step: the
dataset's series key column(s), the origin (the time of the last observation the forecast was
made with), the time forecast (or the number of steps after the origin), the point forecast and,
optionally, the low and high bound of central intervals. :class:`Recorded` declares the
parameters that name those columns.

What happens to a recorded candidate, in order (:class:`RecordedSources` drives it from
:func:`runner.pipeline.prepare`):

1. its parameters are checked (:class:`Recorded`) and resolved to the file's columns for its
   dataset (:func:`resolve_columns`);
2. the file is read once and every row checked (:mod:`runner.forecasters.recorded_file`);
3. the plan gets its origins from the files when the config says ``windows.origins:
   from_file`` (:meth:`RecordedSources.origins`);
4. the rows are matched to the plan's tasks (:mod:`runner.forecasters.recorded_match`): a task
   with any step missing from the file fails with reason ``not-recorded``.

:func:`recorded_forecasts` hands the matched forecasts to the scoring layer. No model task is
ever built for a recorded candidate, and nothing of it is cached: the file is read at every run,
and its fingerprint (SHA-256 of its bytes) goes into the manifest, so ``castgrid diff`` tells a
changed forecasts file from changed data.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from runner.config import Config, DatasetConfig, ForecasterSpec
from runner.data import Panel
from runner.errors import ConfigError
from runner.forecasters.recorded_file import Columns, RecordedFile, read_recorded
from runner.forecasters.recorded_match import RecordedForecasts, match_plan
from runner.forecasters.registry import is_from_file
from runner.paths import config_relative
from runner.windows.axis import TimeAxis, time_axis
from runner.windows.plan import Plan

_SUFFIXES = (".csv", ".csv.gz", ".parquet")


# ------------------------------------------------------------------------------ the kind


def _name(value: Any, param: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"{param}: expected a column name, got {value!r}")
    return value


class Recorded:
    """Forecasts made elsewhere, read from a file; nothing is fitted.

    Parameters
    ----------
    path:
        The forecasts file: ``.csv``, ``.csv.gz`` or ``.parquet``, relative to the config file
        like a dataset's path.
    dataset:
        The dataset the forecasts are for; needed only when the config has several.
    series_columns:
        The column(s) holding the series key, as in the dataset; default the dataset's
        ``series`` columns (a wide dataset has none: name the file's column holding the series
        name).
    origin_column:
        The time of the last observation each forecast was made with (default ``origin``).
    time_column, step_column:
        Either the time each forecast is for (default: a column named like the dataset's time
        column) or the number of steps after the origin (1 = the first time after it).
    value_column:
        The point forecast (default ``forecast``).
    bounds:
        Central interval bounds per level: ``{80: [low_column, high_column]}``. Each level must
        be one of the config's ``intervals``; a config level the file has no bounds for is
        scored as for a forecaster without intervals (empty interval metrics).
    """

    version = "1"
    uses_covariates = False

    def __init__(
        self,
        path: str,
        dataset: str | None = None,
        series_columns: str | list[str] | None = None,
        origin_column: str = "origin",
        time_column: str | None = None,
        step_column: str | None = None,
        value_column: str = "forecast",
        bounds: dict[Any, list[str]] | None = None,
    ) -> None:
        self.path = path
        self.dataset = dataset
        self.series_columns = series_columns
        self.origin_column = origin_column
        self.time_column = time_column
        self.step_column = step_column
        self.value_column = value_column
        self.bounds = bounds
        self.check()

    def check(self) -> dict[float, tuple[str, str]]:
        """Check every parameter; returns the bound columns per level (ValueError naming the
        parameter otherwise)."""
        if not isinstance(self.path, str) or not self.path.lower().endswith(_SUFFIXES):
            raise ValueError(f"path: expected a .csv, .csv.gz or .parquet file, got {self.path!r}")
        if self.dataset is not None and not isinstance(self.dataset, str):
            raise ValueError(f"dataset: expected a dataset name, got {self.dataset!r}")
        keys = self.series_columns
        if keys is not None:
            if isinstance(keys, str):
                keys = [keys]
            if not isinstance(keys, list) or not keys:
                raise ValueError(
                    f"series_columns: expected a column name or a non-empty list of them, got "
                    f"{self.series_columns!r}"
                )
            for k in keys:
                _name(k, "series_columns")
        _name(self.origin_column, "origin_column")
        _name(self.value_column, "value_column")
        if self.time_column is not None:
            _name(self.time_column, "time_column")
        if self.step_column is not None:
            _name(self.step_column, "step_column")
            if self.time_column is not None:
                raise ValueError("step_column: give time_column or step_column, not both")
        out: dict[float, tuple[str, str]] = {}
        if self.bounds is None:
            return out
        if not isinstance(self.bounds, dict) or not self.bounds:
            raise ValueError(
                f"bounds: expected a mapping of level to [low_column, high_column], got "
                f"{self.bounds!r}"
            )
        for key, cols in self.bounds.items():
            try:
                level = float(key)
            except (TypeError, ValueError):
                level = math.nan
            if isinstance(key, bool) or not 0 < level < 100:
                raise ValueError(f"bounds: expected interval levels between 0 and 100, got {key!r}")
            if (not isinstance(cols, list) or len(cols) != 2
                    or not all(isinstance(c, str) and c.strip() for c in cols)
                    or cols[0] == cols[1]):
                raise ValueError(
                    f"bounds: level {key}: expected [low_column, high_column] (two different "
                    f"column names), got {cols!r}"
                )
            if level in out:
                raise ValueError(f"bounds: level {level:g} is given twice")
            out[level] = (cols[0], cols[1])
        return out


def resolve_columns(params: Recorded, ds: DatasetConfig) -> Columns:
    """The columns ``params`` names for dataset ``ds``; ValueError naming the parameter when
    they cannot be resolved or one column serves twice."""
    bounds = params.check()
    keys = params.series_columns
    if keys is None:
        if ds.layout == "wide":
            raise ValueError(
                f"series_columns: dataset {ds.name!r} is wide (its series are columns); name "
                "the file's column that holds the series name"
            )
        keys = ds.series_columns
    keys = [keys] if isinstance(keys, str) else list(keys)
    time = params.time_column
    if time is None and params.step_column is None:
        time = ds.time
    cols = Columns(tuple(keys), params.origin_column, time, params.step_column,
                   params.value_column, bounds)
    seen: dict[str, str] = {}
    for col, role in cols.all():
        if col in seen:
            raise ValueError(f"{role.split('.')[0]}: column {col!r} is also {seen[col]}")
        seen[col] = role
    return cols


# ------------------------------------------------------------------------------ the run


@dataclass
class _Candidate:
    index: int  # into the plan's forecasters
    spec: ForecasterSpec
    params: Recorded
    location: str  # models[i]
    dataset: str
    file: RecordedFile | None = None
    columns: Columns | None = field(default=None, repr=False)


def _location(cfg: Config, spec: ForecasterSpec) -> str:
    for i, m in enumerate(cfg.models):
        if spec.name == m.name or spec.name.startswith(f"{m.name}["):
            return f"models[{i}]"
    return f"forecaster {spec.name}"


class RecordedSources:
    """The recorded candidates of a run: reads each file once, gives the plan its origins
    (``windows.origins: from_file``) and matches the files to the plan.

    Built by :func:`runner.pipeline.prepare` after the forecasters are checked; raises
    :class:`ConfigError` when the config does not say where the origins are (a recorded
    candidate's forecasts were made at fixed origins: the config lists them, sets
    ``first_origin``, or takes them ``from_file``) or does not say which dataset a file is for.
    """

    def __init__(self, cfg: Config, specs: list[ForecasterSpec], config_path: Path) -> None:
        self.cfg = cfg
        self.source = str(config_path)
        self.base = Path(config_path).parent
        self.levels = tuple(cfg.intervals)
        names = [d.name for d in cfg.datasets]
        self.candidates: list[_Candidate] = []
        for f, spec in enumerate(specs):
            if not is_from_file(spec):
                continue
            loc = _location(cfg, spec)
            where = f"{self.source}: {loc}.params"
            try:
                params = Recorded(**spec.params)
            except (TypeError, ValueError) as exc:
                raise ConfigError(f"{where}: {exc}") from None
            if params.dataset is None and len(names) > 1:
                raise ConfigError(
                    f"{where}.dataset: the config has {len(names)} datasets; name the one the "
                    f"forecasts of {spec.name} are for ({', '.join(names)})"
                )
            if params.dataset is not None and params.dataset not in names:
                raise ConfigError(
                    f"{where}.dataset: {params.dataset!r} is not a dataset of the config "
                    f"({', '.join(names)})"
                )
            for level in params.check():
                if level not in self.levels:
                    asked = (", ".join(f"{v:g}" for v in self.levels) if self.levels
                             else "none")
                    raise ConfigError(
                        f"{where}.bounds: level {level:g} is not one of the config's intervals "
                        f"({asked}); add it to intervals or leave its bounds out"
                    )
            self.candidates.append(
                _Candidate(f, spec, params, loc, params.dataset or names[0])
            )
        w = cfg.windows
        if self.candidates and w.origins is None and w.first_origin is None:
            first = self.candidates[0].spec.name
            raise ConfigError(
                f"{self.source}: windows.origins: the forecasts of {first} (kind recorded) were "
                "made at the origins of its file; set origins: from_file, list the origins, or "
                "set first_origin"
            )

    def _files(self, panel: Panel, axis: TimeAxis) -> list[_Candidate]:
        """The candidates of dataset ``panel``, each file read and checked once."""
        out = []
        ds = next(d for d in self.cfg.datasets if d.name == panel.name)
        for c in self.candidates:
            if c.dataset != panel.name:
                continue
            if c.file is None:
                try:
                    c.columns = resolve_columns(c.params, ds)
                except ValueError as exc:
                    raise ConfigError(f"{self.source}: {c.location}.params.{exc}") from None
                path = config_relative(c.params.path, self.base)
                c.file = read_recorded(path, c.params.path, c.columns, panel, axis, self.levels)
            out.append(c)
        return out

    def origins(self, panel: Panel, axis: TimeAxis) -> np.ndarray | None:
        """The origins (positions on the axis) of the files for dataset ``panel``, or None when
        it has no recorded candidate. Origins before the axis or past its end are left out."""
        found = self._files(panel, axis)
        if not found:
            return None
        both = np.concatenate([c.file.origin for c in found if c.file is not None])
        return np.unique(both[(both >= 0) & (both < axis.span)])

    def attach(self, plan: Plan) -> None:
        """Match every file to the plan: forecasts per task in ``plan.recorded``, a note per
        file with rows outside the plan; a candidate applies to its own dataset only."""
        horizon = plan.config.horizon
        for d, dp in enumerate(plan.datasets):
            mine = {c.index for c in self.candidates if c.dataset == dp.panel.name}
            theirs = {c.index for c in self.candidates} - mine
            dp.forecasters = [f for f in dp.forecasters if f not in theirs]
            if not mine:
                continue
            axis = time_axis(dp.panel)
            for c in self._files(dp.panel, axis):
                assert c.file is not None
                point, lower, upper, reason, message, outside = match_plan(
                    c.file, dp, horizon, self.levels, axis.span
                )
                rec = RecordedForecasts(
                    c.spec.name, d, c.index, c.params.path, c.file.fingerprint, c.file.rows,
                    outside, point, lower, upper, reason, message,
                )
                plan.recorded[c.spec.name] = rec
                note = rec.note()
                if note is not None and note not in dp.panel.notes:
                    dp.panel.notes.append(note)


def recorded_forecasts(plan: Plan) -> list[RecordedForecasts]:
    """The forecasts of every recorded candidate of ``plan`` (read now if the plan was built
    without :func:`runner.pipeline.prepare`)."""
    wanted = [s.name for s in plan.forecasters if is_from_file(s)]
    if any(name not in plan.recorded for name in wanted):
        RecordedSources(plan.config, plan.forecasters, plan.config_path).attach(plan)
    return [plan.recorded[name] for name in wanted]


def manifest_entries(plan: Plan) -> dict[str, dict[str, Any]]:
    """``recorded`` of the manifest: per recorded candidate, its file's path (as the config
    writes it), dataset, fingerprint, rows and rows outside the plan."""
    return {
        name: rec.manifest_entry(plan.datasets[rec.dataset].panel.name)
        for name, rec in sorted(plan.recorded.items())
    }
