"""The report's HTML tables: readable at any width, numbers formatted by one formatter.

Every table sits in a box that scrolls sideways when the table is wider than the page (it is
never cut off), with its first column (the forecaster) fixed at the left edge while scrolling.
Numbers go through :mod:`runner.output.numbers`: one number of decimals per column chosen from
the column's scale, ``-`` for a missing value, signed percentages for skill, ``<0.001`` for
tiny p-values.

* :func:`leaderboard_html`: the columns that decide (rank metric, skill, significance);
* :func:`metrics_html`: every metric as mean ± sd over folds;
* :func:`segment_skill_html`: skill per segment and forecaster, shaded green to red;
* :func:`failures_html`: failed tasks counted by dataset, forecaster and reason.
"""

from __future__ import annotations

import html
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from runner.output.numbers import (
    MISSING,
    column_decimals,
    format_number,
    format_p,
    format_percent,
    is_missing,
)
from runner.report.reading import DatasetView, complete_flags, metric_columns, metric_flags
from runner.report.style import skill_shade
from runner.scoring.metrics import FLAG, flag_note

if TYPE_CHECKING:
    import pandas as pd

#: Marks a metric flagged as unreliable for comparing forecasts.
FLAG_MARK = FLAG


@dataclass
class Cell:
    """One table cell: its text, CSS classes, inline style and tooltip."""

    text: str
    classes: str = ""
    style: str = ""
    title: str = ""

    def html(self, tag: str = "td") -> str:
        """The cell as HTML; the text is escaped."""
        attrs = "".join(f' {k}="{html.escape(v)}"' for k, v in
                        (("class", self.classes), ("style", self.style), ("title", self.title))
                        if v)
        return f"<{tag}{attrs}>{html.escape(self.text)}</{tag}>"


def table_html(head: Sequence[Cell], rows: Sequence[Sequence[Cell]],
               row_classes: Sequence[str] | None = None, label: str = "table",
               table_class: str = "") -> str:
    """A table in a sideways-scrolling box; the first column sticks to the left edge.

    The box is focusable and labelled, so it can be scrolled with the keyboard.
    """
    def sticky(cell: Cell) -> Cell:
        return Cell(cell.text, (cell.classes + " sticky").strip(), cell.style, cell.title)

    head_html = "".join(sticky(c).html("th") if i == 0 else c.html("th")
                        for i, c in enumerate(head))
    body = []
    for r, row in enumerate(rows):
        cls = row_classes[r] if row_classes else ""
        cells = "".join(sticky(c).html() if i == 0 else c.html() for i, c in enumerate(row))
        body.append(f'<tr class="{html.escape(cls)}">{cells}</tr>' if cls else f"<tr>{cells}</tr>")
    table_attr = f' class="{html.escape(table_class)}"' if table_class else ""
    return (f'<div class="scroll" tabindex="0" role="region" aria-label="{html.escape(label)}">'
            f"<table{table_attr}><thead><tr>{head_html}</tr></thead>"
            f"<tbody>{''.join(body)}</tbody></table></div>")


# --------------------------------------------------------------------------- the leaderboard


def _flag(value: Any) -> str:
    return "yes" if value is True or (not is_missing(value) and bool(value)) else ""


def _numbers(values: Sequence[Any]) -> list[str]:
    d = column_decimals(values)
    return [format_number(v, d) for v in values]


def _skill(rel: Any) -> str:
    return MISSING if is_missing(rel) else format_percent((1.0 - float(rel)) * 100.0)


#: Leaderboard columns after forecaster, rank and role: (column, header, tooltip, formatter of
#: the whole column). ``{m}`` stands for the rank metric.
_BOARD_COLUMNS: tuple[tuple[str, str, str, Callable[[list[Any]], list[str]]], ...] = (
    ("{m}_mean", "{m}", "mean over folds of the fold's mean over series", _numbers),
    ("{m}_sd", "{m} sd", "standard deviation over folds", _numbers),
    ("{m}_rel", "{m} rel", "rank metric divided by the reference's", _numbers),
    ("{m}_rel", "skill", "1 - rel, in percent: positive beats the reference",
     lambda vs: [_skill(v) for v in vs]),
    ("win_share", "win share", "share of (series, fold) tasks won against the reference",
     _numbers),
    ("dm_better", "DM better", "series significantly better (Diebold-Mariano, 5%)", _numbers),
    ("dm_worse", "DM worse", "series significantly worse (Diebold-Mariano, 5%)", _numbers),
    ("wilcoxon_p", "Wilcoxon p", "signed-rank test over the series' mean loss differences",
     lambda vs: [format_p(v) for v in vs]),
    ("beats_reference", "beats ref.", "better on average, Wilcoxon p < 0.05, no failed task",
     lambda vs: [_flag(v) for v in vs]),
    ("failed", "failed", "failed tasks", _numbers),
)


