"""``castgrid report RESULTS``: one self-contained HTML page and PNG plots of a results folder.

:func:`build_report` reads the folder's files and writes ``report.html`` (every plot embedded as
a base64 PNG, so the page can be mailed or attached alone) and ``plots/<dataset>-<kind>.png``.
Per dataset it draws:

* ``horizon``: the rank metric by forecast step per forecaster (horizon.csv);
* ``folds``: the rank metric of each fold against its origin time (scores.parquet; a fold's
  score is the mean over series, as in the leaderboard);
* ``forecasts``: forecasts against actuals for the best and the worst series of the best
  candidate (the best forecaster when there are no candidates), with the reference's forecast
  and the first interval level for comparison (forecasts.parquet);
* ``skill``: skill against the reference, ``1 - rel`` (leaderboard.csv);
* ``history``: the rank metric run by run (history.jsonl).

Only leaderboard.csv and manifest.json are required: a plot whose source file is absent is
replaced by a note saying which file is missing. A damaged file is an error.
"""

from __future__ import annotations

import base64
import html
import math
import os
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.output.reader import (
    FAILURES,
    FORECASTS,
    HISTORY,
    HORIZON,
    INTERVAL_LOW,
    SCORES,
    ResultsFolder,
    interval_columns,
    read_leaderboard,
    read_manifest,
    read_table,
)
from runner.scoring.metrics import FLAG, flag_note

if TYPE_CHECKING:
    import pandas as pd
    from matplotlib.figure import Figure

REPORT = "report.html"
PLOTS = "plots"
#: Plots with a line per forecaster show the reference and at most this many others.
MAX_LINES = 8
#: Figure width in inches: at savefig.dpi it matches the page's plot width, so text is not scaled.
FIG_WIDTH = 9.2
#: The skill plot shows at most this many forecasters (best first).
MAX_BOXES = 16

_CANDIDATE_COLORS = ["#1f77b4", "#d62728", "#2ca02c", "#9467bd", "#ff7f0e", "#17becf",
                     "#8c564b", "#e377c2", "#bcbd22", "#7f7f7f"]
_BASELINE_COLORS = ["#6b6b6b", "#9a9a9a", "#4a4a4a", "#b5b5b5", "#808080", "#5c5c5c"]
_REFERENCE_COLOR = "#111111"
_STYLE = {
    "font.size": 9,
    "axes.titlesize": 10,
    "axes.titleweight": "bold",
    "axes.labelsize": 9,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "grid.color": "#e6e6e6",
    "grid.linewidth": 0.8,
    "axes.edgecolor": "#999999",
    "xtick.color": "#444444",
    "ytick.color": "#444444",
    "legend.frameon": False,
    "legend.fontsize": 8,
    "savefig.dpi": 110,
}


@dataclass
class Plot:
    """One plot of the page: its file name, title, caption, and PNG bytes (None: not drawn)."""

    file: str
    title: str
    caption: str
    png: bytes | None = None
    missing: str = ""


@dataclass
class _Context:
    """What the plots of one dataset need."""

    dataset: str
    rank_by: str
    board: pd.DataFrame  # this dataset's leaderboard rows, in rank order
    reference: str | None
    styles: dict[str, dict[str, Any]]


# --------------------------------------------------------------------------- reading


def _optional(folder: ResultsFolder, name: str, required: tuple[str, ...]) -> pd.DataFrame | None:
    if not folder.exists(name):
        return None
    return read_table(folder, name, required)


def _history(folder: ResultsFolder) -> list[dict[str, Any]] | None:
    from runner.output.history import parse_history

    if not folder.exists(HISTORY):
        return None
    return parse_history(folder.read_text(HISTORY), folder.where(HISTORY))


def _styles(board: pd.DataFrame, reference: str | None) -> dict[str, dict[str, Any]]:
    """A fixed colour and line style per forecaster: candidates in colour, baselines in grey."""
    out: dict[str, dict[str, Any]] = {}
    cand = base = 0
    for name, role in zip(board["forecaster"], board["role"]):
        if name in out:
            continue
        if name == reference:
            out[name] = {"color": _REFERENCE_COLOR, "linestyle": "--", "linewidth": 1.6}
        elif role == "candidate":
            out[name] = {"color": _CANDIDATE_COLORS[cand % len(_CANDIDATE_COLORS)],
                         "linestyle": "-", "linewidth": 1.8}
            cand += 1
        else:
            out[name] = {"color": _BASELINE_COLORS[base % len(_BASELINE_COLORS)],
                         "linestyle": ":", "linewidth": 1.3}
            base += 1
    return out


