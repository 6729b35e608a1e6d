"""Reading a results folder, from disk or from a git revision.

A results folder is named either by a path (``results/demo``) or by ``REV:path``
(``v1.2:results/demo``), in which case each file is read with ``git show REV:path/<file>`` run in
the current working directory; ``path`` then follows git's rule: relative to the repository
root, or to the current directory when written ``REV:./path``.

Every problem is a :class:`~runner.errors.DataError` that names the folder (or revision), the
file and, where it applies, the line or column.
"""

from __future__ import annotations

import io
import json
import re
import subprocess
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.errors import DataError

if TYPE_CHECKING:  # pandas is imported where it is used: the CLI loads this module at start
    import pandas as pd

LEADERBOARD = "leaderboard.csv"
MANIFEST = "manifest.json"
HISTORY = "history.jsonl"
SCORES = "scores.parquet"
HORIZON = "horizon.csv"
FORECASTS = "forecasts.parquet"
FAILURES = "failures.csv"
SEGMENT_LEADERBOARD = "leaderboard_segments.csv"

#: Columns every leaderboard.csv has, whatever its metrics.
LEADERBOARD_COLUMNS = ("dataset", "rank", "forecaster", "kind", "role")
#: Keys every manifest.json has that castgrid's comparisons rely on.
MANIFEST_KEYS = ("experiment", "config_hash", "data", "rank_by", "metrics")


def interval_columns(level: float | str) -> tuple[str, str]:
    """The forecasts.parquet columns of the ``level``% central interval: (low bound, high bound)."""
    text = f"{float(level):g}"
    return f"interval_{text}_low", f"interval_{text}_high"


#: Matches a low-bound column of :func:`interval_columns`; group 1 is the level.
INTERVAL_LOW = re.compile(r"^interval_(\d+(?:\.\d+)?)_low$")


class ResultsFolder:
    """A results folder on disk or at a git revision; reads its files as bytes.

    >>> ResultsFolder.open("HEAD:results/demo").label
    'HEAD:results/demo'
    """

    def __init__(self, label: str, path: Path | None = None, rev: str | None = None,
                 git_path: str | None = None) -> None:
        self.label = label
        self.path = path
        self.rev = rev
        self.git_path = git_path
        self._checked = False

    @classmethod
    def open(cls, spec: str | Path) -> ResultsFolder:
        """A folder path, or ``REV:path`` when no folder of that name exists on disk."""
        text = str(spec)
        local = Path(text)
        if local.is_dir():
            return cls(text, path=local)
        if ":" in text and not local.exists():
            rev, _, git_path = text.partition(":")
            if rev and git_path:
                return cls(text, rev=rev, git_path=git_path.rstrip("/"))
        if local.exists():
            raise DataError(f"{text}: expected a results folder, found a file")
        raise DataError(
            f"{text}: results folder not found (expected a folder, or REV:path read from git)"
        )

    @property
    def is_git(self) -> bool:
        """True when the files come from a git revision."""
        return self.rev is not None

    def where(self, name: str) -> str:
        """How to name ``name`` of this folder in a message."""
        if self.path is not None:
            return str(self.path / name)
        return f"{self.rev}:{self.git_path}/{name}"

    def _git(self, *argv: str) -> subprocess.CompletedProcess[bytes]:
        try:
            return subprocess.run(["git", *argv], capture_output=True, check=False)
        except FileNotFoundError:
            raise DataError(f"{self.label}: git is needed to read REV:path, but it is not installed"
                            ) from None

    def _check_revision(self) -> None:
        if self._checked:
            return
        done = self._git("rev-parse", "--verify", "--quiet", f"{self.rev}^{{commit}}")
        if done.returncode != 0:
            probe = self._git("rev-parse", "--git-dir")
            if probe.returncode != 0:
                raise DataError(
                    f"{self.label}: cannot read revision {self.rev!r}: the current directory "
                    "is not inside a git repository"
                )
            raise DataError(f"{self.label}: unknown git revision {self.rev!r}")
        self._checked = True

    def exists(self, name: str) -> bool:
        """Whether the folder has file ``name``."""
        if self.path is not None:
            return (self.path / name).is_file()
        self._check_revision()
        done = self._git("cat-file", "-e", f"{self.rev}:{self.git_path}/{name}")
        return done.returncode == 0

    def read_bytes(self, name: str) -> bytes:
        """The content of file ``name``; DataError naming it when it is missing."""
        if self.path is not None:
            try:
                return (self.path / name).read_bytes()
            except FileNotFoundError:
                raise DataError(f"{self.where(name)}: file not found in the results folder"
                                ) from None
            except OSError as exc:
                raise DataError(f"{self.where(name)}: cannot read ({exc.strerror})") from None
        self._check_revision()
        done = self._git("show", "--no-textconv", f"{self.rev}:{self.git_path}/{name}")
        if done.returncode != 0:
            raise DataError(f"{self.where(name)}: file not found at git revision {self.rev!r}")
        return done.stdout

    def read_text(self, name: str) -> str:
        """The content of file ``name`` as UTF-8 text."""
        data = self.read_bytes(name)
        try:
            return data.decode("utf-8")
        except UnicodeDecodeError:
            raise DataError(f"{self.where(name)}: expected UTF-8 text") from None