def leaderboard_html(view: DatasetView) -> str:
    """The leaderboard's deciding columns, one row per forecaster in rank order."""
    board, m = view.board, view.rank_by
    head = [Cell("forecaster"), Cell("rank", "num"), Cell("role")]
    columns: list[list[str]] = [[str(v) for v in board["forecaster"]],
                                _numbers(board["rank"].tolist()),
                                [str(v) for v in board["role"]]]
    key = f"{m}_mean"
    for col, header, tip, fmt in _BOARD_COLUMNS:
        name = col.format(m=m)
        if name not in board.columns:
            continue
        head.append(Cell(header.format(m=m), "num key" if name == key and header == "{m}"
                         else "num", title=tip))
        columns.append(fmt(board[name].tolist()))
    complete = complete_flags(board)
    if complete is not None:
        head.append(Cell("complete", title="no failed task"))
        columns.append(["yes" if c else "no" for c in complete])
    keys = [i for i, h in enumerate(head) if "key" in h.classes]
    rows, classes = [], []
    for r in range(len(board)):
        row = [Cell(columns[c][r], _cell_class(head[c], c in keys)) for c in range(len(head))]
        rows.append(row)
        cls = [str(board["role"].iloc[r])]
        if board["forecaster"].iloc[r] == view.reference:
            cls.append("ref")
        if "beats_reference" in board.columns and _flag(board["beats_reference"].iloc[r]):
            cls.append("beats")
        if complete is not None and not complete.iloc[r]:
            cls.append("incomplete")
        classes.append(" ".join(cls))
    return table_html(head, rows, classes, label=f"leaderboard of {view.dataset}",
                      table_class="board")


def _cell_class(head: Cell, key: bool) -> str:
    cls = "num" if "num" in head.classes else ""
    return f"{cls} key".strip() if key else cls


def metrics_html(view: DatasetView) -> str:
    """Every metric of the leaderboard as ``mean ± sd`` over folds, one row per forecaster.

    A metric flagged as unreliable for comparing forecasts carries a dagger in its header and
    its reason in the tooltip and the note below the table.
    """
    board = view.board
    metrics = metric_columns(board)
    flags = metric_flags(metrics)
    head = [Cell("forecaster")]
    columns: list[list[str]] = [[str(v) for v in board["forecaster"]]]
    for metric in metrics:
        means = board[f"{metric}_mean"].tolist()
        sds = board[f"{metric}_sd"].tolist() if f"{metric}_sd" in board.columns else []
        d = column_decimals(means)
        cells = []
        for i, mean in enumerate(means):
            text = format_number(mean, d)
            if sds and not is_missing(mean) and not is_missing(sds[i]):
                text += f" \u00b1 {format_number(sds[i], d)}"
            cells.append(text)
        mark = f" {FLAG_MARK}" if metric in flags else ""
        cls = "num key" if metric == view.rank_by else "num"
        head.append(Cell(metric + mark, cls, title=flag_note(metric) or ""))
        columns.append(cells)
    rows = [[Cell(columns[c][r], head[c].classes if c else "") for c in range(len(head))]
            for r in range(len(board))]
    classes = [str(role) + (" ref" if name == view.reference else "")
               for name, role in zip(board["forecaster"], board["role"])]
    out = table_html(head, rows, classes, label=f"every metric of {view.dataset}")
    for metric in flags:
        # the same footnote as the terminal table and leaderboard.md
        out += f'<p class="note flag">{html.escape(flag_note(metric) or "")}</p>'
    return out


# --------------------------------------------------------------------------- segments


def segment_skill_html(frame: pd.DataFrame, reference: str | None = None,
                       label: str = "skill per segment") -> str:
    """Skill per segment and forecaster: rows forecasters, columns segments, values in percent.

    ``frame`` is indexed by forecaster, one column per segment, each value a skill in percent
    points (NaN: no score). Cells are shaded green for a gain over the reference and red for a
    loss, deeper with size (full at ±50%), so the table reads at a glance; the reference's row,
    if given, is set in italics.
    """
    head = [Cell("forecaster")] + [Cell(str(c), "num") for c in frame.columns]
    rows, classes = [], []
    for name, values in frame.iterrows():
        row = [Cell(str(name))]
        for v in values.tolist():
            missing = is_missing(v)
            row.append(Cell(format_percent(v), "shade",
                            "" if missing else skill_shade(float(v)),
                            "" if missing else f"{float(v):.6g}%"))
        rows.append(row)
        classes.append("ref" if reference is not None and str(name) == reference else "")
    return table_html(head, rows, classes, label=label, table_class="segments")


# --------------------------------------------------------------------------- failures


def failures_html(failures: pd.DataFrame | None) -> str:
    """Failed tasks counted by dataset, forecaster and reason ('' when none failed)."""
    if failures is None or failures.empty:
        return ""
    counts = (failures.groupby(["dataset", "forecaster", "reason"]).size()
              .reset_index(name="tasks"))
    head = [Cell("dataset"), Cell("forecaster"), Cell("reason"), Cell("tasks", "num")]
    rows = [[Cell(str(r.dataset)), Cell(str(r.forecaster)), Cell(str(r.reason)),
             Cell(format_number(int(r.tasks), 0), "num")] for r in counts.itertuples()]
    return ('<h2>Failed tasks</h2><div class="card">'
            + table_html(head, rows, label="failed tasks")
            + '<p class="note">Every failed task, with its message, is in failures.csv.</p>'
            "</div>")
