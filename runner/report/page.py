"""``castgrid report RESULTS``: one self-contained HTML page and PNG plots of a results folder.

:func:`build_report` reads the folder (:mod:`runner.report.reading`) and writes ``report.html``
(every plot embedded as a base64 PNG and the CSS inline, so the page needs no network and can
be mailed alone) and ``plots/<dataset>-<kind>.png``. Per dataset the page shows a summary, the
leaderboard's deciding columns and every metric (:mod:`runner.report.tables`), and the plots
(:mod:`runner.report.plots`): ``horizon``, ``folds``, ``forecasts``, ``skill``, ``history``.

Only leaderboard.csv and manifest.json are required: a plot whose source file is absent is
replaced by a note saying which file is missing. A damaged file is an error, and nothing is
written then.

A plot whose data did not change since the PNG of the same name was drawn (in the folder the
report is built in, or in ``previous``: the results folder a run is replacing) is copied, not
drawn again (:mod:`runner.report.reuse`); a report that draws nothing never imports matplotlib.
"""

from __future__ import annotations

import base64
import html
import math
import os
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from runner.output.numbers import column_decimals, format_number, format_percent
from runner.output.reader import FORECASTS, HISTORY, HORIZON, SCORES
from runner.report.plots import (
    MAX_LINES,
    Sketch,
    history_runs,
    series_extremes,
    sketch_folds,
    sketch_forecasts,
    sketch_history,
    sketch_horizon,
    sketch_skill,
)
from runner.report.reading import DatasetView, Results, complete_flags, dataset_views, read_results
from runner.report.style import CSS, RC
from runner.report.tables import (
    failures_html,
    leaderboard_html,
    metrics_html,
    segment_skill_html,
)

if TYPE_CHECKING:  # the command line imports this module at start; pandas loads when used
    import pandas as pd

    from runner.report.painter import Painter

REPORT = "report.html"
PLOTS = "plots"


@dataclass
class Plot:
    """One plot of the page: file name, title, caption, what it draws (None: nothing to draw,
    ``missing`` says why) and, once rendered, its PNG and notes."""

    file: str
    title: str
    caption: str
    sketch: Sketch | None = None
    png: bytes | None = None
    missing: str = ""
    notes: list[str] = field(default_factory=list)

    def take(self, sketch: Sketch | None, drawing: Drawing | None = None) -> None:
        """Keep what the plot will draw (nothing when there is nothing to draw); ``drawing``
        gets it at once (reused, or handed to the painter while the next plot is sketched)."""
        self.sketch = sketch
        if drawing is not None and sketch is not None:
            drawing.add(self)


class Drawing:
    """The PNGs of a report's plots, as the plots are sketched: each one the PNG of the same
    name and key from the first of ``places`` (plot folders) that has one, else drawn by
    ``painter`` (handed over at once, so it draws while the report sketches the next plot) or,
    without one or when it fails, here in :meth:`finish`."""

    def __init__(self, places: list[Path], painter: Painter | None = None) -> None:
        self.places = places
        self.painter = painter
        self.todo: list[tuple[Plot, str]] = []

    def add(self, plot: Plot) -> None:
        """Reuse or start drawing ``plot`` (which has a sketch)."""
        from runner.report.reuse import plot_key, reusable

        assert plot.sketch is not None
        key = plot_key(plot.file, plot.sketch.data)
        found = reusable(self.places, plot.file, key)
        if found is not None:
            plot.png, plot.notes = found
            return
        self.todo.append((plot, key))
        if self.painter is not None:
            self.painter.submit(plot.sketch, key)

    def finish(self) -> int:
        """Give every plot added its PNG and notes; returns how many were drawn."""
        from runner.report.reuse import stamp

        todo, self.todo = self.todo, []
        painted = self.painter.collect() if todo and self.painter is not None else None
        if painted is not None:
            for (p, _), (png, notes) in zip(todo, painted):
                p.png, p.notes = png, notes
        elif todo:
            from matplotlib import rc_context

            with rc_context(RC):
                for p, key in todo:
                    assert p.sketch is not None
                    drawn = p.sketch.draw()
                    p.notes = drawn.notes
                    p.png = drawn.png(stamp(key, drawn.notes))
        return len(todo)


