"""Writing a results folder: every file is built in a temporary folder, then swapped in.

Nothing half-written: if anything fails while writing, the previous results stay as they were.
"""

from __future__ import annotations

import json
import os
import platform
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from runner import __version__
from runner.config import canonical_json, config_hash
from runner.forecasters.registry import identity
from runner.output.reader import interval_columns
from runner.scoring import metrics as M
from runner.scoring.evaluate import Evaluation
from runner.scoring.leaderboard import to_csv_text, to_markdown


def _dict_array(codes: np.ndarray, labels: list[str]):
    import pyarrow as pa

    return pa.DictionaryArray.from_arrays(
        pa.array(np.asarray(codes, dtype=np.int32)), pa.array(labels, type=pa.string())
    )


def _versions() -> dict[str, str]:
    import joblib
    import pyarrow
    import pydantic
    import scipy
    import statsmodels

    return {
        "castgrid": __version__,
        "python": platform.python_version(),
        "numpy": np.__version__,
        "pandas": pd.__version__,
        "statsmodels": statsmodels.__version__,
        "scipy": scipy.__version__,
        "pydantic": pydantic.__version__,
        "pyarrow": pyarrow.__version__,
        "joblib": joblib.__version__,
    }


def _cpu_model() -> str:
    """The CPU's model name (Linux /proc/cpuinfo), else what the platform module knows."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
            for line in fh:
                key, _, value = line.partition(":")
                if key.strip() in ("model name", "Model", "cpu model"):
                    return value.strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


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
    return {
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
        "forecasters": [
            {"name": s.name, "kind": s.kind, "role": s.role, "identity": identity(s)}
            for s in ev.plan.forecasters
        ],
    }


def _scores_table(ev: Evaluation, cols: list[str]):
    import pyarrow as pa

    names = [s.name for s in ev.plan.forecasters]
    ds_names = [dr.plan.panel.name for dr in ev.datasets]
    keys: list[str] = []
    parts: dict[str, list[np.ndarray]] = {k: [] for k in ("d", "s", "f", "fold", "origin")}
    metric_parts: dict[str, list[np.ndarray]] = {c: [] for c in cols}
    for d, dr in enumerate(ev.datasets):
        dp, panel = dr.plan, dr.plan.panel
        offset = len(keys)
        keys.extend(panel.keys)
        origin_labels = panel.format_time(dp.ends - 1)
        for r in dr.results:
            n = dp.n_tasks
            parts["d"].append(np.full(n, d))
            parts["s"].append(dp.series + offset)
            parts["f"].append(np.full(n, names.index(r.spec.name)))
            parts["fold"].append(dp.fold)
            parts["origin"].append(origin_labels)
            for c in cols:
                metric_parts[c].append(r.scores[c].per_task)
    cat = {k: np.concatenate(v) if v else np.empty(0) for k, v in parts.items()}
    data = {
        "dataset": _dict_array(cat["d"], ds_names),
        "series": _dict_array(cat["s"], keys),
        "forecaster": _dict_array(cat["f"], names),
        "fold": pa.array(cat["fold"].astype(np.int32)),
        "origin": pa.array(np.asarray(cat["origin"], dtype=object).astype(str)),
    }
    for c in cols:
        data[c] = pa.array(np.concatenate(metric_parts[c]).astype(float))
    return pa.table(data)


def _forecasts_table(ev: Evaluation):
    import pyarrow as pa

    cfg = ev.plan.config
    h = cfg.horizon
    levels = cfg.intervals
    names = [s.name for s in ev.plan.forecasters]
    ds_names = [dr.plan.panel.name for dr in ev.datasets]
    keys: list[str] = []
    times: list[np.ndarray] = []
    time_offset = 0
    cols: dict[str, list[np.ndarray]] = {k: [] for k in ("d", "s", "f", "fold", "step", "t")}
    values: dict[str, list[np.ndarray]] = {"actual": [], "forecast": []}
    bounds = [interval_columns(lv) for lv in levels]
    for lo, hi in bounds:
        values[lo] = []
        values[hi] = []
    steps = np.arange(h)
    for d, dr in enumerate(ev.datasets):
        dp, panel = dr.plan, dr.plan.panel
        s_offset = len(keys)
        keys.extend(panel.keys)
        times.append(panel.format_time(np.arange(len(panel.values))))
        t_index = (dp.test_starts[:, None] + steps[None, :]).ravel() + time_offset
        time_offset += len(panel.values)
        for r in dr.results:
            n = dp.n_tasks
            cols["d"].append(np.full(n * h, d))
            cols["s"].append(np.repeat(dp.series + s_offset, h))
            cols["f"].append(np.full(n * h, names.index(r.spec.name)))
            cols["fold"].append(np.repeat(dp.fold, h))
            cols["step"].append(np.tile(steps + 1, n))
            cols["t"].append(t_index)
            values["actual"].append(dr.actual.ravel())
            values["forecast"].append(r.point.ravel())
            for i, (lo, hi) in enumerate(bounds):
                values[lo].append(r.lower[i].ravel())
                values[hi].append(r.upper[i].ravel())
    cat = {k: np.concatenate(v) for k, v in cols.items()}
    all_times = np.concatenate(times).astype(str).tolist()
    data = {
        "dataset": _dict_array(cat["d"], ds_names),
        "series": _dict_array(cat["s"], keys),
        "forecaster": _dict_array(cat["f"], names),
        "fold": pa.array(cat["fold"].astype(np.int32)),
        "step": pa.array(cat["step"].astype(np.int32)),
        "time": _dict_array(cat["t"], all_times),
    }
    for k, v in values.items():
        data[k] = pa.array(np.concatenate(v).astype(float))
    return pa.table(data)


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
            for t in np.flatnonzero(r.failed):
                rows.append({
                    "dataset": dp.panel.name, "series": dp.panel.keys[dp.series[t]],
                    "forecaster": r.spec.name, "fold": int(dp.fold[t]),
                    "reason": r.reason[t], "message": r.message[t],
                })
    return pd.DataFrame(rows, columns=["dataset", "series", "forecaster", "fold", "reason",
                                       "message"])


def _csv(frame: pd.DataFrame, path: Path) -> None:
    text = frame.to_csv(index=False, float_format="%.6g", lineterminator="\n")
    path.write_text(text, encoding="utf-8")


def write_results(
    ev: Evaluation,
    board: pd.DataFrame,
    out_dir: Path,
    *,
    finish: Callable[[Path], object] | None = None,
) -> dict[str, Any]:
    """Write every file of a run into ``out_dir`` at once; returns the manifest.

    ``finish`` is called with the temporary folder once every results file is in it and before
    it is swapped in (the pipeline builds the report there), so that it is part of the same
    all-or-nothing write.
    """
    import pyarrow.parquet as pq

    cfg = ev.plan.config
    cols = M.columns(cfg.metrics, tuple(cfg.intervals))
    out_dir = Path(out_dir)
    out_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out_dir.name}.", dir=out_dir.parent))
    os.chmod(tmp, 0o755)  # mkdtemp makes it private; a results folder is for everyone to read
    try:
        man = manifest(ev)
        (tmp / "leaderboard.csv").write_text(to_csv_text(board), encoding="utf-8")
        (tmp / "leaderboard.md").write_text(
            to_markdown(board, cfg.rank_by, cfg.metrics), encoding="utf-8"
        )
        (tmp / "manifest.json").write_text(
            json.dumps(man, indent=2, sort_keys=True) + "\n", encoding="utf-8"
        )
        pq.write_table(_scores_table(ev, cols), tmp / "scores.parquet")
        pq.write_table(_forecasts_table(ev), tmp / "forecasts.parquet")
        _csv(_horizon_frame(ev, cols), tmp / "horizon.csv")
        _csv(_failures_frame(ev), tmp / "failures.csv")
        old_history = out_dir / "history.jsonl"
        if old_history.exists():
            shutil.copy2(old_history, tmp / "history.jsonl")
        from runner.output.history import append_history

        append_history(tmp, man, board)
        if finish is not None:
            finish(tmp)
        _swap_in(tmp, out_dir)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return man


def _swap_in(tmp: Path, out_dir: Path) -> None:
    """Replace ``out_dir`` by ``tmp`` with renames, so readers never see a mix of two runs."""
    if out_dir.exists():
        old = out_dir.with_name(f".{out_dir.name}.old-{os.getpid()}")
        os.replace(out_dir, old)
        os.replace(tmp, out_dir)
        shutil.rmtree(old, ignore_errors=True)
    else:
        os.replace(tmp, out_dir)
