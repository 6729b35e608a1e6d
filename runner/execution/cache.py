"""The forecast cache: one SQLite file of finished forecasts, keyed by everything they depend on.

A task's key (:mod:`runner.execution.cache_keys`) is a SHA-256 over the forecaster's identity
(kind, entry, canonical parameters, implementation version:
:func:`runner.forecasters.registry.identity`), the training values it saw (raw float64 bytes, after
its gaps were filled from the slice alone:
:func:`runner.execution.tasks.training_values`), the covariates it saw (training and test
block, only for forecasters that are given covariates), the horizon, the season, the gap
between training end and test block, and the interval levels. The position of a slice in its
series is not part of the key, so appended observations leave the keys of every earlier fold
unchanged, and a revised value changes exactly the keys of the folds whose training slice
contains it.

The store is ``<cache folder>/forecasts.sqlite`` in WAL mode. Only the parent process writes,
in small transactions as tasks finish, so a killed run loses at most the tasks in flight. Two
runs may share a cache (SQLite's locking, with a generous busy timeout). A file that is not a
readable cache is moved aside as ``forecasts.sqlite.damaged-<n>`` and a new one is started, with
a warning on stderr. Forecasts are stored as raw float64 bytes, so a hit is bit-identical.

Failures that follow from the data and the forecaster (reasons ``error`` and
``invalid-output``) are stored too, so a warm rerun does not refit a model that fails on a
series every time. Failures that may come from the machine are never stored and are tried
again next run: ``timeout`` and ``crash``, and errors of the kinds listed in
:data:`TRANSIENT_ERRORS` (memory, files, imports).

``castgrid cache info`` and ``castgrid cache prune CONFIG...`` are :mod:`runner.cli.cache`.
"""

from __future__ import annotations

import json
import os
import sqlite3
import sys
import time
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.execution.cache_keys import task_keys

if TYPE_CHECKING:  # the command line imports this module at start: keep it light
    from runner.execution.tasks import SharedData, Task, TaskOutcome

