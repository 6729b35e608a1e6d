"""The Parquet files of a results folder: how their columns are typed and encoded, and
forecasts.parquet, written block by block while a run computes (:class:`ForecastSink`)."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from runner.output.reader import interval_columns
from runner.scoring.chunks import chunk_plan
from runner.scoring.results import Chunk, ForecasterResult

if TYPE_CHECKING:
    from runner.data.panel import Panel
    from runner.windows.plan import Plan


def text_column(codes: np.ndarray, labels: list[str]) -> Any:
    """A dictionary-encoded text column: ``codes`` index ``labels``. Repeated labels (two
    datasets may name their series alike) are merged first, since readers refuse a dictionary
    with repeated values; otherwise the codes are used as they are."""
    import pyarrow as pa
    import pyarrow.compute as pc

    text = pa.array(labels, type=pa.string())
    codes = np.asarray(codes)
    if len(pc.unique(text)) != len(text):
        unique, first_of = np.unique(np.asarray(labels, dtype=object).astype(str),
                                     return_inverse=True)
        codes, text = first_of[codes], pa.array(unique, type=pa.string())
    return pa.DictionaryArray.from_arrays(pa.array(codes.astype(np.int32, copy=False)), text)


def time_column(panels: list[Panel], d: int, position: np.ndarray) -> Any:
    """Times of positions ``position`` of panel ``d`` as an Arrow column, typed for the whole
    run: timestamps when every dataset has dates, integers when every dataset has integer
    times, so readers get real times; text (as every other output prints them) when a run
    mixes both."""
    import pyarrow as pa

    kinds = {p.times.dtype.kind for p in panels}
    panel = panels[d]
    if kinds <= {"M"} or kinds <= {"i"}:
        dtype = "datetime64[ns]" if kinds == {"M"} else np.int64
        return pa.array(panel.times[position].astype(dtype, copy=False))
    return pa.array(panel.format_time(position).astype(str))


#: Parquet compression of every table written: zstd packs the forecasts' repeated times,
#: folds and steps tightly and the float64 values (kept as they are, for exactness) a little.
COMPRESSION = "zstd"
#: Columns written dictionary-encoded: the repeated text. Numbers are not: on float64 the
#: dictionary rarely pays, and trying it costs most of the writing time.
DICTIONARY_COLUMNS = ["dataset", "series", "forecaster"]


def kept_forecasts(mode: str, spec_role: str, name: str, reference: str) -> bool:
    """Whether ``output.forecasts: mode`` keeps a forecaster's forecasts: ``all``; the
    ``compared`` ones, every candidate and the reference; ``none``."""
    if mode == "all":
        return True
    if mode == "compared":
        return spec_role == "candidate" or name == reference
    return False


def _forecast_blocks(plan: Plan, chunk: Chunk) -> Iterator[Any]:
    """forecasts.parquet rows of one chunk, one Arrow table per kept forecaster: per task
    (series order) its ``horizon`` steps."""
    import pyarrow as pa

    cfg = plan.config
    h = cfg.horizon
    dp = chunk.plan
    panels = [x.panel for x in plan.datasets]
    n = dp.n_tasks
    steps = np.arange(h)
    # the chunk's own series form the dictionary of its row groups
    present, local = np.unique(dp.series, return_inverse=True)
    labels = [str(dp.panel.keys[i]) for i in present]
    series = text_column(np.repeat(local, h), labels)
    fold = pa.array(np.repeat(dp.fold, h).astype(np.int32))
    origin = time_column(panels, chunk.dataset, np.repeat(dp.ends - 1, h))
    step = pa.array(np.tile(steps + 1, n).astype(np.int32))
    time = time_column(panels, chunk.dataset, (dp.test_starts[:, None] + steps[None, :]).ravel())
    actual = pa.array(chunk.actual.ravel())
    bounds = [interval_columns(lv) for lv in cfg.intervals]
    for r in chunk.results:
        if not kept_forecasts(cfg.output.forecasts, r.spec.role, r.spec.name, dp.reference):
            continue
        assert r.point is not None and r.lower is not None and r.upper is not None
        data = {
            "dataset": text_column(np.zeros(n * h, dtype=np.int32), [dp.panel.name]),
            "series": series,
            "forecaster": text_column(np.zeros(n * h, dtype=np.int32), [r.spec.name]),
            "fold": fold,
            "origin": origin,
            "step": step,
            "time": time,
            "actual": actual,
            "forecast": pa.array(r.point.ravel().astype(float, copy=False)),
        }
        for i, (lo, hi) in enumerate(bounds):
            data[lo] = pa.array(r.lower[i].ravel().astype(float, copy=False))
            data[hi] = pa.array(r.upper[i].ravel().astype(float, copy=False))
        yield pa.table(data)


class ParquetFile:
    """A Parquet file written a table (a row group or more) at a time."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.writer: Any = None

    def write(self, table: Any, group_rows: int | None = None) -> None:
        """Append ``table`` as the file's next row group (groups of ``group_rows`` rows when
        given); the first table sets the schema."""
        import pyarrow.parquet as pq

        if self.writer is None:
            self.writer = pq.ParquetWriter(self.path, table.schema, compression=COMPRESSION,
                                           use_dictionary=DICTIONARY_COLUMNS)
        self.writer.write_table(table, row_group_size=group_rows)

    def close(self, empty: Any = None) -> None:
        """Finish the file; ``empty`` (a table without rows) gives a file nothing was written
        to its columns."""
        if self.writer is None and empty is not None:
            self.write(empty)
        if self.writer is not None:
            self.writer.close()
            self.writer = None


