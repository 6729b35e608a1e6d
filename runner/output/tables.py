"""The leaderboard as people and programs read it: CSV, Markdown and the terminal table.

``leaderboard.csv`` keeps its byte-stable machine format (6 significant digits, empty cells for
missing values; the same config and data give the same bytes). The Markdown and terminal tables
use the one formatter of every human-readable output (:mod:`runner.output.numbers`): a fixed
number of decimals per column chosen from the column's scale, aligned columns, ``-`` for a
missing value. Every output names the relative score by its column name, ``<rank_by>_rel``.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from runner.output.numbers import column_decimals, format_column, format_table
from runner.scoring import metrics as M

#: Number format of leaderboard.csv (machine-readable, byte-stable).
FLOAT_FORMAT = ".6g"


def _csv_cell(v: object) -> str:
    if isinstance(v, (bool, np.bool_)):
        return "true" if v else "false"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        if np.isnan(v):
            return ""
        if float(v).is_integer() and abs(v) < 1e15:
            return str(int(v))
        return format(float(v), FLOAT_FORMAT)
    return str(v)


def to_csv_text(board: pd.DataFrame) -> str:
    """The leaderboard as CSV text with fixed formatting (the byte-identical guarantee)."""
    lines = [",".join(board.columns)]
    for row in board.itertuples(index=False):
        cells = []
        for v in row:
            s = _csv_cell(v)
            if any(ch in s for ch in ',"\n'):
                s = '"' + s.replace('"', '""') + '"'
            cells.append(s)
        lines.append(",".join(cells))
    return "\n".join(lines) + "\n"


def _yes(v: Any) -> str:
    return "yes" if bool(v) else ""


def _metric_header(column: str) -> str:
    return f"{column} {M.FLAG}" if M.flag_note(column) else column


def _mean_sd(block: pd.DataFrame, column: str) -> list[str]:
    """``mean ± sd`` cells of a metric column, both with the mean column's decimals."""
    means = block[f"{column}_mean"].tolist()
    decimals = column_decimals(means)
    shown = format_column(means, decimals)
    if f"{column}_sd" not in block.columns:
        return shown
    sds = format_column(block[f"{column}_sd"].tolist(), decimals)
    return [m if s == "-" else f"{m} ± {s}" for m, s in zip(shown, sds)]


def to_markdown(board: pd.DataFrame, rank_by: str, metrics: list[str]) -> str:
    """The leaderboard as Markdown tables (one per dataset) for reading and review comments."""
    metric_cols = [c[: -len("_mean")] for c in board.columns if c.endswith("_mean")]
    rel = f"{rank_by}_rel"
    out = []
    for dataset, block in board.groupby("dataset", sort=False):
        out.append(f"## {dataset}\n")
        head = ["rank", "forecaster", "role", "series", "folds", "failed", "complete"]
        header = head + [_metric_header(c) for c in metric_cols] + [rel, "beats reference"]
        columns = [block[h].tolist() for h in head[:-1]]
        columns.append(["true" if v else "false" for v in block["complete"]])
        columns += [_mean_sd(block, c) for c in metric_cols]
        columns.append(format_column(block[rel].tolist()))
        columns.append([_yes(v) for v in block["beats_reference"]])
        rows = [list(r) for r in zip(*columns)]
        out.append(format_table(header, rows, markdown=True))
        out.append("")
    notes = ["Scores are the mean ± standard deviation over folds of each fold's mean."]
    flagged = dict.fromkeys(m for m in metrics if m in M.UNRELIABLE)
    notes += [str(M.flag_note(m)) for m in flagged]
    failed = board[board["failed"] > 0]
    if len(failed):
        notes.append("A forecaster with failed tasks (complete: false) ranks below every "
                     f"complete one; its {rel} and significance are on the tasks both it and "
                     "the reference completed.")
    for _, r in failed.iterrows():
        notes.append(
            f"{r['forecaster']} on {r['dataset']}: {r['failed']} failed task(s); scored on "
            f"the {r['tasks']} that completed (see failures.csv)."
        )
    out.extend(notes)
    return "\n".join(out) + "\n"


def to_terminal(board: pd.DataFrame, rank_by: str) -> str:
    """A compact aligned table per dataset for the terminal.

    Metrics flagged as unreliable (:data:`runner.scoring.metrics.UNRELIABLE`) are marked as in
    leaderboard.md: the rank column when it is one, and a footnote for each flagged metric the
    board holds, so the flag is seen where people read the result.
    """
    lines = []
    rel = f"{rank_by}_rel"
    for dataset, block in board.groupby("dataset", sort=False):
        lines.append(f"{dataset}")
        header = ["rank", "forecaster", "role", _metric_header(rank_by), "± sd", rel, "beats",
                  "failed", "complete"]
        decimals = column_decimals(block[f"{rank_by}_mean"].tolist())
        means = format_column(block[f"{rank_by}_mean"].tolist(), decimals)
        rows = [
            [r["rank"], r["forecaster"], r["role"], m, sd, rv, _yes(r["beats_reference"]),
             r["failed"], "yes" if r["complete"] else "NO"]
            for (_, r), m, sd, rv in zip(
                block.iterrows(), means,
                format_column(block[f"{rank_by}_sd"].tolist(), decimals),
                format_column(block[rel].tolist()),
            )
        ]
        lines.append(format_table(header, rows, indent="  "))
    columns = [c.removesuffix("_mean") for c in board.columns if c.endswith("_mean")]
    flagged = dict.fromkeys(c.partition("_")[0] for c in columns if M.flag_note(c))
    lines.extend(str(M.flag_note(m)) for m in flagged)
    return "\n".join(lines)


def terminal_text(board: pd.DataFrame, rank_by: str, selection: pd.DataFrame | None) -> str:
    """What ``castgrid run`` prints on stdout: :func:`to_terminal`, then a line per selector
    of the run's selection (:func:`runner.scoring.derived.selection_lines`), each line ended."""
    from runner.scoring.derived import selection_lines

    return "".join(f"{text}\n" for text in [to_terminal(board, rank_by),
                                             *selection_lines(selection)])
