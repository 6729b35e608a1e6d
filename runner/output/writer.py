"""Writing a results folder: every file is built in a temporary folder, then swapped in.

Nothing half-written: if anything fails while writing, the previous results stay as they were.
The temporary folder (``.NAME.tmp-HOST-PID-XXXX``) and the previous results while they are
being replaced (``.NAME.old-HOST-PID-XXXX``) sit beside ``NAME`` and carry the writing
process's host and id, so that a later run can tell what a killed run left behind from what a
running one is still writing (:func:`sweep_leftovers`).
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import re
import shutil
import socket
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from runner import __version__
from runner.config import canonical_json, config_hash
from runner.errors import PathError
from runner.forecasters.recorded import manifest_entries
from runner.forecasters.registry import identity
from runner.output.parquet_files import ForecastSink, ParquetFile, text_column, time_column
from runner.output.tables import terminal_text, to_csv_text, to_markdown
from runner.output.uptodate import RECORD, TERMINAL, Inputs, may_pass, output_digests
from runner.output.uptodate import cpu_model as _cpu_model
from runner.scoring import metrics as M
from runner.scoring.derived import selection_frame
from runner.scoring.results import Chunk, Evaluation
from runner.windows.plan import DatasetPlan, Plan

if TYPE_CHECKING:
    from runner.data.panel import Panel


def _versions() -> dict[str, str]:
    # From the installed packages' metadata: importing statsmodels and scipy only to read
    # their versions would cost a run that fits nothing most of a second.
    from importlib.metadata import version

    return {
        "castgrid": __version__,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "pandas": pd.__version__,
        "statsmodels": version("statsmodels"),
        "scipy": version("scipy"),
        "pydantic": version("pydantic"),
        "pyarrow": version("pyarrow"),
    }


def _origins_summary(dp: DatasetPlan) -> dict[str, Any]:
    labels = dp.origin_labels()
    return {"count": int(len(labels)), "first": str(labels[0]), "last": str(labels[-1])}


def platform_info() -> dict[str, Any]:
    """Where the numbers were computed: CPU architecture and model, and every BLAS library
    loaded with the kernel it chose for this CPU.

    The same library versions can still give different last bits on another CPU: OpenBLAS
    picks a kernel per CPU (``OPENBLAS_CORETYPE`` overrides it), and iterative optimisers can
    carry such bits into a different optimum. ``castgrid diff`` names a change of platform so
    that such differences are read for what they are. Recorded in this (the parent) process;
    local worker processes run on the same machine with the same environment, so they load the
    same kernels (remote dask workers are not recorded).
    """
    import scipy.linalg  # noqa: F401  scipy's BLAS (statsmodels' fits use it) is loaded now
    from threadpoolctl import threadpool_info

    blas = []
    for lib in threadpool_info():
        if lib.get("user_api") != "blas":
            continue
        entry = {
            "library": str(lib.get("internal_api", "unknown")),
            "version": str(lib.get("version") or "unknown"),
            "kernel": str(lib.get("architecture") or lib.get("corename") or "unknown"),
            "file": os.path.basename(str(lib.get("filepath", ""))),
        }
        if entry not in blas:
            blas.append(entry)
    blas.sort(key=lambda e: (e["library"], e["file"]))
    return {
        "machine": platform.machine(),
        "system": platform.system(),
        "cpu": _cpu_model(),
        "blas": blas,
    }


def manifest(ev: Evaluation) -> dict[str, Any]:
    """Canonical config and hash, data fingerprints, versions, platform and task counts (no
    timestamps)."""
    cfg = ev.plan.config
    failed = sum(int(r.failed.sum()) for dr in ev.datasets for r in dr.results)
    total = ev.plan.n_tasks
    man: dict[str, Any] = {
        "experiment": cfg.experiment,
        "config": json.loads(canonical_json(cfg)),
        "config_hash": config_hash(cfg),
        "data": {
            dr.plan.panel.name: {
                # as written in the config (relative to it), so the manifest is the same in
                # every checkout
                "path": ds.path,
                "fingerprint": dr.plan.panel.fingerprint,
                "series": dr.plan.panel.n_series,
                "observations": int(len(dr.plan.panel.values)),
                "origins": _origins_summary(dr.plan),
                # missing actuals in test blocks (missing: interpolate): left out of the scores
                "unscored_actuals": dr.unscored_actuals,
            }
            for dr, ds in zip(ev.datasets, cfg.datasets)
        },
        "versions": _versions(),
        "platform": platform_info(),
        "tasks": {
            "total": total,
            # baseline tasks are always computed (vectorised; cheaper than a cache look-up)
            "computed": total - ev.counts.cached - ev.counts.not_run,
            "cached": ev.counts.cached,
            "failed": failed,
            "skipped_series": sum(len(dr.plan.skipped) for dr in ev.datasets),
        },
        "skipped": [f"{dr.plan.panel.name}: {s}" for dr in ev.datasets for s in dr.plan.skipped],
        "rank_by": cfg.rank_by,
        "metrics": cfg.metrics,
        "reference": {dr.plan.panel.name: dr.plan.reference for dr in ev.datasets},
        # where a default gave way to the config (rank metric, reference, dropped grid
        # combinations) and choices that may mislead: the same lines the run printed
        "notes": ev.plan.all_notes(),
        "warnings": list(ev.plan.warnings),
        "forecasters": [
            {"name": s.name, "kind": s.kind, "role": s.role, "identity": identity(s)}
            for s in ev.plan.forecasters
        ],
    }
    if ev.plan.recorded:  # the forecasts files read, so that diff can tell when one changed
        man["recorded"] = manifest_entries(ev.plan)
    return man


def _score_blocks(ev: Evaluation, cols: list[str]) -> Iterator[Any]:
    """scores.parquet, one Arrow table per dataset and forecaster (task order)."""
    import pyarrow as pa

    panels = [dr.plan.panel for dr in ev.datasets]
    for d, dr in enumerate(ev.datasets):
        dp = dr.plan
        n = dp.n_tasks
        keys = _series_labels(dp.panel)
        series = text_column(dp.series, keys)
        fold = pa.array(dp.fold.astype(np.int32))
        # the origin is the time of the fold's last training observation
        origin = time_column(panels, d, dp.ends - 1)
        for r in dr.results:
            data = {
                "dataset": text_column(np.zeros(n, dtype=np.int32), [dp.panel.name]),
                "series": series,
                "forecaster": text_column(np.zeros(n, dtype=np.int32), [r.spec.name]),
                "fold": fold,
                "origin": origin,
            }
            for c in cols:
                data[c] = pa.array(np.asarray(r.scores[c].per_task, dtype=float))
            yield pa.table(data)


def _series_labels(panel: Panel) -> list[str]:
    return [str(k) for k in panel.keys]


def scores_table(ev: Evaluation, cols: list[str]) -> Any:
    """scores.parquet as an Arrow table: one row per dataset, series, forecaster and fold.

    ``fold`` numbers the dataset's origins from the oldest; ``origin`` is the time of the
    fold's last training observation.
    """
    import pyarrow as pa

    blocks = list(_score_blocks(ev, cols))
    if not blocks:
        return pa.table({c: pa.array([], type=pa.float64()) for c in cols})
    return pa.concat_tables(blocks)


def _horizon_frame(ev: Evaluation, cols: list[str]) -> pd.DataFrame:
    rows = []
    for dr in ev.datasets:
        for r in dr.results:
            for step in range(ev.plan.config.horizon):
                row: dict[str, Any] = {
                    "dataset": dr.plan.panel.name, "forecaster": r.spec.name, "step": step + 1,
                }
                for c in cols:
                    row[c] = float(r.scores[c].per_step[step])
                rows.append(row)
    return pd.DataFrame(rows, columns=["dataset", "forecaster", "step", *cols])


def _failures_frame(ev: Evaluation) -> pd.DataFrame:
    rows = []
    for dr in ev.datasets:
        dp = dr.plan
        for r in dr.results:
            failed = np.flatnonzero(r.failed)
            origins = dp.panel.format_time(dp.ends[failed] - 1)  # of the failed tasks only
            for t, origin in zip(failed, origins):
                rows.append({
                    "dataset": dp.panel.name, "series": dp.panel.keys[dp.series[t]],
                    "forecaster": r.spec.name, "fold": int(dp.fold[t]),
                    "origin": str(origin), "reason": r.reason[t], "message": r.message[t],
                })
    return pd.DataFrame(rows, columns=["dataset", "series", "forecaster", "fold", "origin",
                                       "reason", "message"])


def _csv(frame: pd.DataFrame, path: Path) -> None:
    text = frame.to_csv(index=False, float_format="%.6g", lineterminator="\n")
    path.write_text(text, encoding="utf-8")


class Staging:
    """The temporary folder a run's results are written into, swapped in as a whole at the end
    (:meth:`commit`), or removed if anything fails (use it as a context manager).

    forecasts.parquet is written into it while the run computes (:meth:`forecast_sink`); the
    other files once the leaderboard is known.
    """

    def __init__(self, out_dir: str | Path) -> None:
        self.out_dir = Path(out_dir)
        self.out_dir.parent.mkdir(parents=True, exist_ok=True)
        sweep_leftovers(self.out_dir)
        self.tmp = Path(tempfile.mkdtemp(prefix=f".{self.out_dir.name}.tmp-{_owner()}-",
                                         dir=self.out_dir.parent))
        os.chmod(self.tmp, 0o755)  # mkdtemp makes it private; results are for everyone to read
        self.sink: ForecastSink | None = None

    def __enter__(self) -> Staging:
        return self

    def __exit__(self, kind: object, *exc: object) -> None:
        if kind is not None:
            self.abort()

    def abort(self) -> None:
        """Remove the temporary folder; the previous results stay as they were."""
        if self.sink is not None:
            self.sink.abort()
        shutil.rmtree(self.tmp, ignore_errors=True)

    def forecast_sink(self, plan: Plan) -> ForecastSink | None:
        """Where the run's chunks go: forecasts.parquet, or nowhere with ``output.forecasts:
        none``."""
        if plan.config.output.forecasts == "none":
            return None
        self.sink = ForecastSink(plan, self.tmp / "forecasts.parquet")
        return self.sink

    def commit(
        self, ev: Evaluation, board: pd.DataFrame,
        finish: Callable[[Path], object] | None = None,
    ) -> dict[str, Any]:
        """Write every other file, call ``finish`` with the folder (the pipeline builds the
        report there, so that it is part of the same all-or-nothing write), swap it in;
        returns the manifest."""
        cfg = ev.plan.config
        cols = M.columns(cfg.metrics, tuple(cfg.intervals))
        tmp = self.tmp
        man = manifest(ev)
        (tmp / "leaderboard.csv").write_text(to_csv_text(board), encoding="utf-8")
        (tmp / "leaderboard.md").write_text(
            to_markdown(board, cfg.rank_by, cfg.metrics), encoding="utf-8"
        )
        (tmp / "manifest.json").write_text(
            json.dumps(man, indent=2, sort_keys=True) + "\n", encoding="utf-8"
        )
        from runner.output.segments import write_segment_files

        write_segment_files(ev, tmp, board)
        scores = ParquetFile(tmp / "scores.parquet")
        for table in _score_blocks(ev, cols):  # a row group per dataset and forecaster
            scores.write(table)
        scores.close(scores_table(ev, cols) if scores.writer is None else None)
        _csv(_horizon_frame(ev, cols), tmp / "horizon.csv")
        _csv(_failures_frame(ev), tmp / "failures.csv")
        selection = selection_frame(ev)
        if selection is not None:  # only runs with a best_so_far candidate have one
            _csv(selection, tmp / "selection.csv")
        # what `castgrid run` prints, as bytes: a rerun with nothing to do prints it again
        (tmp / TERMINAL).write_bytes(terminal_text(board, cfg.rank_by, selection).encode())
        old_history = self.out_dir / "history.jsonl"
        if old_history.exists():
            shutil.copy2(old_history, tmp / "history.jsonl")
        from runner.output.history import append_history

        append_history(tmp, man, board)
        if self.sink is not None:  # its last block was written meanwhile, on its thread
            self.sink.close()
        if finish is not None:
            finish(tmp)
        _seal(tmp, ev)
        _swap_in(tmp, self.out_dir)
        return man


def _seal(folder: Path, ev: Evaluation) -> None:
    """Write :data:`~runner.output.uptodate.RECORD` (what a rerun compares) last of all: the
    digests of the outputs are taken once every other file, report and history included, is
    written."""
    inputs = ev.plan.inputs
    if inputs is None:  # a plan built without runner.pipeline.prepare
        inputs = Inputs.refusing("the run's plan was not prepared from a config file")
    reasons = [(r.reason[t], r.message[t]) for dr in ev.datasets for r in dr.results
               for t in np.flatnonzero(r.failed)]
    retry = sum(may_pass(str(reason), str(message)) for reason, message in reasons)
    record = inputs.record(not ev.stopped, len(reasons), retry, output_digests(folder))
    (folder / RECORD).write_text(json.dumps(record, indent=2, sort_keys=True) + "\n",
                                 encoding="utf-8")


def write_results(
    ev: Evaluation,
    board: pd.DataFrame,
    out_dir: Path,
    *,
    finish: Callable[[Path], object] | None = None,
) -> dict[str, Any]:
    """Write every file of a run kept in memory (every dataset one chunk) into ``out_dir`` at
    once; returns the manifest. ``finish`` as in :meth:`Staging.commit`."""
    with Staging(out_dir) as stage:
        sink = stage.forecast_sink(ev.plan)
        if sink is not None:
            for d, dr in enumerate(ev.datasets):
                if dr.actual is None:
                    raise ValueError("the evaluation kept no forecasts (it ran in chunks); "
                                     "write its results while it runs (Staging)")
                sink(Chunk(d, dr.plan, slice(0, dr.plan.n_tasks), dr.actual, dr.results,
                           dr.summary))  # type: ignore[arg-type]
        return stage.commit(ev, board, finish)


def _swap_in(tmp: Path, out_dir: Path) -> None:
    """Replace ``out_dir`` by ``tmp`` with renames, so readers never see a mix of two runs."""
    if out_dir.exists():
        # Named after tmp (unique, and marked with this process as its owner).
        old = tmp.with_name(f".{out_dir.name}.old-" + tmp.name[len(f".{out_dir.name}.tmp-"):])
        os.replace(out_dir, old)
        os.replace(tmp, out_dir)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, out_dir)


# ------------------------------------------------------------- before a run, after a kill


def check_output_dir(out_dir: str | Path) -> None:
    """Raise :class:`~runner.errors.PathError` when ``out_dir`` cannot be written as a whole.

    Run before any computing, so that a read-only folder costs the user a second, not a run:
    the folder that will hold ``out_dir`` (or its nearest existing ancestor) must be a
    writable folder, and an existing ``out_dir`` a writable folder (it is replaced as a
    whole) with a readable ``history.jsonl``.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise PathError(f"{out_dir}: expected a results folder, found a file")
    holder = out_dir.absolute().parent
    while not holder.exists() and holder != holder.parent:
        holder = holder.parent
    if not holder.is_dir():
        raise PathError(f"{holder}: expected a folder to hold results folder {out_dir}, "
                        "found a file")
    if not os.access(holder, os.W_OK | os.X_OK):
        raise PathError(
            f"{holder}: cannot write here (permission denied or read-only), so results folder "
            f"{out_dir} cannot be written; choose another --out or output.dir"
        )
    if out_dir.is_dir():
        if not os.access(out_dir, os.W_OK | os.X_OK):
            raise PathError(
                f"{out_dir}: the results folder is read-only; a run replaces it as a whole "
                "(make it writable, or choose another --out or output.dir)"
            )
        history = out_dir / "history.jsonl"
        if history.exists() and not os.access(history, os.R_OK):
            raise PathError(f"{history}: cannot read the run history (permission denied)")