def _shown(ctx: _Context) -> list[str]:
    """The reference and the best MAX_LINES other forecasters, in rank order."""
    names = [n for n in ctx.board["forecaster"] if n != ctx.reference][:MAX_LINES]
    if ctx.reference is not None and ctx.reference in set(ctx.board["forecaster"]):
        names.append(ctx.reference)
    return names


def _best_forecaster(ctx: _Context) -> str | None:
    col = f"{ctx.rank_by}_mean"
    scored = ctx.board[ctx.board[col].notna()]
    cands = scored[scored["role"] == "candidate"]
    pick = cands if len(cands) else scored
    return None if pick.empty else str(pick.iloc[0]["forecaster"])


# --------------------------------------------------------------------------- plots


def _new_figure(width: float, height: float) -> Figure:
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), layout="constrained")


def _png(fig: Figure) -> bytes:
    import io

    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    return buf.getvalue()


def _legend_outside(ax: Any) -> None:
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)


def plot_horizon(ctx: _Context, horizon: pd.DataFrame) -> bytes | None:
    """The rank metric by forecast step, one line per forecaster."""
    part = horizon[horizon["dataset"] == ctx.dataset]
    if ctx.rank_by not in part.columns or part.empty:
        return None
    fig = _new_figure(FIG_WIDTH, 3.6)
    ax = fig.add_subplot()
    for name in _shown(ctx):
        rows = part[part["forecaster"] == name].sort_values("step")
        if rows.empty:
            continue
        ax.plot(rows["step"], rows[ctx.rank_by], marker="o", markersize=3, label=name,
                **ctx.styles.get(name, {}))
    ax.set_xlabel("forecast step")
    ax.set_ylabel(ctx.rank_by)
    ax.set_title(f"{ctx.rank_by} by forecast step")
    ax.xaxis.get_major_locator().set_params(integer=True)
    _legend_outside(ax)
    return _png(fig)


def plot_folds(ctx: _Context, scores: pd.DataFrame) -> bytes | None:
    """The rank metric of each fold (mean over series) against its origin time.

    One point per origin and forecaster: the same fold means the leaderboard's mean and
    standard deviation are taken over, so a bad period shows as a dip shared by every line.
    """
    import pandas as pd

    part = scores[scores["dataset"] == ctx.dataset]
    if ctx.rank_by not in part.columns or part.empty:
        return None
    key = _fold_key(part)
    per_fold = part.groupby(["forecaster", key], observed=True)[ctx.rank_by].mean().dropna()
    if per_fold.empty:
        return None
    fig = _new_figure(FIG_WIDTH, 3.6)
    ax = fig.add_subplot()
    drawn = 0
    for name in _shown(ctx):
        if name not in per_fold.index.get_level_values(0):
            continue
        mine = per_fold.loc[name]
        x = _time_axis(pd.Series(mine.index)) if key == "origin" else pd.Series(mine.index)
        order = x.argsort(kind="stable").to_numpy()
        ax.plot(x.to_numpy()[order], mine.to_numpy()[order], marker="o", markersize=3.5,
                label=name, **ctx.styles.get(name, {}))
        drawn += 1
    if not drawn:
        return None
    ax.set_xlabel("origin (time of the last training observation)" if key == "origin"
                  else "fold")
    ax.set_ylabel(f"{ctx.rank_by} (mean over series)")
    ax.set_title(f"{ctx.rank_by} fold by fold")
    if key == "origin":
        for label in ax.get_xticklabels():
            label.set_rotation(30)
            label.set_horizontalalignment("right")
    _legend_outside(ax)
    return _png(fig)


def _fold_key(frame: pd.DataFrame) -> str:
    """Folds are named by their origin time; results written before it existed have ``fold``."""
    return "origin" if "origin" in frame.columns else "fold"


def _time_axis(values: pd.Series) -> pd.Series:
    """Times as written (str) turned into something orderable: dates, numbers, or text."""
    import pandas as pd

    text = values.astype(str)
    try:
        return pd.to_datetime(text, format="ISO8601")
    except (ValueError, TypeError):
        pass
    numbers = pd.to_numeric(text, errors="coerce")
    if numbers.notna().all():
        return numbers
    return text