#: Series per row group of forecasts.parquet (one row group per block of series and
#: forecaster). A property of the file, not of the run's chunks: the file is the same bytes
#: whatever ``execution.chunk`` is, and a reader that wants a few series reads a few groups.
GROUP_SERIES = 10_000
#: Rows per row group of forecasts.parquet within a block: the groups' min / max statistics of
#: ``series`` let a reader that wants a few series (the report's best and worst) skip the rest
#: of a block, which it would otherwise decompress whole.
GROUP_ROWS = 1 << 16


class ForecastSink:
    """Writes forecasts.parquet as :func:`runner.scoring.evaluate.evaluate` hands the chunks
    over: the rows of each block of :data:`GROUP_SERIES` series (by series number) are written
    as soon as the block is complete, so that no more than a chunk and two blocks of
    forecasts (the one gathered, the one being written) are ever in memory.

    A block is built and written on a thread of its own while the run goes on computing (the
    next chunk, the leaderboard): Arrow encodes and compresses without holding Python's lock,
    so on two cores the writing costs little wall time. One block at most is in flight, and
    blocks are written in the order they complete, so the file is the same bytes as a write
    on the run's own thread.
    """

    def __init__(self, plan: Plan, path: Path) -> None:
        self.plan = plan
        self.file = ParquetFile(path)
        self.pending: list[Chunk] = []  # the parts of the block being gathered
        self.block: tuple[int, int] | None = None  # its (dataset, block number)
        self.writing: Future[None] | None = None  # the block being written
        self.thread: ThreadPoolExecutor | None = None

    def __call__(self, chunk: Chunk) -> None:
        n = chunk.plan.n_tasks
        if n == 0:
            return
        blocks = chunk.plan.series // GROUP_SERIES
        bounds = [0, *(np.flatnonzero(np.diff(blocks)) + 1).tolist(), n]
        for lo, hi in zip(bounds[:-1], bounds[1:]):
            key = (chunk.dataset, int(blocks[lo]))
            if key != self.block:
                self._flush()
                self.block = key
            self.pending.append(_chunk_part(chunk, lo, hi))
        if chunk.tasks.stop == self.plan.datasets[chunk.dataset].n_tasks:
            self._flush()  # the dataset's last chunk: no later task can join its block
            self.block = None

    def close(self) -> None:
        """Write the last block and finish the file (its columns even without a row)."""
        try:
            self._flush()
            self._wait()
        finally:
            self._stop_thread()
        empty = None
        if self.file.writer is None:  # no row at all: the columns still say what there is
            empty = _empty_forecasts(self.plan)
        self.file.close(empty)

    def abort(self) -> None:
        """Stop writing (the block in flight is let finish; its error, if any, is dropped)."""
        self.pending = []
        try:
            self._wait()
        except Exception:  # the file is being thrown away
            pass
        finally:
            self._stop_thread()
            writer, self.file.writer = self.file.writer, None
            if writer is not None:
                try:
                    writer.close()
                except Exception:  # the file is being thrown away
                    pass

    def _flush(self) -> None:
        if not self.pending:
            return
        block, self.pending = _joined(self.pending), []
        self._wait()  # one block in flight at most: memory stays a chunk and a block
        if self.thread is None:
            self.thread = ThreadPoolExecutor(1, thread_name_prefix="castgrid-forecasts")
        self.writing = self.thread.submit(self._write, block)

    def _write(self, block: Chunk) -> None:
        for table in _forecast_blocks(self.plan, block):
            self.file.write(table, GROUP_ROWS)

    def _wait(self) -> None:
        """Wait for the block in flight; its error (a full disk, say) is raised here."""
        writing, self.writing = self.writing, None
        if writing is not None:
            writing.result()

    def _stop_thread(self) -> None:
        if self.thread is not None:
            self.thread.shutdown(wait=True)
            self.thread = None