def _plot_html(plot: Plot) -> str:
    if plot.png is None:
        return (f'<figure class="plot missing"><figcaption><b>{html.escape(plot.title)}</b>: '
                f"not drawn: {html.escape(plot.missing)}</figcaption></figure>")
    data = base64.b64encode(plot.png).decode("ascii")
    src = f"{PLOTS}/{plot.file}"
    notes = ""
    if plot.notes:
        notes = ('<br><span class="offscale">Off the scale, so the others stay readable: '
                 + "; ".join(html.escape(n) for n in plot.notes) + ".</span>")
    return (
        f'<figure class="plot"><img src="data:image/png;base64,{data}" '
        f'alt="{html.escape(plot.title)}" data-file="{html.escape(src)}">'
        f"<figcaption><b>{html.escape(plot.title)}</b>. {html.escape(plot.caption)} "
        f'<a href="{html.escape(src)}">PNG</a>{notes}</figcaption></figure>'
    )


def _summary_html(view: DatasetView) -> str:
    best = view.best()
    if best is None:
        return "<p>No forecaster has a score on this dataset.</p>"
    row = view.board[view.board["forecaster"] == best].iloc[0]
    m = view.rank_by
    value = float(row[f"{m}_mean"])
    decimals = column_decimals(view.board[f"{m}_mean"].tolist())
    parts = [f"Best {'candidate' if row['role'] == 'candidate' else 'forecaster'}: "
             f"<b>{html.escape(best)}</b>, {html.escape(m)} {format_number(value, decimals)}"]
    rel = row.get(f"{m}_rel")
    if view.reference and best != view.reference and rel is not None and math.isfinite(rel):
        parts.append(f"skill {format_percent((1 - rel) * 100)} against "
                     f"{html.escape(view.reference)}")
        failed = row.get("failed")
        if bool(row.get("beats_reference", False)):
            parts.append("a significant win (Wilcoxon, 5%)")
        elif failed is not None and math.isfinite(failed) and failed > 0:
            parts.append(f"not marked as beating the reference: {format_number(failed, 0)} "
                         "failed task(s)")
        else:
            parts.append("not shown to beat the reference")
    complete = complete_flags(view.board)
    if complete is not None and not bool(complete[view.board["forecaster"] == best].iloc[0]):
        parts.append("incomplete (failed tasks)")
    return '<p class="summary">' + "; ".join(parts) + ".</p>"


def _head_html(manifest: dict[str, Any]) -> tuple[str, str]:
    """The page title and the header above the datasets."""
    tasks = manifest.get("tasks") or {}
    config = manifest.get("config") or {}
    desc = config.get("description") if isinstance(config, dict) else None
    task_text = ", ".join(f"{k.replace('_', ' ')} {v}" for k, v in tasks.items())
    versions = manifest.get("versions") or {}
    version_text = ", ".join(f"{k} {v}" for k, v in versions.items())
    title = f"castgrid report: {manifest['experiment']}"
    head = [
        f"<h1>{html.escape(title)}</h1>",
        f'<p class="meta">{html.escape(desc)}</p>' if desc else "",
        '<p class="meta">config <code>'
        f"{html.escape(str(manifest['config_hash'])[:12])}</code> &middot; rank metric "
        f"<code>{html.escape(manifest['rank_by'])}</code>"
        + (f" &middot; tasks: {html.escape(task_text)}" if task_text else "") + "</p>",
        f'<p class="meta">{html.escape(version_text)}</p>' if version_text else "",
        '<p class="note">Lower is better for error metrics. <i>rel</i> is the rank metric '
        "divided by the reference baseline's; <i>skill</i> = 1 - rel, in percent. <i>win "
        "share</i>: share of (series, fold) tasks won against the reference; <i>DM "
        "better/worse</i>: series where the Diebold-Mariano test (Harvey-Leybourne-Newbold "
        "correction) finds a significant difference at 5%; <i>Wilcoxon p</i>: signed-rank "
        "test over the series' mean loss differences; <i>beats ref.</i>: better on average, "
        "Wilcoxon p &lt; 0.05 and no failed tasks. Wide tables scroll sideways.</p>",
    ]
    return title, "".join(head)