def read_manifest(folder: ResultsFolder) -> dict[str, Any]:
    """manifest.json, checked for the keys comparisons rely on."""
    text = folder.read_text(MANIFEST)
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise DataError(f"{folder.where(MANIFEST)}: line {exc.lineno}: not valid JSON ({exc.msg})"
                        ) from None
    if not isinstance(data, dict):
        raise DataError(f"{folder.where(MANIFEST)}: expected a JSON object at the top level")
    for key in MANIFEST_KEYS:
        if key not in data:
            raise DataError(f"{folder.where(MANIFEST)}: key {key!r} is missing")
    if not isinstance(data["data"], dict):
        raise DataError(f"{folder.where(MANIFEST)}: data: expected an object per dataset")
    return data


def dataset_fingerprints(manifest: dict[str, Any]) -> dict[str, str | None]:
    """dataset -> data fingerprint, from a manifest."""
    out: dict[str, str | None] = {}
    for name, info in manifest.get("data", {}).items():
        out[name] = info.get("fingerprint") if isinstance(info, dict) else None
    return out


def _read_csv(folder: ResultsFolder, name: str, required: tuple[str, ...]) -> pd.DataFrame:
    import pandas as pd

    raw = folder.read_bytes(name)
    try:
        # Only an empty cell is missing: a forecaster may well be called "NA" or "null".
        frame = pd.read_csv(io.BytesIO(raw), keep_default_na=False, na_values=[""],
                            dtype={"dataset": str, "forecaster": str, "series": str,
                                   "attribute": str, "segment": str})
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        first = str(exc).strip().splitlines()[0] if str(exc).strip() else "empty file"
        raise DataError(f"{folder.where(name)}: not a readable CSV table ({first})") from None
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise DataError(f"{folder.where(name)}: column {missing[0]!r} is missing")
    return frame


def read_leaderboard(folder: ResultsFolder, rank_by: str | None = None) -> pd.DataFrame:
    """leaderboard.csv with numeric metric columns; ``rank_by`` adds its mean to the checks."""
    required = LEADERBOARD_COLUMNS + ((f"{rank_by}_mean",) if rank_by else ())
    return _numeric_board(folder, LEADERBOARD, _read_csv(folder, LEADERBOARD, required))


def read_segment_leaderboard(folder: ResultsFolder, rank_by: str | None = None
                             ) -> pd.DataFrame | None:
    """leaderboard_segments.csv like :func:`read_leaderboard`, or None when the folder has
    none (a run without ``segments:``)."""
    if not folder.exists(SEGMENT_LEADERBOARD):
        return None
    required = ("attribute", "segment", *LEADERBOARD_COLUMNS,
                *((f"{rank_by}_mean",) if rank_by else ()))
    return _numeric_board(folder, SEGMENT_LEADERBOARD,
                          _read_csv(folder, SEGMENT_LEADERBOARD, required))


def _numeric_board(folder: ResultsFolder, name: str, frame: pd.DataFrame) -> pd.DataFrame:
    """Every column of a leaderboard file as a number, except its text and true/false ones."""
    import pandas as pd

    for col in frame.columns:
        if col in ("dataset", "forecaster", "kind", "role", "attribute", "segment"):
            continue
        if col in ("beats_reference", "complete"):
            frame[col] = frame[col].map(lambda v: str(v).strip().lower() == "true")
            continue
        converted = pd.to_numeric(frame[col], errors="coerce")
        bad = converted.isna() & frame[col].notna()
        if bad.any():
            line = int(bad.to_numpy().nonzero()[0][0]) + 2  # header is line 1
            raise DataError(
                f"{folder.where(name)}: line {line}: column {col!r}: expected a number, "
                f"got {frame[col][bad].iloc[0]!r}"
            )
        frame[col] = converted.astype(float)
    return frame


def _parquet_source(folder: ResultsFolder, name: str) -> Any:
    """A path for pyarrow to read (only the parts it needs) or, from git, the file's bytes."""
    if folder.path is not None:
        path = folder.path / name
        if not path.is_file():
            folder.read_bytes(name)  # raises the usual DataError
        return str(path)
    return io.BytesIO(folder.read_bytes(name))


