"""The report's plots, one function each, drawn with matplotlib's object interface (no pyplot).

Each ``draw_*`` function takes one dataset's :class:`~runner.report.reading.DatasetView` and
the table it draws from, and returns a :class:`Drawn` (the figure and the notes the page shows
under it) or None when there is nothing to draw. Each is a ``sketch_*`` function, which
computes everything the plot shows without matplotlib (a :class:`Sketch`, whose data keys the
PNG so that an unchanged plot is reused, :mod:`runner.report.reuse`), followed by drawing it:

* :func:`draw_horizon`: the rank metric by forecast step, a line per forecaster;
* :func:`draw_folds`: the rank metric of each fold (mean over series), a line per forecaster;
* :func:`draw_forecasts`: forecasts against actuals on the best and worst series of any given
  set of series (the whole dataset, or later one segment);
* :func:`draw_skill`: skill against the reference, ``1 - rel``, a bar per forecaster;
* :func:`draw_history`: the rank metric run by run.

Every forecaster keeps its look (:mod:`runner.report.style`); y-ranges follow
:mod:`runner.report.scales`, so one wild value cannot flatten the others, and the notes name
what is off the scale. A legend lists only forecasters with at least one point inside the axes.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from runner.output.numbers import column_decimals, format_number, format_percent
from runner.output.reader import INTERVAL_LOW, interval_columns
from runner.report.reading import DatasetView, fold_key
from runner.report.scales import Scale, robust_scale
from runner.report.style import ACTUAL_COLOR, Look

if TYPE_CHECKING:
    import pandas as pd
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure

#: Plots with a line per forecaster show the reference and at most this many others.
MAX_LINES = 8
#: Figure width in inches: at savefig.dpi it is the page's plot width, so text is not scaled.
FIG_WIDTH = 10.0
#: The skill plot shows at most this many forecasters (best first).
MAX_BARS = 16


@dataclass
class Drawn:
    """A drawn figure and the notes to show under it (what is off the scale)."""

    figure: Figure
    notes: list[str] = field(default_factory=list)

    def png(self, text: dict[str, str] | None = None) -> bytes:
        """The figure as PNG bytes, without a time stamp or software tag (reproducible);
        ``text`` is stored in the file as PNG text chunks (ASCII keys and values)."""
        import io

        buf = io.BytesIO()
        self.figure.savefig(buf, format="png", metadata={"Software": None, **(text or {})})
        return buf.getvalue()

    def legend_names(self) -> list[list[str]]:
        """The legend entries of each axes (an empty list for an axes without legend)."""
        out = []
        for ax in self.figure.axes:
            legend = ax.get_legend()
            out.append([t.get_text() for t in legend.get_texts()] if legend else [])
        return out


@dataclass
class Sketch:
    """Everything one plot shows, computed without matplotlib: ``data`` (plain values, lines,
    labels, small tables) and ``paint``, which draws exactly ``data``. The report keys the PNG
    by ``data`` and reuses the previous run's PNG when the key is the same."""

    data: dict[str, Any]
    paint: Callable[[dict[str, Any]], Drawn]

    def draw(self) -> Drawn:
        """Draw the plot (imports matplotlib)."""
        return self.paint(self.data)


def _figure(height: float) -> Figure:
    from matplotlib.figure import Figure

    return Figure(figsize=(FIG_WIDTH, height), layout="constrained")


def _time_axis(values: pd.Series) -> pd.Series:
    """Times as written (text) turned into something orderable: dates, numbers, or text."""
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


# --------------------------------------------------------------------------- lines and scales


@dataclass
class _Line:
    """One forecaster's line: x, y (NaN for a gap) and look."""

    name: str
    x: Sequence[Any]
    y: Sequence[float]
    look: Look