def series_extremes(ctx: _Context, scores: pd.DataFrame, forecaster: str) -> list[str]:
    """The best and the worst series of ``forecaster`` by mean rank metric over its folds."""
    part = scores[(scores["dataset"] == ctx.dataset) & (scores["forecaster"] == forecaster)]
    means = part.groupby("series")[ctx.rank_by].mean().dropna()
    if means.empty:
        return []
    order = means.sort_values(kind="stable")
    best, worst = str(order.index[0]), str(order.index[-1])
    return [best] if best == worst else [best, worst]


def plot_forecasts(ctx: _Context, forecasts: pd.DataFrame, scores: pd.DataFrame | None
                   ) -> tuple[bytes | None, str]:
    """Forecasts against actuals on the best and worst series of the best candidate."""
    best = _best_forecaster(ctx)
    if best is None:
        return None, "no forecaster has a score"
    part = forecasts[forecasts["dataset"] == ctx.dataset]
    if scores is not None:
        picks = series_extremes(ctx, scores, best)
    else:
        picks = list(dict.fromkeys(part.loc[part["forecaster"] == best, "series"].astype(str)))
        picks = picks[:1]
    if not picks:
        return None, f"{best} has no scored series"
    labels = ["best series", "worst series"]
    fig = _new_figure(FIG_WIDTH, 2.9 * len(picks))
    axes = fig.subplots(len(picks), 1, squeeze=False)[:, 0]
    levels = sorted({m.group(1) for c in part.columns if (m := INTERVAL_LOW.match(c))}, key=float)
    for ax, series, label in zip(axes, picks, labels):
        rows = part[part["series"].astype(str) == series].copy()
        rows["_t"] = _time_axis(rows["time"])
        actual = rows.drop_duplicates("_t").sort_values("_t")
        ax.plot(actual["_t"], actual["actual"], color="#111111", linewidth=1.4, marker="o",
                markersize=2.5, label="actual")
        mine = rows[rows["forecaster"] == best]
        color = ctx.styles.get(best, {}).get("color", "#1f77b4")
        for i, (_, block) in enumerate(mine.groupby(_fold_key(mine), observed=True)):
            block = block.sort_values("_t")
            if levels:
                lo, hi = interval_columns(levels[0])
                if block[lo].notna().any():
                    ax.fill_between(block["_t"], block[lo], block[hi], color=color, alpha=0.15,
                                    linewidth=0, label=f"{levels[0]}% interval" if i == 0 else None)
            ax.plot(block["_t"], block["forecast"], color=color, linewidth=1.6,
                    label=best if i == 0 else None)
        if ctx.reference and ctx.reference != best:
            ref = rows[rows["forecaster"] == ctx.reference]
            for i, (_, block) in enumerate(ref.groupby(_fold_key(ref), observed=True)):
                block = block.sort_values("_t")
                ax.plot(block["_t"], block["forecast"], color="#777777", linewidth=1.0,
                        linestyle="--", label=ctx.reference if i == 0 else None)
        ax.set_title(f"{label}: {series}", loc="left")
        ax.set_ylabel("value")
        _legend_outside(ax)
    return _png(fig), f"forecaster {best}; one line per fold's forecast block"


