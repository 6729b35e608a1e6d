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

    ``forecasts`` is None too when it was left unread (``read_results(..., forecasts=False)``):
    ``has_forecasts`` says whether the folder has the file, and :meth:`forecast_rows` reads
    the rows a plot needs.
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


def read_results(out_dir: Path, *, forecasts: bool = True) -> Results:
    """Every file the report uses; DataError when a required one is missing or any is damaged.

    ``forecasts=False`` leaves forecasts.parquet unread but for its columns (checked), to be
    read in parts by :meth:`Results.forecast_rows`.
    """
    folder = ResultsFolder.open(out_dir)
    manifest = read_manifest(folder)
    rank_by = manifest["rank_by"]
    base = ("dataset", "forecaster")
    board = read_leaderboard(folder, rank_by)
    scores = _optional(folder, SCORES, base + ("series",))
    wanted = base + ("series", "step", "time", "actual", "forecast")
    has_forecasts = folder.exists(FORECASTS)
    if forecasts:
        frame = _optional(folder, FORECASTS, wanted)
        forecast_columns = None if frame is None else list(frame.columns)
    else:
        frame = None
        forecast_columns = read_columns(folder, FORECASTS, wanted) if has_forecasts else None
    for name, columns in ((SCORES, None if scores is None else list(scores.columns)),
                          (FORECASTS, forecast_columns)):
        if columns is not None and not {"fold", "origin"} & set(columns):
            raise DataError(f"{folder.where(name)}: column 'fold' is missing (or 'origin')")
    return Results(
        manifest=manifest,
        rank_by=rank_by,
        board=board,
        horizon=_optional(folder, HORIZON, base + ("step",)),
        scores=scores,
        forecasts=frame,
        failures=_optional(folder, FAILURES, base + ("reason",)),
        history=_history(folder),
        segments=read_segment_leaderboard(folder, rank_by),
        series_segments=_optional(folder, SERIES_SEGMENTS, ("dataset", "series")),
        folder=folder,
        has_forecasts=has_forecasts,
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