def _off_note(name: str, label: str, beyond: list[float], total: int, decimals: int) -> str:
    """'mean: mase 4.10 to 9.87 (off the scale)', or how many points are off and how far."""
    lo, hi = min(beyond), max(beyond)
    span = (format_number(lo, decimals) if lo == hi
            else f"{format_number(lo, decimals)} to {format_number(hi, decimals)}")
    if len(beyond) == total:
        return f"{name}: {label} {span} (off the scale)"
    return f"{name}: {len(beyond)} of {total} points off the scale ({label} {span})"


def _draw_lines(ax: Axes, lines: list[_Line], label: str, include: Sequence[float] = ()
                ) -> list[str]:
    """Draw ``lines`` on a robust y-range; mark points beyond it; legend of visible lines only.

    Returns the notes naming each forecaster with points off the scale.
    """
    scale = robust_scale({ln.name: ln.y for ln in lines}, include)
    if scale is None:
        return []
    ax.set_ylim(scale.low, scale.high)
    handles = []
    for ln in lines:
        if not any(math.isfinite(v) and scale.contains(v) for v in ln.y):
            continue  # nothing of it would be visible: not drawn, not in the legend; a note
        (artist,) = ax.plot(ln.x, ln.y, label=ln.name, **ln.look.line())
        handles.append(artist)
        _mark_beyond(ax, ln, scale)
    if handles:
        ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0),
                  borderaxespad=0.0)
    decimals = column_decimals(v for ln in lines for v in ln.y)
    return [_off_note(ln.name, label, scale.off[ln.name],
                      sum(math.isfinite(v) for v in ln.y), decimals)
            for ln in lines if ln.name in scale.off]


def _mark_beyond(ax: Axes, ln: _Line, scale: Scale) -> None:
    """A triangle at the axis edge where a point of a visible line lies beyond it."""
    for x, y in zip(ln.x, ln.y):
        if not math.isfinite(y) or scale.contains(y):
            continue
        edge, marker = (scale.high, "^") if y > scale.high else (scale.low, "v")
        ax.plot([x], [edge], marker=marker, markersize=7, color=ln.look.color, clip_on=False,
                linestyle="none", zorder=5)


# --------------------------------------------------------------------------- the plots


def draw_horizon(view: DatasetView, horizon: pd.DataFrame) -> Drawn | None:
    """The rank metric by forecast step, one line per forecaster (best MAX_LINES and the ref.)."""
    sketch = sketch_horizon(view, horizon)
    return None if sketch is None else sketch.draw()


def sketch_horizon(view: DatasetView, horizon: pd.DataFrame) -> Sketch | None:
    """What :func:`draw_horizon` draws."""
    part = horizon[horizon["dataset"] == view.dataset]
    m = view.rank_by
    if m not in part.columns or part.empty:
        return None
    lines = []
    for name in view.shown(MAX_LINES):
        rows = part[part["forecaster"] == name].sort_values("step")
        if not rows.empty:
            lines.append(_Line(name, rows["step"].tolist(),
                               rows[m].astype(float).tolist(), view.look(name)))
    if not lines:
        return None
    return Sketch({"metric": m, "lines": lines}, _paint_horizon)


def _paint_horizon(data: dict[str, Any]) -> Drawn:
    m, lines = data["metric"], data["lines"]
    fig = _figure(3.8)
    ax = fig.add_subplot()
    notes = _draw_lines(ax, lines, m)
    ax.set_xlabel("forecast step")
    ax.set_ylabel(m)
    ax.set_title(f"{m} by forecast step")
    ax.xaxis.get_major_locator().set_params(integer=True)
    return Drawn(fig, notes)


def draw_folds(view: DatasetView, scores: pd.DataFrame) -> Drawn | None:
    """The rank metric of each fold (mean over its series), one line per forecaster.

    The x-axis is the fold's origin time when the folder names folds by origin, else the fold
    number. The leaderboard's mean and sd are over exactly these points.
    """
    sketch = sketch_folds(view, scores)
    return None if sketch is None else sketch.draw()