def plot_skill(ctx: _Context) -> bytes | None:
    """Horizontal bars of skill against the reference, 1 - rel; significant wins marked."""
    import numpy as np

    rel_col = f"{ctx.rank_by}_rel"
    if rel_col not in ctx.board.columns:
        return None
    rows = ctx.board[(ctx.board["forecaster"] != ctx.reference) & ctx.board[rel_col].notna()]
    if rows.empty:
        return None
    skill = 1.0 - rows[rel_col].to_numpy(dtype=float)
    order = np.argsort(-skill, kind="stable")[:MAX_BOXES]
    names = [str(rows["forecaster"].iloc[i]) for i in order]
    values = skill[order]
    beats = (rows["beats_reference"].to_numpy()[order] if "beats_reference" in rows.columns
             else np.zeros(len(order), dtype=bool))
    fig = _new_figure(FIG_WIDTH, 0.9 + 0.32 * len(names))
    ax = fig.add_subplot()
    pos = np.arange(len(names))[::-1]
    colors = ["#2e8b57" if v > 0 else "#c0392b" for v in values]
    ax.barh(pos, values * 100.0, color=colors, height=0.6, alpha=0.85)
    ax.axvline(0, color="#333333", linewidth=0.9)
    span = max(float(np.max(np.abs(values))) * 100.0, 1.0)
    for p, v, b in zip(pos, values, beats):
        text = f"{v * 100:+.1f}%" + ("  significant" if b else "")
        ax.text(v * 100.0 + (0.02 * span if v >= 0 else -0.02 * span), p, text, va="center",
                ha="left" if v >= 0 else "right", fontsize=8,
                fontweight="bold" if b else "normal")
    ax.set_xlim(-span * 1.45, span * 1.45)
    ax.set_yticks(pos, names)
    ax.set_xlabel(f"skill = 1 - {ctx.rank_by} / {ctx.rank_by} of {ctx.reference} (percent)")
    ax.set_title(f"skill against the reference ({ctx.reference})")
    ax.grid(axis="y", visible=False)
    return _png(fig)