CACHE_FILE = "forecasts.sqlite"
#: Bump when the key or the row layout changes; an older file is then set aside and rebuilt.
SCHEMA_VERSION = "2"
#: How long a writer waits for another run holding the write lock (milliseconds).
BUSY_TIMEOUT_MS = 60_000
_SQLITE_HEADER = b"SQLite format 3\x00"
_LOOKUP_CHUNK = 500
#: Failure reasons worth storing: the same forecaster on the same data fails the same way.
STORED_FAILURES = ("error", "invalid-output")
#: Exceptions (the start of an ``error`` message) that may pass on their own: never stored.
TRANSIENT_ERRORS = (
    "MemoryError", "OSError", "PermissionError", "FileNotFoundError", "TimeoutError",
    "ImportError", "ModuleNotFoundError", "PluginError", "BrokenPipeError", "KeyboardInterrupt",
)

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (name TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS forecasts (
    key BLOB PRIMARY KEY,
    kind TEXT NOT NULL,
    identity TEXT NOT NULL,
    horizon INTEGER NOT NULL,
    levels INTEGER NOT NULL,
    reason TEXT,
    message TEXT NOT NULL,
    point BLOB NOT NULL,
    lower BLOB NOT NULL,
    upper BLOB NOT NULL,
    info TEXT NOT NULL,
    seconds REAL NOT NULL,
    created REAL NOT NULL
) WITHOUT ROWID;
"""


class CacheDamaged(Exception):
    """The cache file cannot be read as a castgrid cache."""


def warn(message: str) -> None:
    """A one-line warning on stderr."""
    print(f"castgrid: warning: {message}", file=sys.stderr)


def cache_file(folder: str | Path) -> Path:
    """The SQLite file inside a cache folder."""
    return Path(folder) / CACHE_FILE


def check_cache_folder(folder: str | Path) -> None:
    """Raise :class:`~runner.errors.PathError` when the cache in ``folder`` cannot be used.

    Run before any computing: the folder (or its nearest existing ancestor, where it will be
    made) must be a writable folder, and the cache file, if there is one, a writable file.
    """
    from runner.errors import PathError

    folder = Path(folder)
    path = cache_file(folder)
    advice = "set execution.cache to another folder or to false, or run with --no-cache"
    if folder.exists() and not folder.is_dir():
        raise PathError(f"{folder}: expected the forecast cache folder, found a file; {advice}")
    if path.is_dir():
        raise PathError(f"{path}: expected the forecast cache file, found a folder; {advice}")
    if path.exists() and not os.access(path, os.R_OK | os.W_OK):
        raise PathError(f"{path}: cannot write the forecast cache file (permission denied or "
                        f"read-only); {advice}")
    holder = folder.absolute()
    while not holder.exists() and holder != holder.parent:
        holder = holder.parent
    if not holder.is_dir():
        raise PathError(f"{holder}: expected a folder to hold the forecast cache, found a file; "
                        f"{advice}")
    if not os.access(holder, os.W_OK | os.X_OK):
        raise PathError(f"{holder}: cannot write the forecast cache here (permission denied or "
                        f"read-only); {advice}")


def _move_aside(path: Path) -> Path:
    n = 1
    while Path(f"{path}.damaged-{n}").exists():
        n += 1
    target = Path(f"{path}.damaged-{n}")
    try:
        os.replace(path, target)
    except FileNotFoundError:  # another run has moved it already
        pass
    for suffix, keep in (("-wal", True), ("-shm", False)):
        side = Path(f"{path}{suffix}")
        try:
            if keep:
                os.replace(side, Path(f"{target}{suffix}"))
            else:
                side.unlink()
        except FileNotFoundError:
            pass
    return target


def _connect(path: Path, readonly: bool) -> sqlite3.Connection:
    if readonly:
        conn = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True,
                               isolation_level=None, timeout=BUSY_TIMEOUT_MS / 1000)
    else:
        conn = sqlite3.connect(str(path), isolation_level=None, timeout=BUSY_TIMEOUT_MS / 1000)
    conn.execute(f"PRAGMA busy_timeout = {BUSY_TIMEOUT_MS}")
    return conn


def _check(conn: sqlite3.Connection, path: Path) -> None:
    """Raise CacheDamaged unless ``conn`` is a sound cache of this schema version."""
    try:
        result = conn.execute("PRAGMA quick_check").fetchall()
        if result != [("ok",)]:
            raise CacheDamaged(f"integrity check failed ({result[0][0]})")
        row = conn.execute("SELECT value FROM meta WHERE name = 'schema'").fetchone()
        if row is None or row[0] != SCHEMA_VERSION:
            raise CacheDamaged("it was written by another castgrid cache version")
        conn.execute("SELECT key, point FROM forecasts LIMIT 1").fetchall()
    except sqlite3.DatabaseError as exc:
        raise CacheDamaged(str(exc)) from None


def _sniff(path: Path) -> None:
    with open(path, "rb") as fh:
        head = fh.read(len(_SQLITE_HEADER))
    if head and head != _SQLITE_HEADER:
        raise CacheDamaged("it is not an SQLite file")


class ForecastCache:
    """An open forecast cache. Use :meth:`open`; close it (or use it as a context manager)."""

    def __init__(self, conn: sqlite3.Connection, path: Path) -> None:
        self.conn = conn
        self.path = path
        self._pending: list[tuple[Any, ...]] = []
        self._last_commit = time.monotonic()

    @classmethod
    def open(cls, folder: str | Path) -> ForecastCache:
        """Open (or create) the cache in ``folder``; a damaged file is set aside and rebuilt."""
        path = cache_file(folder)
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            from runner.errors import ConfigError

            raise ConfigError(
                f"execution.cache: cannot create cache folder {path.parent} ({exc.strerror})"
            ) from None
        for attempt in range(2):
            conn = None
            try:
                if path.exists():
                    _sniff(path)
                conn = _connect(path, readonly=False)
                conn.execute("PRAGMA journal_mode = WAL")
                conn.execute("PRAGMA synchronous = NORMAL")
                # Random 32-byte keys touch pages all over the table: keep more of it in memory.
                conn.execute("PRAGMA cache_size = -65536")
                conn.execute("BEGIN IMMEDIATE")
                for statement in _SCHEMA.strip().split(";"):
                    if statement.strip():
                        conn.execute(statement)
                conn.execute(
                    "INSERT OR IGNORE INTO meta (name, value) VALUES ('schema', ?)",
                    (SCHEMA_VERSION,),
                )
                conn.execute("COMMIT")
                _check(conn, path)
                return cls(conn, path)
            except (CacheDamaged, sqlite3.DatabaseError) as exc:
                if conn is not None:
                    conn.close()
                if attempt:
                    raise
                aside = _move_aside(path)
                warn(f"forecast cache {path} is damaged ({exc}); moved it to {aside.name} and "
                     "started a new one")
        raise AssertionError("unreachable")

    @classmethod
    def open_readonly(cls, folder: str | Path) -> ForecastCache | None:
        """Open an existing cache without changing it; None when there is none."""
        path = cache_file(folder)
        if not path.exists():
            return None
        _sniff(path)
        conn = _connect(path, readonly=True)
        try:
            _check(conn, path)
        except CacheDamaged:
            conn.close()
            raise
        return cls(conn, path)

    def __enter__(self) -> ForecastCache:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Commit what is pending and close the file."""
        try:
            self.flush()
        finally:
            self.conn.close()

    def lookup(self, keys: Iterable[bytes]) -> dict[bytes, tuple[Any, ...]]:
        """Rows found for ``keys``: key -> (horizon, levels, reason, message, point, lower,
        upper, info, seconds)."""
        wanted = list(dict.fromkeys(keys))
        found: dict[bytes, tuple[Any, ...]] = {}
        for lo in range(0, len(wanted), _LOOKUP_CHUNK):
            chunk = wanted[lo : lo + _LOOKUP_CHUNK]
            marks = ",".join("?" * len(chunk))
            for row in self.conn.execute(
                "SELECT key, horizon, levels, reason, message, point, lower, upper, info, seconds "
                f"FROM forecasts WHERE key IN ({marks})",
                chunk,
            ):
                found[row[0]] = row[1:]
        return found

    def add(self, key: bytes, kind: str, ident: str, outcome: TaskOutcome, horizon: int,
            n_levels: int) -> bool:
        """Queue an outcome if it is worth keeping (see :func:`storable`); True if queued.

        Queued outcomes are committed in small transactions (see :meth:`flush`).
        """
        import numpy as np

        if not storable(outcome):
            return False
        if outcome.ok:
            assert outcome.point is not None and outcome.lower is not None
            arrays = [
                np.ascontiguousarray(a, dtype=np.float64).tobytes()
                for a in (outcome.point, outcome.lower, outcome.upper)
            ]
        else:
            arrays = [b"", b"", b""]
        self._pending.append((
            key, kind, ident, horizon, n_levels, outcome.reason, outcome.message, *arrays,
            info_json(outcome.info), float(outcome.seconds), time.time(),
        ))
        # Commit every half second: a killed run then loses little, and a writer holds the lock
        # only briefly when two runs share the cache. Not more often: with random keys every
        # row lands on its own page, so each commit rewrites about one page per row.
        if len(self._pending) >= 1000 or time.monotonic() - self._last_commit > 0.5:
            self.flush()
        return True

    def flush(self) -> None:
        """Write every queued outcome in one transaction."""
        if not self._pending:
            return
        rows, self._pending = self._pending, []
        self.conn.execute("BEGIN IMMEDIATE")
        try:
            self.conn.executemany(
                "INSERT OR REPLACE INTO forecasts (key, kind, identity, horizon, levels, reason, "
                "message, point, lower, upper, info, seconds, created) "
                "VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)",
                rows,
            )
            self.conn.execute("COMMIT")
        except BaseException:
            self.conn.execute("ROLLBACK")
            raise
        self._last_commit = time.monotonic()

    def entries(self) -> int:
        """Number of stored forecasts."""
        return int(self.conn.execute("SELECT COUNT(*) FROM forecasts").fetchone()[0])

    def by_kind(self) -> list[tuple[str, int]]:
        """Stored forecasts per forecaster kind."""
        return [
            (str(k), int(n))
            for k, n in self.conn.execute(
                "SELECT kind, COUNT(*) FROM forecasts GROUP BY kind ORDER BY kind"
            )
        ]

    def size_bytes(self) -> int:
        """Bytes on disk (the file and its write-ahead log)."""
        total = 0
        for suffix in ("", "-wal"):
            try:
                total += os.path.getsize(f"{self.path}{suffix}")
            except OSError:
                pass
        return total

    def prune(self, keep: Iterable[bytes]) -> int:
        """Delete every entry whose key is not in ``keep``; returns how many were deleted."""
        self.flush()
        self.conn.execute("BEGIN IMMEDIATE")
        try:
            self.conn.execute("CREATE TEMP TABLE IF NOT EXISTS keep (key BLOB PRIMARY KEY)")
            self.conn.execute("DELETE FROM keep")
            self.conn.executemany(
                "INSERT OR IGNORE INTO keep (key) VALUES (?)", ((k,) for k in keep)
            )
            cur = self.conn.execute(
                "DELETE FROM forecasts WHERE key NOT IN (SELECT key FROM keep)"
            )
            deleted = cur.rowcount
            self.conn.execute("DROP TABLE keep")
            self.conn.execute("COMMIT")
        except BaseException:
            self.conn.execute("ROLLBACK")
            raise
        if deleted:
            self.conn.execute("VACUUM")
            self.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        return deleted


def storable(outcome: TaskOutcome) -> bool:
    """True for outcomes the cache keeps: successes and failures that follow from the data."""
    if outcome.ok:
        return True
    if outcome.reason not in STORED_FAILURES:
        return False
    return not outcome.message.startswith(TRANSIENT_ERRORS)


def info_json(info: dict[str, Any]) -> str:
    """``info`` as canonical JSON (numpy scalars and arrays become numbers and lists)."""

    def plain(v: Any) -> Any:
        tolist = getattr(v, "tolist", None)
        return tolist() if callable(tolist) else str(v)

    return json.dumps(info, sort_keys=True, default=plain, allow_nan=True)


def outcome_from_row(index: int, row: tuple[Any, ...], horizon: int, n_levels: int,
                     rows: int | None = None) -> TaskOutcome | None:
    """A cached outcome (``cached=True``), or None when the row does not fit this run.

    ``rows`` is the number of series of a panel task's outcome (its arrays are then
    ``(rows, horizon)`` and ``(levels, rows, horizon)``); None for a per-series task.
    """
    import numpy as np

    from runner.execution.tasks import TaskOutcome

    h, levels, reason, message, point, lower, upper, info, seconds = row
    if h != horizon or levels != n_levels:
        return None
    if reason is not None:
        return TaskOutcome(index, None, None, None, reason=reason, message=message,
                           info=json.loads(info), seconds=float(seconds), cached=True)
    shape = (horizon,) if rows is None else (rows, horizon)
    size = 8 * int(np.prod(shape))
    if len(point) != size:
        return None
    if len(lower) != size * n_levels or len(upper) != len(lower):
        return None
    return TaskOutcome(
        index,
        np.frombuffer(point, dtype=np.float64).reshape(shape).copy(),
        np.frombuffer(lower, dtype=np.float64).reshape(n_levels, *shape).copy(),
        np.frombuffer(upper, dtype=np.float64).reshape(n_levels, *shape).copy(),
        info=json.loads(info),
        seconds=float(seconds),
        cached=True,
    )


def count_cached(
    tasks: Sequence[Task], shared: SharedData, cache_path: str | Path | None
) -> int:
    """How many of ``tasks`` the cache in folder ``cache_path`` can serve (never changes it).

    Counted in (series, fold) tasks: a panel task counts once per series it forecasts.
    """
    if cache_path is None or not tasks:
        return 0
    try:
        cache = ForecastCache.open_readonly(cache_path)
    except (CacheDamaged, sqlite3.DatabaseError) as exc:
        warn(f"forecast cache {cache_file(cache_path)} is damaged ({exc}); the next run "
             "rebuilds it")
        return 0
    if cache is None:
        return 0
    with cache:
        from runner.execution.panel_tasks import PanelTask, panel_rows

        keys = task_keys(tasks, shared)
        found = cache.lookup(keys)
        return sum(panel_rows(t, shared) if isinstance(t, PanelTask) else 1
                   for t, k in zip(tasks, keys) if k in found)


# ----------------------------------------------------------------------------- command line