def _page(manifest: dict[str, Any], sections: list[str], failures: str) -> str:
    title, head = _head_html(manifest)
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{html.escape(title)}</title><style>{CSS}</style></head><body><main>"
        + head + "".join(sections) + failures + "</main></body></html>\n"
    )


def _dataset_plots(view: DatasetView, results: Results, drawing: Drawing | None = None
                   ) -> list[Plot]:
    d, m = view.dataset, view.rank_by
    shown = (f"The reference and the {MAX_LINES} best others are shown."
             if len(view.board) > MAX_LINES + 1 else "")
    out = []
    p = Plot(f"{d}-horizon.png", f"{m} by forecast step",
             f"{m} pooled over every series and fold at each step. {shown}".strip())
    if results.horizon is None:
        p.missing = f"{HORIZON} is not in the results folder"
    else:
        p.take(sketch_horizon(view, results.horizon), drawing)
        p.missing = f"no {m} column for this dataset in {HORIZON}"
    out.append(p)

    p = Plot(f"{d}-folds.png", f"{m} fold by fold",
             f"Each point is one fold's {m}, the mean over its series; the leaderboard's mean "
             f"and sd are over these points. {shown}".strip())
    if not results.has_scores:
        p.missing = f"{SCORES} is not in the results folder"
    else:
        p.take(sketch_folds(view, results.fold_scores(d, m)), drawing)
        p.missing = f"no {m} scores for this dataset in {SCORES}"
    out.append(p)

    p = Plot(f"{d}-forecasts.png", "forecasts against actuals", "")
    if not results.has_forecasts:
        output = (results.manifest.get("config") or {}).get("output") or {}
        p.missing = (f"the run kept no forecasts (output.forecasts: none), so {FORECASTS} was "
                     "not written" if output.get("forecasts") == "none"
                     else f"{FORECASTS} is not in the results folder")
    else:
        # only the rows drawn are read: the best candidate's best and worst series
        best = view.best()
        drawn = [n for n in (best, view.reference) if n is not None]
        scores = _best_scores(view, results)
        picks = series_extremes(view, scores, best) if scores is not None else None
        rows = results.forecast_rows(d, picks, drawn)
        sketch, note = sketch_forecasts(view, rows, scores)
        p.take(sketch, drawing)
        p.caption = (f"Best and worst series (by mean {m}) of the best candidate: {note}. "
                     "The dashed black line is the reference's forecast.")
        p.missing = note
    out.append(p)

    p = Plot(f"{d}-skill.png", "skill against the reference",
             f"1 - {m} / {m} of the reference; bold labels mark significant wins.")
    p.take(sketch_skill(view), drawing)
    p.missing = f"no {m}_rel column or no forecaster other than the reference"
    out.append(p)

    p = Plot(f"{d}-history.png", "history", f"{m} of each forecaster in every recorded run.")
    if results.history is None:
        p.missing = f"{HISTORY} is not in the results folder"
    else:
        p.take(sketch_history(view, results.history), drawing)
        runs = len(history_runs(view, results.history))
        every = sum(1 for e in results.history
                    if view.dataset in e["scores"] and e["rank_by"] == m)
        repeats = (f" ({every - runs} repeating the run before: same config, data and scores)"
                   if every > runs else "")
        p.missing = (f"{HISTORY} has {every} run(s) with scores for this dataset by {m}"
                     f"{repeats}; the plot needs two or more that differ" if runs < 2
                     else f"no forecaster has a {m} in {HISTORY}")
    out.append(p)
    return out


def _best_scores(view: DatasetView, results: Results) -> pd.DataFrame | None:
    """The rank metric of every task of the best candidate (what picks the series to draw);
    None without scores."""
    best = view.best()
    if best is None or not results.has_scores:
        return None
    return results.series_scores(view.dataset, best, view.rank_by)