def plot_history(ctx: _Context, entries: list[dict[str, Any]]) -> bytes | None:
    """The rank metric of each forecaster run by run."""
    from runner.output.history import run_labels

    runs = [e for e in entries if ctx.dataset in e["scores"] and e["rank_by"] == ctx.rank_by]
    if not runs:
        return None
    labels = run_labels(runs)
    x = list(range(len(runs)))
    fig = _new_figure(FIG_WIDTH, 3.4)
    ax = fig.add_subplot()
    for name in _shown(ctx):
        ys = [e["scores"][ctx.dataset].get(name) for e in runs]
        ys = [math.nan if v is None else float(v) for v in ys]
        if all(math.isnan(v) for v in ys):
            continue
        ax.plot(x, ys, marker="o", markersize=4, label=name, **ctx.styles.get(name, {}))
    step = max(1, len(x) // 10)
    ax.set_xticks(x[::step], labels[::step], rotation=30, ha="right")
    ax.set_xlim(-0.5, len(x) - 0.5)
    ax.set_xlabel("run (UTC time and config hash)")
    ax.set_ylabel(ctx.rank_by)
    ax.set_title(f"{ctx.rank_by} run by run ({len(runs)} run{'s' if len(runs) != 1 else ''})")
    _legend_outside(ax)
    return _png(fig)


# --------------------------------------------------------------------------- the page


def _fmt(v: Any, digits: int = 4) -> str:
    if v is None:
        return ""
    if isinstance(v, bool):
        return "yes" if v else ""
    if isinstance(v, float):
        if math.isnan(v):
            return ""
        if v.is_integer() and abs(v) < 1e6:
            return str(int(v))
        return format(v, f".{digits}g")
    return str(v)


def _cell(rec: dict[str, Any], column: str) -> str:
    if column == "complete" and rec.get(column) is not None:
        return "yes" if bool(rec[column]) else "no"
    return _fmt(rec.get(column))


def _flag_mark(column: str) -> str:
    """The unreliable-metric mark after a metric column's heading (as in leaderboard.md)."""
    if column.endswith(("_mean", "_sd", "_rel")) and flag_note(column):
        return f" {FLAG}"
    return ""


def _flag_title(column: str) -> str:
    note = flag_note(column) if column.endswith(("_mean", "_sd", "_rel")) else None
    return f' title="{html.escape(note)}"' if note else ""


def _board_html(ctx: _Context) -> str:
    m = ctx.rank_by
    # the rank metric and its significance first, so the columns that decide are in view
    others = [c for c in ctx.board.columns if c.endswith("_mean") and c != f"{m}_mean"]
    cols = (["rank", "forecaster", "role"]
            + [c for c in (f"{m}_mean", f"{m}_sd", f"{m}_rel", "win_share", "dm_better",
                           "dm_worse", "wilcoxon_p", "beats_reference", "failed", "complete")
               if c in ctx.board.columns]
            + others)
    heads = {f"{m}_mean": m, f"{m}_sd": f"{m} sd", f"{m}_rel": f"{m} rel",
             "beats_reference": "beats ref.",
             "win_share": "win share", "dm_better": "DM better", "dm_worse": "DM worse",
             "wilcoxon_p": "Wilcoxon p"}
    head = "".join(
        f'<th class="{"key" if c == f"{m}_mean" else ""}"{_flag_title(c)}>'
        f"{html.escape(heads.get(c, c.removesuffix('_mean')))}{_flag_mark(c)}</th>"
        for c in cols
    )
    body = []
    for rec in ctx.board.to_dict("records"):
        classes = [str(rec["role"])]
        if rec["forecaster"] == ctx.reference:
            classes.append("ref")
        if rec.get("beats_reference") is True:
            classes.append("beats")
        if "complete" in rec and not bool(rec["complete"]):
            classes.append("incomplete")
        cells = "".join(
            f'<td class="{"num" if c not in ("forecaster", "role") else ""}'
            f'{" key" if c == f"{m}_mean" else ""}">{html.escape(_cell(rec, c))}</td>'
            for c in cols
        )
        body.append(f'<tr class="{" ".join(classes)}">{cells}</tr>')
    return (f'<div class="scroll"><table class="board"><thead><tr>{head}</tr></thead>'
            f"<tbody>{''.join(body)}</tbody></table></div>")


def _summary_html(ctx: _Context) -> str:
    best = _best_forecaster(ctx)
    if best is None:
        return "<p>No forecaster has a score on this dataset.</p>"
    row = ctx.board[ctx.board["forecaster"] == best].iloc[0]
    m = ctx.rank_by
    parts = [f"Best {'candidate' if row['role'] == 'candidate' else 'forecaster'}: "
             f"<b>{html.escape(best)}</b>, {html.escape(m)} {_fmt(float(row[f'{m}_mean']))}"]
    rel = row.get(f"{m}_rel")
    if ctx.reference and best != ctx.reference and rel is not None and math.isfinite(rel):
        parts.append(f"skill {(1 - rel) * 100:+.1f}% against {html.escape(ctx.reference)}")
        beats = bool(row.get("beats_reference", False))
        failed = row.get("failed")
        if beats:
            parts.append("a significant win (Wilcoxon, 5%)")
        elif failed is not None and math.isfinite(failed) and failed > 0:
            parts.append(f"not marked as beating the reference: {_fmt(float(failed))} failed "
                         "task(s)")
        else:
            parts.append("not shown to beat the reference")
    if "complete" in row and not bool(row["complete"]):
        parts.append("incomplete (failed tasks): ranked after every complete forecaster, "
                     "compared with the reference on the tasks both completed")
    return "<p class=\"summary\">" + "; ".join(parts) + ".</p>"


def _plot_html(plot: Plot) -> str:
    if plot.png is None:
        return (f'<figure class="plot missing"><figcaption><b>{html.escape(plot.title)}</b>: '
                f"not drawn: {html.escape(plot.missing)}</figcaption></figure>")
    data = base64.b64encode(plot.png).decode("ascii")
    src = f"{PLOTS}/{plot.file}"
    return (
        f'<figure class="plot"><img src="data:image/png;base64,{data}" '
        f'alt="{html.escape(plot.title)}" data-file="{html.escape(src)}">'
        f"<figcaption><b>{html.escape(plot.title)}</b>. {html.escape(plot.caption)} "
        f'<a href="{html.escape(src)}">PNG</a></figcaption></figure>'
    )


_CSS = """
body{font-family:-apple-system,"Segoe UI",Roboto,"Helvetica Neue",Arial,sans-serif;
 color:#1d1d1f;background:#f6f7f9;margin:0;line-height:1.45}
main{max-width:1080px;margin:0 auto;padding:24px 28px 48px}
h1{font-size:24px;margin:0 0 4px}h2{font-size:19px;margin:36px 0 6px;
 border-bottom:2px solid #d9dde3;padding-bottom:4px}
.meta{color:#555;font-size:13px}.meta code{background:#eceff3;padding:1px 5px;border-radius:3px}
.card{background:#fff;border:1px solid #e1e4e8;border-radius:8px;padding:14px 18px;margin:14px 0}
.summary{font-size:14px}.scroll{overflow-x:auto}
table{border-collapse:collapse;font-size:12.5px;width:100%}
th,td{padding:5px 8px;border-bottom:1px solid #e7e9ec;text-align:left;white-space:nowrap}
th{background:#f0f2f5;font-weight:600}td.num{text-align:right;font-variant-numeric:tabular-nums}
th.key,td.key{background:#eef4fb;font-weight:600}
tr.baseline td{color:#555}tr.ref td{font-style:italic}tr.beats td.key{color:#1b7f43}
tr.incomplete td{color:#a33}
.grid{display:grid;grid-template-columns:1fr;gap:14px}
figure.plot{background:#fff;border:1px solid #e1e4e8;border-radius:8px;margin:0;padding:10px}
figure.plot img{width:100%;height:auto;display:block}
figcaption{font-size:12.5px;color:#444;margin-top:6px}figure.missing{color:#777}
.note{font-size:12.5px;color:#555}
"""


def _page(manifest: dict[str, Any], sections: list[str], failures_html: str) -> str:
    tasks = manifest.get("tasks") or {}
    config = manifest.get("config") or {}
    desc = config.get("description") if isinstance(config, dict) else None
    task_text = ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in tasks.items())
    versions = manifest.get("versions") or {}
    version_text = ", ".join(f"{k} {v}" for k, v in versions.items())
    title = f"castgrid report: {manifest['experiment']}"
    metrics = manifest.get("metrics") or []
    flags = [n for n in (flag_note(str(m)) for m in metrics) if n]
    rank_mark = f" {FLAG}" if flag_note(str(manifest["rank_by"])) else ""
    head = [
        f"<h1>{html.escape(title)}</h1>",
        f'<p class="meta">{html.escape(desc)}</p>' if desc else "",
        '<p class="meta">config <code>'
        f"{html.escape(str(manifest['config_hash'])[:12])}</code> &middot; rank metric "
        f"<code>{html.escape(manifest['rank_by'])}</code>{rank_mark}"
        + (f" &middot; tasks: {html.escape(task_text)}" if task_text else "") + "</p>",
        f'<p class="meta">{html.escape(version_text)}</p>' if version_text else "",
        '<p class="note">Lower is better for error metrics. <i>rel</i> is the rank metric '
        "divided by the reference baseline's; skill = 1 - rel. <i>win share</i>: share of "
        "(series, fold) tasks won against the reference; <i>DM better/worse</i>: series where "
        "the Diebold-Mariano test (Harvey-Leybourne-Newbold correction) finds a significant "
        "difference at 5%; <i>Wilcoxon p</i>: signed-rank test over the series' mean loss "
        "differences; <i>beats ref.</i>: better on average, Wilcoxon p &lt; 0.05 and no "
        "failed tasks. A forecaster with failed tasks (<i>complete</i>: no) ranks below every "
        "complete one; its rel and significance are on the tasks both it and the reference "
        "completed.</p>",
        *(f'<p class="note flag">{html.escape(note)}</p>' for note in flags),
    ]
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{html.escape(title)}</title><style>{_CSS}</style></head><body><main>"
        + "".join(head) + "".join(sections) + failures_html + "</main></body></html>\n"
    )