def sketch_folds(view: DatasetView, scores: pd.DataFrame) -> Sketch | None:
    """What :func:`draw_folds` draws."""
    part = scores[scores["dataset"] == view.dataset]
    m = view.rank_by
    if m not in part.columns or part.empty:
        return None
    key = fold_key(part)
    per_fold = part.groupby(["forecaster", key], observed=True)[m].mean()
    present = set(per_fold.index.get_level_values(0))
    lines = []
    for name in view.shown(MAX_LINES):
        if name not in present:
            continue
        mine = per_fold.loc[name]
        x = _time_axis(mine.index.to_series()) if key == "origin" else mine.index.to_series()
        order = x.argsort(kind="stable").to_numpy()
        lines.append(_Line(name, x.to_numpy()[order].tolist(),
                           mine.to_numpy(dtype=float)[order].tolist(), view.look(name)))
    if not any(any(math.isfinite(v) for v in ln.y) for ln in lines):
        return None
    data: dict[str, Any] = {"metric": m, "key": key, "lines": lines}
    if key == "origin":  # a tick at each origin, named as the folder names it
        names = part[key].astype(str).drop_duplicates().reset_index(drop=True)
        times = _time_axis(names)
        order = times.argsort(kind="stable").to_numpy()
        step = max(1, len(order) // 12)
        data["ticks"] = list(times.to_numpy()[order][::step])
        data["tick_labels"] = list(names.to_numpy()[order][::step])
    return Sketch(data, _paint_folds)


def _paint_folds(data: dict[str, Any]) -> Drawn:
    m, key, lines = data["metric"], data["key"], data["lines"]
    fig = _figure(3.8)
    ax = fig.add_subplot()
    notes = _draw_lines(ax, lines, f"{m} of a fold")
    if key == "origin":
        ax.set_xticks(data["ticks"], data["tick_labels"], rotation=30, ha="right")
        ax.set_xlabel("origin (time of the last training observation)")
    else:
        ax.set_xlabel("fold")
        ax.xaxis.get_major_locator().set_params(integer=True)
    ax.set_ylabel(f"{m} (mean over series)")
    ax.set_title(f"{m} fold by fold")
    return Drawn(fig, notes)


def text_in(column: pd.Series, names: Sequence[Any]) -> pd.Series:
    """Rows of ``column`` whose value, as text, is one of ``names``: the text of each distinct
    value is compared, never that of every row (a column may hold millions)."""
    import pandas as pd

    wanted = {str(n) for n in names}
    return column.isin([v for v in pd.unique(column) if str(v) in wanted])


def series_extremes(view: DatasetView, scores: pd.DataFrame, forecaster: str,
                    series: Sequence[str] | None = None) -> list[str]:
    """The best and the worst of ``series`` (all when None) for ``forecaster``.

    Series are ordered by the forecaster's mean rank metric over its folds (lower is better;
    ties by name); one series is returned when only one has a score.
    """
    part = scores[(scores["dataset"] == view.dataset) & (scores["forecaster"] == forecaster)]
    if series is not None:
        part = part[text_in(part["series"], series)]
    means = part.groupby("series", observed=True, sort=False)[view.rank_by].mean()
    means.index = means.index.astype(str)
    means = means.dropna()
    if means.empty:
        return []
    order = sorted(means.items(), key=lambda kv: (kv[1], kv[0]))
    best, worst = order[0][0], order[-1][0]
    return [best] if best == worst else [best, worst]


def draw_forecasts(view: DatasetView, forecasts: pd.DataFrame, scores: pd.DataFrame | None,
                   series: Sequence[str] | None = None, title: str = ""
                   ) -> tuple[Drawn | None, str]:
    """Forecasts against actuals on the best and worst of ``series`` for the best candidate.

    ``series`` limits the choice to a subset (all series of the dataset when None), so the
    same plot can be drawn per segment; ``title`` prefixes each panel's title. Returns the
    drawing (None when there is nothing to draw) and a sentence saying what is shown or why
    nothing is.
    """
    sketch, note = sketch_forecasts(view, forecasts, scores, series, title)
    return (None if sketch is None else sketch.draw()), note


def sketch_forecasts(view: DatasetView, forecasts: pd.DataFrame, scores: pd.DataFrame | None,
                     series: Sequence[str] | None = None, title: str = ""
                     ) -> tuple[Sketch | None, str]:
    """What :func:`draw_forecasts` draws, and its sentence."""
    best = view.best()
    if best is None:
        return None, "no forecaster has a score"
    part = forecasts[forecasts["dataset"] == view.dataset]
    if series is not None:
        part = part[text_in(part["series"], series)]
    if scores is not None:
        picks = series_extremes(view, scores, best, series)
    else:  # no scores: the first series the best forecaster has forecasts for
        picks = list(dict.fromkeys(part.loc[part["forecaster"] == best, "series"].astype(str)))
        picks = picks[:1]
    if not picks:
        return None, f"{best} has no scored series"
    levels = sorted({m.group(1) for c in part.columns if (m := INTERVAL_LOW.match(c))}, key=float)
    level = levels[0] if levels else None
    drawn = [best] + ([view.reference] if view.reference and view.reference != best else [])
    panels = []
    for name, label in zip(picks, ["best series", "worst series"]):
        rows = part[text_in(part["series"], [name])]
        # only what the panel draws, so that the plot's key changes only when the plot does
        rows = rows[text_in(rows["forecaster"], drawn)].copy()
        rows["_t"] = _time_axis(rows["time"])
        key = fold_key(rows)
        keep = ["_t", "actual", "forecast", "forecaster", key]
        keep += list(interval_columns(level)) if level is not None else []
        rows = rows[[c for c in keep if c in rows.columns]]
        panels.append({"series": name, "label": label, "key": key,
                       "rows": rows.reset_index(drop=True)})
    data = {"title": title, "best": best, "drawn": drawn, "level": level, "panels": panels,
            "looks": {who: view.look(who) for who in drawn}}
    return Sketch(data, _paint_forecasts), f"forecaster {best}; one line per fold's forecast block"


def _paint_forecasts(data: dict[str, Any]) -> Drawn:
    panels, title = data["panels"], data["title"]
    fig = _figure(3.0 * len(panels))
    axes = fig.subplots(len(panels), 1, squeeze=False)[:, 0]
    notes: list[str] = []
    for ax, panel in zip(axes, panels):
        name, label = panel["series"], panel["label"]
        notes += [f"{name}: {note}" for note in _forecast_panel(ax, data, panel)]
        ax.set_title(f"{title}: {label}: {name}" if title else f"{label}: {name}", loc="left")
        ax.set_ylabel("value")
    return Drawn(fig, notes)


def _forecast_panel(ax: Axes, data: dict[str, Any], panel: dict[str, Any]) -> list[str]:
    """One series: actuals, the best forecaster's blocks and interval, the reference's blocks."""
    best, level, drawn = data["best"], data["level"], data["drawn"]
    rows, key = panel["rows"], panel["key"]
    actual = rows.drop_duplicates("_t").sort_values("_t")
    ax.plot(actual["_t"], actual["actual"], color=ACTUAL_COLOR, linewidth=1.3, marker="o",
            markersize=2.8, label="actual", zorder=6)
    plotted: dict[str, list[float]] = {"actual": actual["actual"].astype(float).tolist()}
    blocks: list[_Line] = []
    bounds: list[float] = []  # the interval takes part in the range, is never named off it
    for who in drawn:
        look = data["looks"][who]
        style = look.line(markersize=0)
        if who != best:
            style["linewidth"] = 1.6  # the reference is for comparison: lighter than the best
        mine = rows[rows["forecaster"] == who]
        plotted[who] = mine["forecast"].astype(float).tolist()
        blocks.append(_Line(who, mine["_t"].tolist(), plotted[who], look))
        for i, (_, block) in enumerate(mine.groupby(key, observed=True, sort=True)):
            block = block.sort_values("_t")
            if who == best and level is not None:
                lo, hi = interval_columns(level)
                if lo in block.columns and block[lo].notna().any():
                    bounds += block[lo].astype(float).tolist() + block[hi].astype(float).tolist()
                    ax.fill_between(block["_t"], block[lo], block[hi], color=look.color,
                                    alpha=0.15, linewidth=0,
                                    label=f"{level}% interval" if i == 0 else None)
            ax.plot(block["_t"], block["forecast"], label=who if i == 0 else None, **style)
    scale = robust_scale({**plotted, "": bounds}, include=plotted["actual"])
    if scale is None:
        return []
    ax.set_ylim(scale.low, scale.high)
    visible = {n for n, vs in plotted.items()
               if any(math.isfinite(v) and scale.contains(v) for v in vs)}
    interval = f"{level}% interval"
    handles = [h for h, lab in zip(*ax.get_legend_handles_labels())
               if lab in visible or (lab == interval and best in visible)]
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0)
    for ln in blocks:
        if ln.name in visible:
            _mark_beyond(ax, ln, scale)
    decimals = column_decimals(plotted["actual"])
    return [_off_note(who, "forecast", scale.off[who], len(plotted[who]), decimals)
            for who in drawn if who in scale.off]


