"""Pydantic models of every config key, and the expansion of grids into forecaster specs.

Unknown keys are errors everywhere (``extra="forbid"``): a typo must never fall back to a
default silently, since that would skew every score without anyone noticing.
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path
from typing import Any, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    field_validator,
    model_validator,
)

from runner.errors import brief

#: Names an earlier castgrid release accepted, and the names that replaced them. A config that
#: still uses one gets a one-line error naming the new name, never a silent fallback.
RENAMED_KINDS = {"window_average": "moving_average", "auto_arima": "arima_search"}
RENAMED_PARAMS = {
    "arima_search": {
        "max_p": "p_up_to", "max_q": "q_up_to", "max_P": "P_up_to", "max_Q": "Q_up_to",
        "max_d": "d_up_to", "max_D": "D_up_to", "max_order": "terms_up_to",
        "max_models": "fits_up_to",
    },
}
#: Kinds whose forecaster is the user's own class, named by ``entry: module:attribute``:
#: ``plugin`` (one series per fit) and ``panel_plugin`` (every series of a dataset per fit).
ENTRY_KINDS = ("plugin", "panel_plugin")
#: ``windows.origins: from_file``: the origins are those of the recorded candidates' files.
FROM_FILE = "from_file"
_SHARE = re.compile(r"^\s*(\d+(?:\.\d+)?)\s*%\s*$")
#: Segments castgrid derives from each series' values (see :mod:`runner.scoring.classify`);
#: reserved, so no series attribute may take these names.
DERIVED_SEGMENTS = ("demand_pattern", "volume_tier")
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")


def _simple_name(v: str) -> str:
    """Names end up in folder names and table cells: keep them to a safe alphabet."""
    if not _NAME.match(v):
        raise ValueError(f"expected letters, digits, '.', '_' or '-', got {brief(v)}")
    return v


class _Strict(BaseModel):
    # strict: YAML already gives every value its type, so a value of another type is a mistake
    # to report, not to convert (`horizon: yes` is true, not 1; `horizon: "12"` is text).
    # Floats still accept integers (`fit_timeout: 60`).
    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


class DatasetConfig(_Strict):
    """One dataset file and how to read series out of it."""

    name: str
    path: str
    layout: Literal["long", "wide"] = "long"
    series: str | list[str] | None = None
    time: str
    target: str | None = None
    frequency: str | None = None
    season: int | None = Field(default=None, ge=1)
    covariates: list[str] = Field(default_factory=list)
    missing: Literal["error", "interpolate", "zero"] = "error"
    #: series attributes (one value per series), read by :mod:`runner.data.attributes`
    attributes: list[str] = Field(default_factory=list)
    #: a side file with the series key column(s) and attribute columns
    attribute_file: str | None = None

    @field_validator("name")
    @classmethod
    def _name_is_simple(cls, v: str) -> str:
        return _simple_name(v)

    @field_validator("attributes")
    @classmethod
    def _attributes_named_once(cls, v: list[str]) -> list[str]:
        for name in v:
            if name in DERIVED_SEGMENTS:
                raise ValueError(
                    f"{brief(name)} is the name of a segment castgrid derives itself; rename "
                    "that column in the file"
                )
            if not name.strip():
                raise ValueError("expected column names, got an empty name")
        dup = sorted({n for n in v if v.count(n) > 1})
        if dup:
            raise ValueError(f"{brief(dup[0])} is listed twice")
        return v

    @field_validator("series")
    @classmethod
    def _series_not_empty(cls, v: str | list[str] | None) -> str | list[str] | None:
        if isinstance(v, list) and not v:
            raise ValueError("expected a column name or a non-empty list of column names")
        return v

    @model_validator(mode="after")
    def _layout_fields(self) -> DatasetConfig:
        if self.layout == "long":
            missing = [k for k in ("series", "target") if getattr(self, k) is None]
            if missing:
                raise ValueError(f"layout long needs {' and '.join(missing)}")
        else:
            given = [k for k in ("series", "target") if getattr(self, k) is not None]
            if given:
                raise ValueError(
                    f"layout wide takes every non-time column as a series; "
                    f"remove {' and '.join(given)}"
                )
            if self.covariates:
                raise ValueError("covariates need layout long")
            if self.attributes and self.attribute_file is None:
                raise ValueError(
                    "layout wide has no column for series attributes; give them in an "
                    "attribute_file (a column 'series' naming each series, then the attributes)"
                )
        if self.attribute_file is not None and not self.attributes:
            raise ValueError("attribute_file needs attributes: the columns to read from it")
        return self

    @property
    def series_columns(self) -> list[str]:
        """The column(s) naming a series, as a list (long layout)."""
        if self.series is None:
            return []
        return [self.series] if isinstance(self.series, str) else list(self.series)


class WindowsConfig(_Strict):
    """The rolling-origin scheme (see :mod:`runner.windows.folds` for the origin rule).

    An origin is the time of the last training observation. Origins are points on the
    dataset's time axis shared by all its series: counted from the dataset's first time by
    default, or given as ``origins`` (a list of times) or ``first_origin`` (then every
    ``step``). ``origins: from_file`` takes them from the forecasts files of the config's
    ``recorded`` candidates (:mod:`runner.forecasters.recorded`). ``align: end`` instead ties
    them to each series' last observation.
    """

    scheme: Literal["expanding", "sliding"] = "expanding"
    train: int | str
    step: int | None = Field(default=None, ge=1)
    folds: int | None = Field(default=None, ge=1)
    gap: int = Field(default=0, ge=0)
    align: Literal["start", "end"] = "start"
    origins: list[int | str] | Literal["from_file"] | None = None
    first_origin: int | str | None = None

    @field_validator("train", mode="before")
    @classmethod
    def _train_count_or_share(cls, v: Any) -> int | str:
        if isinstance(v, bool):
            raise ValueError(f'expected a count >= 1 or a share like "50%", got {brief(v)}')
        if isinstance(v, int) and v >= 1:
            return v
        if isinstance(v, str):
            m = _SHARE.match(v)
            if m and 0 < float(m.group(1)) < 100:
                return f"{float(m.group(1)):g}%"
        raise ValueError(f'expected a count >= 1 or a share like "50%", got {brief(v)}')

    @field_validator("first_origin", mode="before")
    @classmethod
    def _first_origin_is_a_time(cls, v: Any) -> Any:
        return None if v is None else _config_time(v)

    @field_validator("origins", mode="before")
    @classmethod
    def _origins_are_times(cls, v: Any) -> Any:
        if v is None or v == FROM_FILE:
            return v
        if not isinstance(v, list) or not v:
            raise ValueError(
                f"expected a non-empty list of times or {FROM_FILE}, got {_shown(v)}"
            )
        times = [_config_time(x) for x in v]
        seen: set[Any] = set()
        for t in times:
            if t in seen:
                raise ValueError(f"origin {t} is listed twice")
            seen.add(t)
        return times

    @model_validator(mode="after")
    def _one_way_to_place_origins(self) -> WindowsConfig:
        if self.origins is not None and self.first_origin is not None:
            raise ValueError("origins and first_origin exclude each other; keep one")
        given = "origins" if self.origins is not None else "first_origin"
        if self.align == "end" and (self.origins is not None or self.first_origin is not None):
            raise ValueError(
                f"{given} places origins on the dataset's time axis; it cannot be combined "
                "with align: end (remove align or the origins)"
            )
        return self

    def train_length(self, span: int) -> int:
        """Training length on a time axis of ``span`` steps (a share is rounded down)."""
        if isinstance(self.train, int):
            return self.train
        return max(1, int(span * float(self.train[:-1]) / 100.0 + 1e-9))


def _shown(v: Any) -> str:
    try:
        return json.dumps(v)
    except TypeError:
        return repr(v)


def _config_time(v: Any) -> int | str:
    """A time written in the config: a whole number, or a date / date-time kept as ISO text."""
    import datetime as dt

    if isinstance(v, bool):
        raise ValueError(f"expected a date or a whole number, got {json.dumps(v)}")
    if isinstance(v, int):
        return v
    if isinstance(v, dt.datetime):
        return v.isoformat()
    if isinstance(v, dt.date):
        return v.isoformat()
    if isinstance(v, str):
        import pandas as pd

        try:
            stamp = pd.Timestamp(v.strip())
        except (ValueError, TypeError):
            stamp = None
        if stamp is not None and not pd.isna(stamp):
            return v.strip()
    raise ValueError(f"expected a date or a whole number, got {_shown(v)}")


def check_jobs(v: int) -> int:
    """``jobs`` as the config, ``--jobs`` and the execution API all accept it: >= 1, or -1 for
    every core; raises ``ValueError`` otherwise."""
    if v == 0 or v < -1:
        raise ValueError(f"expected a worker count >= 1 or -1 for all cores, got {v}")
    return v


class ExecutionConfig(_Strict):
    """How tasks are run: workers, engine, cache and failure policy."""

    jobs: int = -1
    engine: Literal["local", "dask"] = "local"
    address: str | None = None
    cache: str | Literal[False] = "results/.cache"
    fit_timeout: float = Field(default=120.0, gt=0, allow_inf_nan=False)
    on_error: Literal["record", "stop"] = "record"
    #: Series forecast, scored and written at a time: the run's memory grows with this, not
    #: with the number of series. Results do not depend on it (byte for byte), so it is left
    #: out of the config's hash (:data:`RESULT_NEUTRAL`).
    chunk: int = Field(default=10_000, ge=1)

    @field_validator("jobs")
    @classmethod
    def _jobs_nonzero(cls, v: int) -> int:
        return check_jobs(v)

    @field_validator("cache", mode="before")
    @classmethod
    def _cache_path_or_false(cls, v: Any) -> Any:
        if not (v is False or isinstance(v, str)):
            raise ValueError(f"expected a folder path or false, got {brief(v)}")
        return v


    def cache_folder(self) -> Path | None:
        """The forecast cache folder (relative to the working directory), or None when off."""
        return None if self.cache is False else Path(self.cache)


class OutputConfig(_Strict):
    """Where results are written, and which forecasts forecasts.parquet keeps: ``all``
    forecasters, the ``compared`` ones (every candidate and the reference), or ``none`` (no
    forecasts.parquet; scores, leaderboard and report are unchanged but for the forecasts
    plot)."""

    dir: str | None = None
    forecasts: Literal["all", "compared", "none"] = "all"


class ModelConfig(_Strict):
    """A candidate forecaster; ``grid`` expands it into one candidate per combination."""

    name: str
    #: a kind of :data:`runner.forecasters.registry.KINDS`, or ``plugin`` / ``panel_plugin``
    kind: str
    params: dict[str, Any] = Field(default_factory=dict)
    grid: dict[str, list[Any]] = Field(default_factory=dict)
    entry: str | None = None

    @field_validator("name")
    @classmethod
    def _name_is_simple(cls, v: str) -> str:
        return _simple_name(v)

    @field_validator("kind", mode="before")
    @classmethod
    def _kind_not_renamed(cls, v: Any) -> Any:
        if isinstance(v, str) and v in RENAMED_KINDS:
            raise ValueError(f"kind {v!r} is now called {RENAMED_KINDS[v]!r}")
        return v

    @field_validator("grid")
    @classmethod
    def _grid_lists_not_empty(cls, v: dict[str, list[Any]]) -> dict[str, list[Any]]:
        for key, values in v.items():
            if not values:
                raise ValueError(f"grid key {brief(key)}: expected a non-empty list of values")
        return v

    @model_validator(mode="after")
    def _entry_for_plugins(self) -> ModelConfig:
        if self.kind in ENTRY_KINDS and not self.entry:
            raise ValueError(f'kind {self.kind} needs entry: "module:attribute"')
        if self.kind not in ENTRY_KINDS and self.entry:
            raise ValueError(f"entry is only for kind plugin or panel_plugin, not {self.kind}")
        if self.entry and not re.match(r"^[\w.]+:[\w.]+$", self.entry):
            raise ValueError(f'entry: expected "module:attribute", got {brief(self.entry)}')
        for key in list(self.params) + list(self.grid):
            new = RENAMED_PARAMS.get(self.kind, {}).get(key)
            if new is not None:
                where = "params" if key in self.params else "grid"
                raise ValueError(f"{where}.{key} of {self.kind} is now called {new!r}")
        overlap = sorted(set(self.params) & set(self.grid))
        if overlap:
            raise ValueError(f"{brief(overlap[0])} is in both params and grid; keep one")
        return self


class BaselineSpec(_Strict):
    """A benchmark forecaster as written in ``baselines:`` (a name, or a name with params)."""

    kind: str
    params: dict[str, Any] = Field(default_factory=dict)


class Config(_Strict):
    """A whole experiment."""

    experiment: str
    description: str | None = None
    horizon: int = Field(ge=1)
    season: int | None = Field(default=None, ge=1)
    datasets: list[DatasetConfig] = Field(min_length=1)
    windows: WindowsConfig
    baselines: list[BaselineSpec] | None = None
    models: list[ModelConfig] = Field(default_factory=list)
    #: None: the metric table's defaults (filled in by :func:`runner.pipeline.prepare`).
    metrics: list[str] | None = None
    #: None: mase if listed, else the first listed metric that can rank (resolved by
    #: :func:`runner.pipeline.prepare`, which says so in a note).
    rank_by: str | None = None
    reference: str | None = None
    intervals: list[float] = Field(default_factory=list)
    #: series attributes (or derived segments) the results are also given by
    segments: list[str] = Field(default_factory=list)
    execution: ExecutionConfig = Field(default_factory=ExecutionConfig)
    output: OutputConfig = Field(default_factory=OutputConfig)

    @field_validator("experiment")
    @classmethod
    def _experiment_is_simple(cls, v: str) -> str:
        return _simple_name(v)

    @field_validator("baselines", mode="before")
    @classmethod
    def _parse_baselines(cls, v: Any) -> Any:
        if v is None:
            return None
        if not isinstance(v, list):
            raise ValueError(f"expected a list of baseline names, got {brief(v)}")
        out = []
        for item in v:
            if isinstance(item, str):
                kind, params = item, {}
            elif isinstance(item, dict) and len(item) == 1:
                kind, params = next(iter(item.items()))
                # `- naive:` (no value) is read as null; any other non-mapping is a mistake
                params = {} if params is None else params
                if not isinstance(params, dict):
                    raise ValueError(
                        f"{brief(kind)}: expected a mapping of parameters, got {brief(params)}"
                    )
            else:
                raise ValueError(
                    f"expected a baseline name or {{name: {{params}}}}, got {brief(item)}"
                )
            if kind in RENAMED_KINDS:
                raise ValueError(f"baseline {kind!r} is now called {RENAMED_KINDS[kind]!r}")
            out.append({"kind": kind, "params": params})
        return out

    @model_validator(mode="before")
    @classmethod
    def _no_retired_keys(cls, data: Any) -> Any:
        if isinstance(data, dict) and "seed" in data:
            raise ValueError(
                "seed: castgrid makes no random choice (every built-in forecaster and every "
                "window is deterministic), so a seed would change nothing; remove the key, and "
                "give a plugin that draws random numbers its own seed in its params"
            )
        return data

    @field_validator("metrics")
    @classmethod
    def _metrics_listed_once(cls, v: list[str] | None) -> list[str] | None:
        if v is None:
            return v
        if len(set(v)) != len(v):
            raise ValueError("a metric is listed twice")
        if not v:
            raise ValueError("expected at least one metric")
        return v

    @field_validator("intervals")
    @classmethod
    def _levels_in_range(cls, v: list[float]) -> list[float]:
        for level in v:
            if 0 < level < 1:
                # 0.8 is an 80% interval written as a fraction; read literally it is a 0.8%
                # interval whose coverage is near 0, which no one means
                raise ValueError(
                    f"levels are percentages between 1 and 100; {level:g} looks like a "
                    f"fraction: write {level * 100:g}"
                )
            if not 1 <= level < 100:
                raise ValueError(f"expected interval levels between 1 and 100, got {level:g}")
        if len(set(v)) != len(v):
            raise ValueError("an interval level is listed twice")
        return sorted(float(x) for x in v)

    @model_validator(mode="after")
    def _cross_checks(self) -> Config:
        names = [d.name for d in self.datasets]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ValueError(f"datasets: name {brief(dup[0])} is used twice")
        for i, name in enumerate(self.segments):
            if name in self.segments[:i]:
                raise ValueError(f"segments: {brief(name)} is listed twice")
            if name not in DERIVED_SEGMENTS and not any(name in d.attributes
                                                        for d in self.datasets):
                raise ValueError(
                    f"segments: {brief(name)} is neither a derived segment "
                    f"({', '.join(DERIVED_SEGMENTS)}) nor in any dataset's attributes"
                )
        return self

    def dataset_segments(self, dataset: DatasetConfig) -> list[str]:
        """The ``segments`` that apply to ``dataset``: the derived ones and its attributes."""
        return [s for s in self.segments if s in DERIVED_SEGMENTS or s in dataset.attributes]

    def dataset_season(self, dataset: DatasetConfig) -> int | None:
        """Season length set by the config for ``dataset`` (None: derive from frequency)."""
        return dataset.season if dataset.season is not None else self.season


class ForecasterSpec(BaseModel):
    """One forecaster of the run after grid expansion: a unique name, a kind, its params."""

    model_config = ConfigDict(frozen=True)

    name: str
    kind: str
    role: Literal["baseline", "candidate"]
    params: dict[str, Any]
    entry: str | None = None
    #: True when the baseline list was not given and this one was added as a default.
    default: bool = False
    #: True for benchmarks that need a season above 1 (seasonal naive, season average).
    seasonal_only: bool = False


#: Settings left out of the canonical config: they change how a run uses memory, never a
#: number or a byte it writes, so two runs that differ only there record the same config.
RESULT_NEUTRAL = (("execution", "chunk"),)


def canonical_json(cfg: Config) -> str:
    """The config as canonical JSON (sorted keys, defaults filled in, the settings of
    :data:`RESULT_NEUTRAL` left out): the input of its hash."""
    data = cfg.model_dump(mode="json")
    for section, key in RESULT_NEUTRAL:
        data[section].pop(key, None)
    return json.dumps(data, sort_keys=True, separators=(",", ":"))


def config_hash(cfg: Config) -> str:
    """SHA-256 of :func:`canonical_json`."""
    return hashlib.sha256(canonical_json(cfg).encode()).hexdigest()