def read_columns(folder: ResultsFolder, name: str, required: tuple[str, ...]) -> list[str]:
    """The columns of a Parquet file of the folder (its footer only), checked for
    ``required``."""
    import pyarrow.parquet as pq

    try:
        names = list(pq.read_schema(_parquet_source(folder, name)).names)
    except DataError:
        raise
    except Exception as exc:  # pyarrow raises several types for a damaged file
        raise DataError(f"{folder.where(name)}: not a readable Parquet file ({exc})") from None
    missing = [c for c in required if c not in names]
    if missing:
        raise DataError(f"{folder.where(name)}: column {missing[0]!r} is missing")
    return names


def _row_groups(meta: Any, filters: list[tuple[str, str, Any]]) -> list[int]:
    """The row groups whose min / max statistics allow a row that ``=`` / ``in`` filters keep
    (pyarrow does not prune row groups on dictionary-encoded columns by itself)."""
    where = {meta.schema.column(i).name: i for i in range(meta.num_columns)}
    keep = []
    for g in range(meta.num_row_groups):
        possible = True
        for column, op, value in filters:
            if column not in where or op not in ("=", "in"):
                continue
            stats = meta.row_group(g).column(where[column]).statistics
            if stats is None or not stats.has_min_max:
                continue
            wanted = [value] if op == "=" else list(value)
            try:
                possible = any(stats.min <= v <= stats.max for v in wanted)
            except TypeError:  # statistics of another type than the values: no pruning
                possible = True
            if not possible:
                break
        if possible:
            keep.append(g)
    return keep


def read_arrow(folder: ResultsFolder, name: str, columns: list[str] | None,
               filters: list[tuple[str, str, Any]] | None = None) -> Any:
    """``columns`` (all when None) of the rows of a Parquet file of the folder that
    ``filters`` (pyarrow's ``(column, op, value)`` triples) select, as an Arrow table; of a
    large file only the row groups that can hold such rows are read."""
    import pyarrow.dataset as ds
    import pyarrow.parquet as pq

    try:
        f = pq.ParquetFile(_parquet_source(folder, name))
        if not filters:
            return f.read(columns=columns)
        groups = _row_groups(f.metadata, filters)
        wanted = None if columns is None else list(dict.fromkeys(
            columns + [c for c, _, _ in filters if c in f.schema_arrow.names]))
        table = f.read_row_groups(groups, columns=wanted)
        table = ds.dataset(table).to_table(filter=pq.filters_to_expression(filters))
        return table if columns is None else table.select(columns)
    except DataError:
        raise
    except Exception as exc:  # pyarrow raises several types for a damaged file
        raise DataError(f"{folder.where(name)}: not a readable Parquet file ({exc})") from None


def iter_arrow(folder: ResultsFolder, name: str, columns: list[str],
               filters: list[tuple[str, str, Any]]) -> Iterator[Any]:
    """:func:`read_arrow` a row group at a time: one Arrow table per row group that can hold
    selected rows, for summing up a file larger than memory should hold at once."""
    import pyarrow.dataset as ds
    import pyarrow.parquet as pq

    try:
        f = pq.ParquetFile(_parquet_source(folder, name))
        wanted = list(dict.fromkeys(columns + [c for c, _, _ in filters
                                               if c in f.schema_arrow.names]))
        expression = pq.filters_to_expression(filters)
        for g in _row_groups(f.metadata, filters):
            table = ds.dataset(f.read_row_group(g, columns=wanted)).to_table(filter=expression)
            yield table.select(columns)
    except DataError:
        raise
    except Exception as exc:  # pyarrow raises several types for a damaged file
        raise DataError(f"{folder.where(name)}: not a readable Parquet file ({exc})") from None


def read_table(folder: ResultsFolder, name: str, required: tuple[str, ...],
               filters: list[tuple[str, str, Any]] | None = None) -> pd.DataFrame:
    """A CSV or Parquet file of the folder, checked for ``required`` columns; ``filters``
    (pyarrow's ``(column, op, value)`` triples) select rows of a Parquet file as it is read."""
    if not name.endswith(".parquet"):
        return _read_csv(folder, name, required)
    import pandas as pd

    if filters:  # the pruning read; its frame has the dtypes pandas.read_parquet gives
        frame = read_arrow(folder, name, None, filters).to_pandas()
    else:
        try:
            frame = pd.read_parquet(_parquet_source(folder, name))
        except DataError:
            raise
        except Exception as exc:  # pyarrow raises several types for a damaged file
            raise DataError(f"{folder.where(name)}: not a readable Parquet file ({exc})"
                            ) from None
    missing = [c for c in required if c not in frame.columns]
    if missing:
        raise DataError(f"{folder.where(name)}: column {missing[0]!r} is missing")
    return frame