def draw_skill(view: DatasetView) -> Drawn | None:
    """Horizontal bars of skill against the reference, ``1 - rel``; significant wins marked.

    A bar beyond the robust range is cut at its edge, hatched, and labelled with its value.
    """
    sketch = sketch_skill(view)
    return None if sketch is None else sketch.draw()


def sketch_skill(view: DatasetView) -> Sketch | None:
    """What :func:`draw_skill` draws."""
    import numpy as np

    rel_col = f"{view.rank_by}_rel"
    if rel_col not in view.board.columns:
        return None
    rel = view.board[rel_col].to_numpy(dtype=float)
    rows = view.board[(view.board["forecaster"] != view.reference) & np.isfinite(rel)]
    if rows.empty:
        return None
    skill = (1.0 - rows[rel_col].to_numpy(dtype=float)) * 100.0
    order = np.argsort(-skill, kind="stable")[:MAX_BARS]
    names = [str(rows["forecaster"].iloc[i]) for i in order]
    values = [float(skill[i]) for i in order]
    beats = ([bool(rows["beats_reference"].iloc[i]) for i in order]
             if "beats_reference" in rows.columns else [False] * len(order))
    if robust_scale({n: [v] for n, v in zip(names, values)}, include=[0.0]) is None:
        return None
    return Sketch({"names": names, "values": values, "beats": beats, "metric": view.rank_by,
                   "reference": view.reference}, _paint_skill)


