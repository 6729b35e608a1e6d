"""history.jsonl: one line appended per run, and reading it back.

Each line is a JSON object::

    {"time": "2025-03-01T09:30:00Z", "experiment": "shop-demand", "config_hash": "…",
     "data": {"shops": "<fingerprint>"}, "rank_by": "mase",
     "scores": {"shops": {"naive": 1.02, "arima-111": 0.81, "broken": null}}}

``scores`` holds each forecaster's mean rank metric (null when it has none, e.g. every task
failed).
"""

from __future__ import annotations

import json
import math
import os
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.errors import DataError
from runner.output.reader import HISTORY, ResultsFolder

if TYPE_CHECKING:
    import pandas as pd

#: Keys of a history line and the JSON types they must have.
_KEYS: dict[str, type | tuple[type, ...]] = {
    "time": str,
    "experiment": str,
    "config_hash": str,
    "data": dict,
    "rank_by": str,
    "scores": dict,
}


def history_entry(
    manifest: dict[str, Any], leaderboard: pd.DataFrame, now: datetime | None = None
) -> dict[str, Any]:
    """The history line of one run, from its manifest and leaderboard (numeric or as written)."""
    import pandas as pd

    rank_by = manifest["rank_by"]
    column = f"{rank_by}_mean"
    if column not in leaderboard.columns:
        raise DataError(f"leaderboard: column {column!r} (the rank metric) is missing")
    moment = (now or datetime.now(timezone.utc)).astimezone(timezone.utc)
    scores: dict[str, dict[str, float | None]] = {}
    values = pd.to_numeric(leaderboard[column], errors="coerce")
    for dataset, forecaster, value in zip(leaderboard["dataset"], leaderboard["forecaster"],
                                          values):
        v = float(value)
        scores.setdefault(str(dataset), {})[str(forecaster)] = v if math.isfinite(v) else None
    data = {}
    for name, info in manifest.get("data", {}).items():
        data[name] = info.get("fingerprint") if isinstance(info, dict) else info
    return {
        "time": moment.strftime("%Y-%m-%dT%H:%M:%SZ"),
        "experiment": manifest["experiment"],
        "config_hash": manifest["config_hash"],
        "data": data,
        "rank_by": rank_by,
        "scores": scores,
    }


def append_history(
    out_dir: Path, manifest: dict[str, Any], leaderboard: pd.DataFrame, *,
    now: datetime | None = None,
) -> None:
    """Append this run's line to ``out_dir/history.jsonl``.

    The line is written with one ``write`` on a file opened for appending, so a killed run
    leaves either the whole line or none of it.
    """
    entry = history_entry(manifest, leaderboard, now)
    line = json.dumps(entry, sort_keys=True, separators=(",", ":"), allow_nan=False) + "\n"
    path = Path(out_dir) / HISTORY
    path.parent.mkdir(parents=True, exist_ok=True)
    # A previous run killed mid-line would glue two records together; start on a fresh line.
    if path.is_file() and path.stat().st_size:
        with path.open("rb") as fh:
            fh.seek(-1, os.SEEK_END)
            if fh.read(1) != b"\n":
                line = "\n" + line
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        os.write(fd, line.encode("utf-8"))
        os.fsync(fd)
    finally:
        os.close(fd)


def parse_history(text: str, where: str) -> list[dict[str, Any]]:
    """Parse history.jsonl text; ``where`` names the file in errors (with the line number)."""
    entries = []
    for number, raw in enumerate(text.splitlines(), start=1):
        if not raw.strip():
            continue
        try:
            entry = json.loads(raw)
        except json.JSONDecodeError as exc:
            raise DataError(f"{where}: line {number}: not valid JSON ({exc.msg})") from None
        if not isinstance(entry, dict):
            raise DataError(f"{where}: line {number}: expected a JSON object")
        for key, typ in _KEYS.items():
            if key not in entry:
                raise DataError(f"{where}: line {number}: key {key!r} is missing")
            if not isinstance(entry[key], typ):
                raise DataError(
                    f"{where}: line {number}: {key}: expected {_type_name(typ)}, "
                    f"got {json.dumps(entry[key])[:40]}"
                )
        for dataset, scores in entry["scores"].items():
            if not isinstance(scores, dict):
                raise DataError(f"{where}: line {number}: scores.{dataset}: expected an object")
            for name, value in scores.items():
                if value is not None and (isinstance(value, bool)
                                          or not isinstance(value, (int, float))):
                    raise DataError(
                        f"{where}: line {number}: scores.{dataset}.{name}: expected a number "
                        f"or null, got {json.dumps(value)[:40]}"
                    )
        entries.append(entry)
    return entries


def _type_name(typ: type | tuple[type, ...]) -> str:
    return {"str": "text", "dict": "an object"}.get(getattr(typ, "__name__", ""), str(typ))


def read_history(folder: ResultsFolder) -> list[dict[str, Any]]:
    """Every run of the folder's history.jsonl, oldest first; DataError when missing or bad."""
    if not folder.exists(HISTORY):
        raise DataError(f"{folder.where(HISTORY)}: file not found (a run appends to it)")
    entries = parse_history(folder.read_text(HISTORY), folder.where(HISTORY))
    if not entries:
        raise DataError(f"{folder.where(HISTORY)}: no runs recorded (the file is empty)")
    return entries


def run_labels(entries: list[dict[str, Any]]) -> list[str]:
    """Short labels of runs: ``MM-DD HH:MM`` and the config hash's first 6 characters."""
    out = []
    for e in entries:
        when = e["time"]
        try:
            moment = datetime.fromisoformat(when.replace("Z", "+00:00"))
            short = moment.strftime("%m-%d %H:%M")
        except ValueError:
            short = when[:16]
        out.append(f"{short} {e['config_hash'][:6]}")
    return out