#: ``tmp`` or ``old``, the writer's host tag and process id, and mkdtemp's random part.
_LEFTOVER = re.compile(r"(?P<kind>tmp|old)-(?P<host>[0-9a-f]{8})-(?P<pid>[0-9]+)-[A-Za-z0-9_]+")


def _host_tag() -> str:
    return hashlib.sha256(socket.gethostname().encode()).hexdigest()[:8]


def _owner() -> str:
    """``HOST-PID`` of this process, as written into the names of its temporary folders."""
    return f"{_host_tag()}-{os.getpid()}"


def _process_gone(pid: int) -> bool:
    """True only when no process ``pid`` exists on this machine (POSIX; elsewhere False)."""
    if os.name != "posix":
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except OSError:  # exists, but belongs to another user
        return False
    return False


def sweep_leftovers(out_dir: str | Path) -> list[Path]:
    """Remove what killed runs left beside ``out_dir``; returns the folders removed.

    Only folders named by :func:`write_results` for this ``out_dir``, written on this host, by
    a process that no longer exists. A run killed between the two renames of the swap left
    the previous results as ``.NAME.old-...`` and no ``NAME``: those are put back.
    """
    out_dir = Path(out_dir)
    parent, prefix = out_dir.parent, f".{out_dir.name}."
    try:
        entries = sorted(p for p in parent.iterdir() if p.name.startswith(prefix))
    except OSError:
        return []
    host, removed = _host_tag(), []
    for entry in entries:
        m = _LEFTOVER.fullmatch(entry.name[len(prefix):])
        if m is None or m["host"] != host or not entry.is_dir() or entry.is_symlink():
            continue
        if not _process_gone(int(m["pid"])):
            continue
        if m["kind"] == "old" and not out_dir.exists():
            os.replace(entry, out_dir)
            continue
        shutil.rmtree(entry, ignore_errors=True)
        removed.append(entry)
    return removed