def _segment_sections(view: DatasetView, results: Results, drawing: Drawing | None = None
                      ) -> tuple[str, list[Plot]]:
    """Per segment attribute: the skill of every forecaster per segment as one shaded table,
    and the forecasts of the best and worst series of each segment (empty without segments)."""
    from runner.scoring.segments import segment_skill

    seg, members = results.segments, results.series_segments
    if seg is None:
        return "", []
    mine = seg[seg["dataset"] == view.dataset]
    parts: list[str] = []
    plots: list[Plot] = []
    order = [str(n) for n in view.board["forecaster"]]
    for attribute in dict.fromkeys(str(a) for a in mine["attribute"]):
        frame = segment_skill(mine, view.dataset, attribute, order=order)
        parts.append(f"<h3>Skill per {html.escape(attribute)} (1 - {view.rank_by}_rel, %)</h3>"
                     + segment_skill_html(frame, view.reference,
                                          label=f"skill per {attribute} of {view.dataset}"))
        if members is None or attribute not in members.columns or not results.has_forecasts:
            continue
        rows = members[members["dataset"].astype(str) == view.dataset]
        best = view.best()
        drawn_names = [n for n in (best, view.reference) if n is not None]
        scores = _best_scores(view, results)
        for value in frame.columns:
            series = list(rows.loc[rows[attribute].astype(str) == str(value), "series"]
                          .astype(str))
            slug = "".join(ch if ch.isalnum() else "-" for ch in f"{attribute}-{value}")
            p = Plot(f"{view.dataset}-forecasts-{slug}.png",
                     f"forecasts on {attribute} {value}", "")
            # only the rows drawn are read: the best and worst series of this segment
            picks = (series_extremes(view, scores, best, series)
                     if scores is not None and best is not None else series)
            part = results.forecast_rows(view.dataset, picks, drawn_names)
            sketch, note = sketch_forecasts(view, part, scores, series=series,
                                            title=f"{attribute} {value}")
            p.take(sketch, drawing)
            p.caption = f"Best and worst series of this segment (by mean {view.rank_by}): {note}."
            p.missing = note
            plots.append(p)
    return "".join(parts), plots


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


def build_report(out_dir: Path, previous: Path | None = None,
                 painter: Painter | None = None) -> Path:
    """Write ``report.html`` and ``plots/*.png`` for the results folder ``out_dir``.

    ``previous`` is a results folder whose plots may be reused (a run builds the report in a
    new folder that replaces ``previous``); the plots already in ``out_dir`` may be reused too.
    ``painter`` draws the plots in a process of its own (:mod:`runner.report.painter`).
    Returns the path of report.html. Raises DataError when leaderboard.csv or manifest.json
    is missing or any file present is damaged; nothing is written in that case.
    """
    out_dir = Path(out_dir)
    results = read_results(out_dir, forecasts=False, scores=False)
    places = [out_dir / PLOTS] + ([Path(previous) / PLOTS] if previous is not None else [])
    drawing = Drawing(places, painter)  # each plot is drawn as soon as it is sketched
    per_view = []
    for view in dataset_views(results):
        segment_html, segment_plots = _segment_sections(view, results, drawing)
        per_view.append((view, _dataset_plots(view, results, drawing) + segment_plots,
                         segment_html))
    plots = [p for _, mine, _ in per_view for p in mine]
    drawing.finish()
    sections = [
        f"<h2>dataset {html.escape(view.dataset)}</h2>"
        f'<div class="card">{_summary_html(view)}{leaderboard_html(view)}'
        f"<h3>Every metric (mean \u00b1 sd over folds)</h3>{metrics_html(view)}"
        f"{segment_html}</div>"
        f'<div class="grid">{"".join(_plot_html(p) for p in mine)}</div>'
        for view, mine, segment_html in per_view
    ]
    page = _page(results.manifest, sections, failures_html(results.failures))

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
