"""``castgrid history``: each forecaster's rank metric run by run, one table per dataset.

The command shows, per dataset, one row per forecaster and one column per run, so a reader sees
how each score moved and, from the config and data labels, why. The file format is
:mod:`runner.output.history`.
"""

from __future__ import annotations

from typing import Any

from runner.output.history import run_labels
from runner.output.numbers import column_decimals, format_number, format_table


def history_table(entries: list[dict[str, Any]], dataset: str) -> tuple[list[str], list[list[Any]]]:
    """Forecasters (rows, ordered by the latest run's score) by run (columns) for ``dataset``."""
    names: list[str] = []
    for e in entries:
        for name in e["scores"].get(dataset, {}):
            if name not in names:
                names.append(name)
    latest = entries[-1]["scores"].get(dataset, {})

    def order(name: str) -> tuple[int, float, str]:
        v = latest.get(name)
        return (0, float(v), name) if v is not None else (1, 0.0, name)

    rows = []
    for name in sorted(names, key=order):
        rows.append([name] + [e["scores"].get(dataset, {}).get(name) for e in entries])
    return names, rows


def _data_label(entry: dict[str, Any], dataset: str) -> str:
    fp = entry["data"].get(dataset)
    return str(fp)[:6] if fp else "-"


def format_history(entries: list[dict[str, Any]], markdown: bool = False) -> str:
    """The history as one table per dataset (rows forecasters, columns runs)."""
    datasets: list[str] = []
    for e in entries:
        for d in e["scores"]:
            if d not in datasets:
                datasets.append(d)
    labels = run_labels(entries)
    rank_bys = sorted({e["rank_by"] for e in entries})
    lines = [f"experiment {entries[-1]['experiment']}: {len(entries)} run(s), rank metric "
             f"{' / '.join(rank_bys)}"]
    if len(rank_bys) > 1:
        lines.append("note: the rank metric changed between runs; compare columns with care")
    for dataset in datasets:
        _, rows = history_table(entries, dataset)
        header = ["forecaster"] + labels
        data_row = ["(data)"] + [_data_label(e, dataset) for e in entries]
        # one metric throughout the table: one number of decimals for every cell
        decimals = column_decimals(v for r in rows for v in r[1:])
        body = [[r[0]] + [format_number(v, decimals) for v in r[1:]] for r in rows]
        lines.append("")
        lines.append(f"### dataset {dataset}" if markdown else f"dataset {dataset}")
        lines.append(format_table(header, [data_row] + body, markdown=markdown))
    return "\n".join(lines)