def _paint_skill(data: dict[str, Any]) -> Drawn:
    import numpy as np

    names, values, beats = data["names"], data["values"], data["beats"]
    scale = robust_scale({n: [v] for n, v in zip(names, values)}, include=[0.0])
    assert scale is not None  # the sketch checked
    fig = _figure(0.9 + 0.34 * len(names))
    ax = fig.add_subplot()
    pos = np.arange(len(names))[::-1]
    width = scale.high - scale.low
    # room for the labels beyond the longest bar on each side that has bars
    left = scale.low - (0.35 * width if min(values) < 0 else 0.0)
    right_edge = scale.high + (0.35 * width if max(values) > 0 else 0.0)
    for p, name, v, b in zip(pos, names, values, beats):
        color = "#2e8b57" if v > 0 else "#c0392b"
        weight = "bold" if b else "normal"
        text = format_percent(v) + ("  significant" if b else "")
        if name in scale.off:
            # cut at the axis edge, hatched, labelled inside: longer than any bar on the scale
            edge = left if v < 0 else right_edge
            ax.barh(p, edge, color=color, height=0.6, alpha=0.85, hatch="///",
                    edgecolor="white", linewidth=0)
            ax.text(edge + (0.01 if v < 0 else -0.01) * width, p, f"{text}  off the scale",
                    va="center", ha="left" if v < 0 else "right", fontsize=8, fontweight=weight,
                    bbox={"boxstyle": "round,pad=0.25", "facecolor": "white", "alpha": 0.9,
                          "edgecolor": "none"})
            continue
        ax.barh(p, v, color=color, height=0.6, alpha=0.85)
        right = v >= 0
        ax.text(v + (0.015 if right else -0.015) * width, p, text, va="center",
                ha="left" if right else "right", fontsize=8, fontweight=weight)
    ax.axvline(0, color="#333333", linewidth=0.9)
    ax.set_xlim(left, right_edge)
    ax.set_yticks(pos, names)
    ax.set_ylim(-0.6, len(names) - 0.4)
    m, ref = data["metric"], data["reference"]
    ax.set_xlabel(f"skill = 1 - {m} / {m} of {ref} (percent)")
    ax.set_title(f"skill against the reference ({ref})")
    ax.grid(axis="y", visible=False)
    notes = [f"{n}: skill {format_percent(v)} (off the scale)"
             for n, v in zip(names, values) if n in scale.off]
    return Drawn(fig, notes)