def _chunk_part(chunk: Chunk, lo: int, hi: int) -> Chunk:
    """Tasks ``lo:hi`` of a chunk, forecasts only (views of its arrays)."""
    if lo == 0 and hi == chunk.plan.n_tasks:
        return chunk
    tasks = slice(lo, hi)
    results = [ForecasterResult(r.spec, r.point[tasks], r.lower[:, tasks], r.upper[:, tasks],
                                [], [])  # type: ignore[index]
               for r in chunk.results]
    return Chunk(chunk.dataset, chunk_plan(chunk.plan, tasks),
                 slice(chunk.tasks.start + lo, chunk.tasks.start + hi), chunk.actual[tasks],
                 results, chunk.summary)


def _joined(parts: list[Chunk]) -> Chunk:
    """Consecutive parts of one dataset's tasks as one chunk (forecasts only)."""
    if len(parts) == 1:
        return parts[0]
    first = parts[0]

    def cat(get: Callable[[Any], np.ndarray], axis: int = 0) -> np.ndarray:
        return np.concatenate([get(p) for p in parts], axis=axis)

    plan = replace(first.plan, **{k: cat(lambda p, k=k: getattr(p.plan, k)) for k in
                                  ("series", "fold", "origin", "starts", "ends", "test_starts")})
    results = [
        ForecasterResult(r.spec, cat(lambda p, i=i: p.results[i].point),
                         cat(lambda p, i=i: p.results[i].lower, 1),
                         cat(lambda p, i=i: p.results[i].upper, 1), [], [])
        for i, r in enumerate(first.results)
    ]
    tasks = slice(first.tasks.start, parts[-1].tasks.stop)
    return Chunk(first.dataset, plan, tasks, cat(lambda p: p.actual), results, first.summary)


def _empty_forecasts(plan: Plan) -> Any:
    import pyarrow as pa

    text = pa.dictionary(pa.int32(), pa.string())
    kinds = {dp.panel.times.dtype.kind for dp in plan.datasets}
    when = (pa.timestamp("ns") if kinds <= {"M"} and kinds else
            pa.int64() if kinds <= {"i"} and kinds else pa.string())
    fields = [("dataset", text), ("series", text), ("forecaster", text), ("fold", pa.int32()),
              ("origin", when), ("step", pa.int32()), ("time", when), ("actual", pa.float64()),
              ("forecast", pa.float64())]
    for lv in plan.config.intervals:
        fields += [(c, pa.float64()) for c in interval_columns(lv)]
    return pa.table({name: pa.array([], type=t) for name, t in fields})