def _failures_html(failures: pd.DataFrame | None) -> str:
    if failures is None or failures.empty:
        return ""
    counts = (failures.groupby(["dataset", "forecaster", "reason"]).size()
              .reset_index(name="tasks"))
    rows = "".join(
        f"<tr><td>{html.escape(str(r.dataset))}</td><td>{html.escape(str(r.forecaster))}</td>"
        f'<td>{html.escape(str(r.reason))}</td><td class="num">{r.tasks}</td></tr>'
        for r in counts.itertuples()
    )
    return ('<h2>Failed tasks</h2><div class="card"><table><thead><tr><th>dataset</th>'
            "<th>forecaster</th><th>reason</th><th>tasks</th></tr></thead>"
            f"<tbody>{rows}</tbody></table><p class=\"note\">Every failed task, with its "
            "message, is in failures.csv.</p></div>")


def _atomic_write(path: Path, data: bytes) -> None:
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
        os.chmod(tmp, 0o644)  # mkstemp makes the file private; a report is meant to be shared
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def build_report(out_dir: Path) -> Path:
    """Write ``report.html`` and ``plots/*.png`` for the results folder ``out_dir``.

    Returns the path of report.html. Raises DataError when leaderboard.csv or manifest.json
    is missing or any file present is damaged; nothing is written in that case.
    """
    from matplotlib import rc_context

    out_dir = Path(out_dir)
    folder = ResultsFolder.open(out_dir)
    manifest = read_manifest(folder)
    rank_by = manifest["rank_by"]
    board = read_leaderboard(folder, rank_by)
    base = ("dataset", "forecaster")
    horizon = _optional(folder, HORIZON, base + ("step",))
    scores = _optional(folder, SCORES, base + ("series", "fold"))
    forecasts = _optional(folder, FORECASTS, base + ("series", "fold", "step", "time", "actual",
                                                     "forecast"))
    failures = _optional(folder, FAILURES, base + ("reason",))
    history = _history(folder)
    references = manifest.get("reference") or {}

    sections: list[str] = []
    plots: list[Plot] = []
    with rc_context(_STYLE):
        for dataset in dict.fromkeys(board["dataset"]):
            part = board[board["dataset"] == dataset].reset_index(drop=True)
            ref = references.get(dataset)
            ctx = _Context(dataset, rank_by, part, ref, _styles(part, ref))
            mine = _dataset_plots(ctx, horizon, scores, forecasts, history)
            plots.extend(mine)
            sections.append(
                f"<h2>dataset {html.escape(dataset)}</h2>"
                f'<div class="card">{_summary_html(ctx)}{_board_html(ctx)}</div>'
                f'<div class="grid">{"".join(_plot_html(p) for p in mine)}</div>'
            )
    page = _page(manifest, sections, _failures_html(failures))

    plot_dir = out_dir / PLOTS
    plot_dir.mkdir(exist_ok=True)
    written = set()
    for p in plots:
        if p.png is not None:
            _atomic_write(plot_dir / p.file, p.png)
            written.add(p.file)
    for stale in plot_dir.glob("*.png"):  # plots of datasets or runs no longer in the folder
        if stale.name not in written:
            stale.unlink()
    target = out_dir / REPORT
    _atomic_write(target, page.encode("utf-8"))
    return target


