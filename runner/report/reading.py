"""What the report reads from a results folder, and the one place that knows optional columns.

Only leaderboard.csv and manifest.json are required; every other file may be absent (a plot
then says which file is missing). Columns that newer castgrid versions add are read by one
small function each, which tolerates their absence in older results folders:

* :func:`fold_key`: how folds are named in scores.parquet and forecasts.parquet (``fold``, or
  the ``origin`` time when it names the folds one to one);
* :func:`complete_flags`: the leaderboard's ``complete`` column (no failed task);
* :func:`metric_flags`: which metric columns are flagged as unreliable for comparing forecasts.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.errors import DataError
from runner.output.reader import (
    FAILURES,
    FORECASTS,
    HISTORY,
    HORIZON,
    SCORES,
    ResultsFolder,
    iter_arrow,
    read_arrow,
    read_columns,
    read_leaderboard,
    read_manifest,
    read_segment_leaderboard,
    read_table,
)
from runner.output.segments import SERIES_SEGMENTS

if TYPE_CHECKING:  # the command line imports this module at start; pandas loads when used
    import pandas as pd

    from runner.report.style import Look


@dataclass
class Results:
    """The files of one results folder that the report draws from (None: file absent).

    ``forecasts`` and ``scores`` are None too when they were left unread
    (``read_results(..., forecasts=False, scores=False)``): ``has_forecasts`` and
    ``has_scores`` say whether the folder has the files, and :meth:`forecast_rows`,
    :meth:`fold_scores` and :meth:`series_scores` read what a plot needs (the files of a run of
    a million series are far larger than what the plots draw).
    """

    manifest: dict[str, Any]
    rank_by: str
    board: pd.DataFrame
    horizon: pd.DataFrame | None
    scores: pd.DataFrame | None
    forecasts: pd.DataFrame | None
    failures: pd.DataFrame | None
    history: list[dict[str, Any]] | None
    #: leaderboard_segments.csv and series_segments.csv (None: a run without ``segments:``)
    segments: pd.DataFrame | None = None
    series_segments: pd.DataFrame | None = None
    folder: ResultsFolder | None = None
    has_forecasts: bool = False
    has_scores: bool = False

    def fold_scores(self, dataset: str, metric: str) -> pd.DataFrame:
        """``metric`` of ``dataset`` averaged per forecaster and fold (over the fold's
        series, missing scores left out): columns dataset, forecaster, fold and, when it
        names the folds one to one, origin (see :func:`fold_key`), then ``metric``.

        Read from the file a row group at a time, summed per forecaster, fold and origin:
        the scores of a million series are not held at once."""
        import numpy as np
        import pandas as pd
        import pyarrow as pa

        if self.scores is not None:
            part = self.scores[self.scores["dataset"] == dataset]
            columns = [c for c in ("dataset", "forecaster", "fold", "origin", metric)
                       if c in part.columns]
            tables: Any = [pa.Table.from_pandas(part[columns], preserve_index=False)]
        else:
            assert self.folder is not None
            names = read_columns(self.folder, SCORES, ())
            columns = [c for c in ("dataset", "forecaster", "fold", "origin", metric)
                       if c in names]
            tables = iter_arrow(self.folder, SCORES, columns, [("dataset", "=", dataset)])
        keys = [c for c in ("forecaster", "fold", "origin") if c in columns]
        if metric not in columns or not keys:
            return pd.DataFrame(columns=columns)
        parts = [_fold_sums(t, keys, metric) for t in tables]
        if not parts or not any(len(p) for p in parts):
            return pd.DataFrame(columns=columns)
        sums = pd.concat(parts).groupby(keys, sort=True)[["sum", "count"]].sum().reset_index()
        if "fold" in keys and "origin" in keys:
            pairs = sums[["fold", "origin"]].drop_duplicates()
            if not (pairs["fold"].nunique() == len(pairs) == pairs["origin"].nunique()):
                keys.remove("origin")
                sums = sums.groupby(keys, sort=True)[["sum", "count"]].sum().reset_index()
        with np.errstate(invalid="ignore", divide="ignore"):
            sums[metric] = sums["sum"].to_numpy(float) / sums["count"].to_numpy(float)
        frame = sums[[*keys, metric]].copy()
        frame.insert(0, "dataset", dataset)
        return frame

    def series_scores(self, dataset: str, forecaster: str, metric: str,
                      series: list[str] | None = None) -> pd.DataFrame:
        """``metric`` of every task of ``forecaster`` on ``dataset`` (of ``series`` only when
        given): columns dataset, forecaster, series, ``metric``."""
        if self.scores is not None:
            frame = self.scores
            keep = (frame["dataset"] == dataset) & (frame["forecaster"] == forecaster)
            if series is not None:
                keep &= frame["series"].astype(str).isin([str(s) for s in series])
            return frame[keep]
        assert self.folder is not None
        filters = [("dataset", "=", dataset), ("forecaster", "=", forecaster)]
        if series is not None:
            filters.append(("series", "in", [str(s) for s in series]))
        names = read_columns(self.folder, SCORES, ())
        columns = [c for c in ("dataset", "forecaster", "series", metric) if c in names]
        return read_arrow(self.folder, SCORES, columns, filters).to_pandas()

    def forecast_rows(self, dataset: str, series: list[str] | None,
                      forecasters: list[str]) -> pd.DataFrame:
        """forecasts.parquet rows of ``dataset``, ``forecasters`` and ``series`` (all when
        None), from memory when the table was read, else read from the file with those filters
        (a large file is never read whole)."""
        if self.forecasts is not None:
            frame = self.forecasts
            keep = (frame["dataset"] == dataset) & frame["forecaster"].isin(forecasters)
            if series is not None:
                keep &= frame["series"].isin(series)
            return frame[keep]
        assert self.folder is not None and self.has_forecasts
        filters = [("dataset", "=", dataset), ("forecaster", "in", list(forecasters))]
        if series is not None:
            filters.append(("series", "in", list(series)))
        return read_table(self.folder, FORECASTS, (), filters=filters)


def _optional(folder: ResultsFolder, name: str, required: tuple[str, ...]) -> pd.DataFrame | None:
    if not folder.exists(name):
        return None
    return read_table(folder, name, required)


def _history(folder: ResultsFolder) -> list[dict[str, Any]] | None:
    from runner.output.history import parse_history

    if not folder.exists(HISTORY):
        return None
    return parse_history(folder.read_text(HISTORY), folder.where(HISTORY))


def _fold_sums(table: Any, keys: list[str], metric: str) -> pd.DataFrame:
    """Per ``keys`` of one Arrow table, the sum of ``metric`` and how many values it has
    (NaN, an undefined score, left out as pandas leaves it out of a mean)."""
    import pandas as pd
    import pyarrow as pa
    import pyarrow.compute as pc

    values = table[metric]
    values = pc.if_else(pc.is_nan(values), pa.scalar(None, pa.float64()), values)
    table = table.select(keys).append_column(metric, values)
    grouped = table.group_by(keys).aggregate([(metric, "sum"), (metric, "count")])
    frame = grouped.to_pandas().rename(columns={f"{metric}_sum": "sum",
                                                f"{metric}_count": "count"})
    frame["sum"] = frame["sum"].fillna(0.0)
    for k in keys:  # dictionary text (a forecaster's name) as plain text, to group across
        if isinstance(frame[k].dtype, pd.CategoricalDtype):
            frame[k] = frame[k].astype(str)
    return frame


def read_results(out_dir: Path, *, forecasts: bool = True, scores: bool = True) -> Results:
    """Every file the report uses; DataError when a required one is missing or any is damaged.

    ``forecasts=False`` / ``scores=False`` leave forecasts.parquet / scores.parquet unread but
    for their columns (checked), to be read in parts by :meth:`Results.forecast_rows`,
    :meth:`Results.fold_scores` and :meth:`Results.series_scores`.
    """
    folder = ResultsFolder.open(out_dir)
    manifest = read_manifest(folder)
    rank_by = manifest["rank_by"]
    base = ("dataset", "forecaster")
    board = read_leaderboard(folder, rank_by)
    has_scores = folder.exists(SCORES)
    if scores:
        score_frame = _optional(folder, SCORES, base + ("series",))
        score_columns = None if score_frame is None else list(score_frame.columns)
    else:
        score_frame = None
        score_columns = (read_columns(folder, SCORES, base + ("series",)) if has_scores
                         else None)
    wanted = base + ("series", "step", "time", "actual", "forecast")
    has_forecasts = folder.exists(FORECASTS)
    if forecasts:
        frame = _optional(folder, FORECASTS, wanted)
        forecast_columns = None if frame is None else list(frame.columns)
    else:
        frame = None
        forecast_columns = read_columns(folder, FORECASTS, wanted) if has_forecasts else None
    for name, columns in ((SCORES, score_columns), (FORECASTS, forecast_columns)):
        if columns is not None and not {"fold", "origin"} & set(columns):
            raise DataError(f"{folder.where(name)}: column 'fold' is missing (or 'origin')")
    return Results(
        manifest=manifest,
        rank_by=rank_by,
        board=board,
        horizon=_optional(folder, HORIZON, base + ("step",)),
        scores=score_frame,
        forecasts=frame,
        failures=_optional(folder, FAILURES, base + ("reason",)),
        history=_history(folder),
        segments=read_segment_leaderboard(folder, rank_by),
        series_segments=_optional(folder, SERIES_SEGMENTS, ("dataset", "series")),
        folder=folder,
        has_forecasts=has_forecasts,
        has_scores=has_scores,
    )


# --------------------------------------------------------------------------- optional columns


def fold_key(frame: pd.DataFrame) -> str:
    """The column that names a task's fold in scores.parquet or forecasts.parquet.

    ``origin`` (the time of the fold's last training observation) when the frame has it and it
    names the folds one to one within each dataset, so the plots can show times; ``fold``
    otherwise (older folders, or origins that differ between series of one fold).
    """
    if "origin" not in frame.columns:
        return "fold"
    if "fold" not in frame.columns:
        return "origin"
    pairs = frame[["dataset", "fold", "origin"]].drop_duplicates()
    one_to_one = (not pairs.duplicated(["dataset", "fold"]).any()
                  and not pairs.duplicated(["dataset", "origin"]).any())
    return "origin" if one_to_one else "fold"


def complete_flags(board: pd.DataFrame) -> pd.Series | None:
    """The leaderboard's ``complete`` column as booleans; None when the folder has none."""
    if "complete" not in board.columns:
        return None
    col = board["complete"]
    if col.dtype == bool:
        return col
    return col.map(lambda v: str(v).strip().lower() in ("true", "1", "1.0", "yes"))


def metric_flags(columns: list[str]) -> dict[str, str]:
    """Metric column -> why it is unreliable for comparing forecasts, for flagged ones only.

    Unknown metric names (a folder written by another version) are not flagged.
    """
    from runner.scoring.metrics import BY_NAME

    out: dict[str, str] = {}
    for col in columns:
        metric = BY_NAME.get(col.partition("_")[0])
        if metric is not None and metric.unreliable:
            out[col] = metric.unreliable
    return out


def metric_columns(board: pd.DataFrame) -> list[str]:
    """The leaderboard's metric columns (``mae``, ``coverage_80``, ...) in file order."""
    return [c.removesuffix("_mean") for c in board.columns if c.endswith("_mean")]


# --------------------------------------------------------------------------- one dataset


@dataclass
class DatasetView:
    """One dataset's leaderboard rows (in rank order), reference and forecaster looks."""

    dataset: str
    rank_by: str
    board: pd.DataFrame
    reference: str | None
    looks: dict[str, Look]

    def look(self, name: str) -> Look:
        """The look of forecaster ``name``."""
        from runner.report.style import FALLBACK_LOOK

        return self.looks.get(name, FALLBACK_LOOK)

    def best(self) -> str | None:
        """The best-ranked candidate with a score (the best forecaster when no candidate has)."""
        col = f"{self.rank_by}_mean"
        scored = self.board[self.board[col].notna()]
        cands = scored[scored["role"] == "candidate"]
        pick = cands if len(cands) else scored
        return None if pick.empty else str(pick.iloc[0]["forecaster"])

    def shown(self, limit: int) -> list[str]:
        """The best ``limit`` forecasters other than the reference, then the reference."""
        names = [str(n) for n in self.board["forecaster"] if n != self.reference][:limit]
        if self.reference is not None and self.reference in set(self.board["forecaster"]):
            names.append(self.reference)
        return names


def dataset_views(results: Results) -> list[DatasetView]:
    """One view per dataset of the leaderboard, in file order."""
    from runner.report.style import forecaster_looks

    references = results.manifest.get("reference") or {}
    out = []
    board = results.board
    for dataset in dict.fromkeys(board["dataset"]):
        part = board[board["dataset"] == dataset].reset_index(drop=True)
        ref = references.get(dataset)
        out.append(DatasetView(str(dataset), results.rank_by, part, ref,
                               forecaster_looks(part, ref)))
    return out