def history_runs(view: DatasetView, entries: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """The history entries with scores for this dataset by its rank metric, a run that repeats
    the one before it (same config, same data, same scores) left out.

    A repeated run adds no information to the plot, and leaving it out keeps the plot, and
    its PNG, unchanged when an unchanged experiment is rerun.
    """
    out: list[dict[str, Any]] = []
    last = None
    for e in entries:
        if view.dataset not in e["scores"] or e["rank_by"] != view.rank_by:
            continue
        same = (e["config_hash"], e["data"].get(view.dataset), e["scores"][view.dataset])
        if same != last:
            out.append(e)
        last = same
    return out


def draw_history(view: DatasetView, entries: list[dict[str, Any]]) -> Drawn | None:
    """The rank metric of each forecaster run by run (None with fewer than two runs)."""
    sketch = sketch_history(view, entries)
    return None if sketch is None else sketch.draw()


def sketch_history(view: DatasetView, entries: list[dict[str, Any]]) -> Sketch | None:
    """What :func:`draw_history` draws."""
    from runner.output.history import run_labels

    runs = history_runs(view, entries)
    if len(runs) < 2:
        return None
    labels = run_labels(runs)
    x = list(range(len(runs)))
    lines = []
    for name in view.shown(MAX_LINES):
        ys = [runs[i]["scores"][view.dataset].get(name) for i in x]
        ys = [math.nan if v is None else float(v) for v in ys]
        if any(math.isfinite(v) for v in ys):
            lines.append(_Line(name, x, ys, view.look(name)))
    if not lines:
        return None
    return Sketch({"metric": view.rank_by, "lines": lines, "labels": labels}, _paint_history)


def _paint_history(data: dict[str, Any]) -> Drawn:
    m, lines, labels = data["metric"], data["lines"], data["labels"]
    x = list(range(len(labels)))
    fig = _figure(3.6)
    ax = fig.add_subplot()
    notes = _draw_lines(ax, lines, m)
    step = max(1, len(x) // 10)
    ax.set_xticks(x[::step], labels[::step], rotation=30, ha="right")
    ax.set_xlim(-0.5, len(x) - 0.5)
    ax.set_xlabel("run (UTC time and config hash)")
    ax.set_ylabel(m)
    ax.set_title(f"{m} run by run ({len(labels)} runs)")
    return Drawn(fig, notes)