def _dataset_plots(ctx: _Context, horizon: pd.DataFrame | None, scores: pd.DataFrame | None,
                   forecasts: pd.DataFrame | None, history: list[dict[str, Any]] | None
                   ) -> list[Plot]:
    d, m = ctx.dataset, ctx.rank_by
    shown = (f"The reference and the {MAX_LINES} best others are shown."
             if len(ctx.board) > MAX_LINES + 1 else "")
    out = []
    p = Plot(f"{d}-horizon.png", f"{m} by forecast step",
             f"{m} pooled over every series and fold at each step. {shown}".strip())
    if horizon is None:
        p.missing = f"{HORIZON} is not in the results folder"
    else:
        p.png = plot_horizon(ctx, horizon)
        p.missing = f"no {m} column for this dataset in {HORIZON}"
    out.append(p)

    p = Plot(f"{d}-folds.png", f"{m} fold by fold",
             "Each point is one fold, named by its origin (the time of the last training "
             "observation): the forecasts made there, scored and averaged over the series that "
             f"have that origin. The leaderboard's mean and sd of {m} are over these points. "
             f"{shown}".strip())
    if scores is None:
        p.missing = f"{SCORES} is not in the results folder"
    else:
        p.png = plot_folds(ctx, scores)
        p.missing = f"no {m} scores for this dataset in {SCORES}"
    out.append(p)

    p = Plot(f"{d}-forecasts.png", "forecasts against actuals", "")
    if forecasts is None:
        p.missing = f"{FORECASTS} is not in the results folder"
    else:
        p.png, note = plot_forecasts(ctx, forecasts, scores)
        p.caption = (f"Best and worst series (by mean {m}) of the best candidate: {note}. "
                     "The dashed grey line is the reference's forecast.")
        p.missing = note
    out.append(p)

    p = Plot(f"{d}-skill.png", "skill against the reference",
             f"1 - {m} / {m} of the reference; bold labels mark significant wins.")
    p.png = plot_skill(ctx)
    p.missing = f"no {m}_rel column or no forecaster other than the reference"
    out.append(p)

    p = Plot(f"{d}-history.png", "history", f"{m} of each forecaster in every recorded run.")
    if history is None:
        p.missing = f"{HISTORY} is not in the results folder"
    else:
        p.png = plot_history(ctx, history)
        p.missing = f"no run in {HISTORY} has scores for this dataset by {m}"
    out.append(p)
    return out
