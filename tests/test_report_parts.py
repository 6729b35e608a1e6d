"""The report's parts: distinct looks, scales an outlier cannot flatten, legends of what is
visible, forecasts of a subset of series, and the skill-per-segment table.

Results folders are synthetic (tests/test_report.py's make_results, invented numbers).
"""

from __future__ import annotations

from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from test_report import FORECASTERS, REFERENCE, make_results

from runner.report.plots import (
    draw_folds,
    draw_forecasts,
    draw_horizon,
    draw_skill,
    series_extremes,
)
from runner.report.reading import (
    DatasetView,
    complete_flags,
    dataset_views,
    fold_key,
    metric_flags,
    read_results,
)
from runner.report.scales import FENCE, _quantile, robust_scale
from runner.report.style import (
    REFERENCE_LOOK,
    baseline_look,
    candidate_look,
    forecaster_looks,
    skill_shade,
)
from runner.report.tables import leaderboard_html, metrics_html, segment_skill_html

#: A forecaster far worse than the others: 60 times the noise of the best.
WILD = {**FORECASTERS, "wild": ("mean", "baseline", 45.0)}


# --------------------------------------------------------------------------- looks


def test_no_two_forecasters_look_alike() -> None:
    board = pd.DataFrame({
        "forecaster": [f"c{i}" for i in range(100)] + [f"b{i}" for i in range(100)] + ["ref"],
        "role": ["candidate"] * 100 + ["baseline"] * 101,
    })
    looks = forecaster_looks(board, "ref")
    keys = [look.key() for look in looks.values()]
    assert len(set(keys)) == len(keys) == 201
    assert looks["ref"] == REFERENCE_LOOK


def test_the_six_classic_benchmarks_differ_in_colour_and_dash_and_stay_muted() -> None:
    six = [baseline_look(i) for i in range(6)]
    assert len({b.color for b in six}) == 6
    assert len({b.linestyle for b in six[:4]}) == 4
    # muted: thinner than any candidate and hollow-marked; candidates solid at first
    cands = [candidate_look(i) for i in range(6)]
    assert all(b.linewidth < c.linewidth and not b.filled for b in six for c in cands)
    assert {c.linestyle for c in cands} == {"-"} and len({c.color for c in cands}) == 6
    # the reference stands out: the widest line
    assert REFERENCE_LOOK.linewidth > max(c.linewidth for c in cands)


def _view(out: Path) -> tuple[DatasetView, object]:
    results = read_results(out)
    return dataset_views(results)[0], results


def test_drawn_lines_use_distinct_looks(tmp_path: Path) -> None:
    view, results = _view(make_results(tmp_path / "r", runs=1))
    drawn = draw_horizon(view, results.horizon)
    lines = [ln for ln in drawn.figure.axes[0].get_lines() if ln.get_label() in FORECASTERS]
    assert len(lines) == len(FORECASTERS)
    seen = {(ln.get_color(), ln.get_marker(), ln.get_markerfacecolor(),
             str(ln.get_linestyle())) for ln in lines}
    assert len(seen) == len(lines)


# --------------------------------------------------------------------------- scales


def test_quantile_matches_numpy() -> None:
    rng = np.random.default_rng(1)
    for n in (1, 2, 5, 17):
        values = sorted(rng.normal(size=n).tolist())
        for q in (0.25, 0.5, 0.75):
            # reference: numpy's default (linear) percentile
            assert _quantile(values, q) == pytest.approx(np.percentile(values, q * 100))


def test_robust_scale_leaves_out_a_far_out_value_and_names_it() -> None:
    values = {"a": [0.5, 0.6], "b": [0.7, 0.8], "c": [0.9, 1.0], "ref": [1.0, 1.1],
              "mean": [50.0, 60.0]}
    scale = robust_scale(values)
    pooled = np.array([v for vs in values.values() for v in vs])
    q1, q3 = np.percentile(pooled, [25, 75])
    assert 60.0 > q3 + FENCE * (q3 - q1)  # Tukey's far-out fence excludes the two values
    assert scale.off == {"mean": [50.0, 60.0]}
    assert scale.low <= 0.5 and 1.1 <= scale.high < 1.2


def test_robust_scale_clips_nothing_without_an_outlier_or_with_few_values() -> None:
    spread = {"a": [0.5, 0.9], "b": [1.4, 2.6], "c": [3.3, 1.8]}
    assert robust_scale(spread).off == {}
    assert robust_scale({"a": [1.0], "b": [1.1], "c": [400.0]}).off == {}  # 3 values
    assert robust_scale({"a": [1.0, 1.0, 1.0, 1.0], "b": [9.0]}).off == {}  # IQR 0
    assert robust_scale({"a": [float("nan")]}) is None


def test_robust_scale_always_shows_the_included_values() -> None:
    scale = robust_scale({"a": [40.0], "b": [30.0], "c": [35.0], "d": [45.0]}, include=[0.0])
    assert scale.low < 0.0 < 45.0 < scale.high


def _others(lines: list, name: str = "wild") -> np.ndarray:
    ys = [np.asarray(ln.get_ydata(), dtype=float) for ln in lines
          if ln.get_label() in FORECASTERS]
    return np.concatenate(ys)


def test_an_extreme_forecaster_cannot_flatten_the_horizon_plot(tmp_path: Path) -> None:
    view, results = _view(make_results(tmp_path / "r", runs=1, forecasters=WILD))
    drawn = draw_horizon(view, results.horizon)
    ax = drawn.figure.axes[0]
    others = _others(ax.get_lines())
    wild = results.horizon.loc[results.horizon["forecaster"] == "wild", "mase"]
    low, high = ax.get_ylim()
    assert wild.min() > 5 * others.max()  # the fixture is extreme
    assert low <= others.min() and others.max() <= high  # every other point shown
    assert (others.max() - others.min()) / (high - low) > 0.85  # and they fill the axis
    assert drawn.legend_names()[0] == [n for n in view.shown(8) if n != "wild"]
    assert len(drawn.notes) == 1 and drawn.notes[0].startswith("wild: mase ")
    assert drawn.notes[0].endswith("(off the scale)")


def test_an_extreme_forecaster_cannot_flatten_the_fold_plot(tmp_path: Path) -> None:
    view, results = _view(make_results(tmp_path / "r", runs=1, forecasters=WILD))
    drawn = draw_folds(view, results.scores)
    ax = drawn.figure.axes[0]
    others = _others(ax.get_lines())
    low, high = ax.get_ylim()
    assert low <= others.min() and others.max() <= high
    assert (others.max() - others.min()) / (high - low) > 0.85
    assert "wild" not in drawn.legend_names()[0]
    assert [n.split(":")[0] for n in drawn.notes] == ["wild"]


def test_an_extreme_forecaster_cannot_flatten_the_skill_plot(tmp_path: Path) -> None:
    view, _ = _view(make_results(tmp_path / "r", runs=1, forecasters=WILD))
    board = view.board.set_index("forecaster")
    skill = (1 - board["mase_rel"].drop(REFERENCE)) * 100
    drawn = draw_skill(view)
    low, high = drawn.figure.axes[0].get_xlim()
    others = skill.drop("wild")
    assert skill["wild"] < -1000 < low  # the wild bar is cut at the edge
    assert low < others.min() and others.max() < high
    # the others' spread takes a good part of the axis (the rest is room for the labels)
    assert (others.max() - others.min()) / (high - low) > 0.4
    assert drawn.notes == [f"wild: skill {skill['wild']:+.1f}% (off the scale)"]


def test_a_partly_visible_line_stays_in_the_legend(tmp_path: Path) -> None:
    out = make_results(tmp_path / "r", runs=1)
    horizon = pd.read_csv(out / "horizon.csv")
    last = (horizon["forecaster"] == "naive") & (horizon["step"] == horizon["step"].max())
    horizon.loc[last, "mase"] = 500.0  # one far-out point
    horizon.to_csv(out / "horizon.csv", index=False)
    view, results = _view(out)
    drawn = draw_horizon(view, results.horizon)
    assert "naive" in drawn.legend_names()[0]
    assert drawn.notes == ["naive: 1 of 6 points off the scale (mase 500.000)"]
    # a triangle marks where the point left the axis
    edge = [ln for ln in drawn.figure.axes[0].get_lines() if ln.get_marker() == "^"]
    assert len(edge) == 1 and edge[0].get_ydata()[0] == drawn.figure.axes[0].get_ylim()[1]


# --------------------------------------------------------------------------- forecasts


def test_forecasts_of_a_subset_show_its_best_and_worst_series(tmp_path: Path) -> None:
    view, results = _view(make_results(tmp_path / "r", runs=1))
    best = view.best()
    subset = ["north", "east"]
    # independent: the best forecaster's mean mase per series, from the raw parquet file
    raw = pd.read_parquet(tmp_path / "r" / "scores.parquet")
    means = raw[(raw["forecaster"] == best) & raw["series"].isin(subset)] \
        .groupby("series")["mase"].mean()
    assert series_extremes(view, results.scores, best, subset) == \
        [means.idxmin(), means.idxmax()]
    drawn, note = draw_forecasts(view, results.forecasts, results.scores, subset, "segment A")
    titles = [ax.get_title(loc="left") for ax in drawn.figure.axes]
    assert titles == [f"segment A: best series: {means.idxmin()}",
                      f"segment A: worst series: {means.idxmax()}"]
    assert note.startswith(f"forecaster {best}")
    everything = series_extremes(view, results.scores, best)
    assert set(everything) <= set(raw["series"])  # None means every series


def test_forecasts_of_a_subset_without_scores_say_so(tmp_path: Path) -> None:
    view, results = _view(make_results(tmp_path / "r", runs=1))
    drawn, note = draw_forecasts(view, results.forecasts, results.scores, ["nowhere"])
    assert drawn is None and note == f"{view.best()} has no scored series"


# --------------------------------------------------------------------------- tables


class _Cells(HTMLParser):
    """Rows of (tag, attributes, text) cells and the attributes of the scroll box, parsed with
    the standard library's HTML parser."""

    def __init__(self) -> None:
        super().__init__()
        self.rows: list[list[tuple[str, dict[str, str], str]]] = []
        self.boxes: list[dict[str, str]] = []
        self._cell: list | None = None

    def handle_starttag(self, tag: str, attrs: list) -> None:
        a = {k: v or "" for k, v in attrs}
        if tag == "div" and "scroll" in a.get("class", ""):
            self.boxes.append(a)
        elif tag == "tr":
            self.rows.append([])
        elif tag in ("td", "th"):
            self._cell = [tag, a, ""]

    def handle_data(self, data: str) -> None:
        if self._cell is not None:
            self._cell[2] += data

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self._cell is not None:
            self.rows[-1].append(tuple(self._cell))
            self._cell = None


def _parse(text: str) -> _Cells:
    parser = _Cells()
    parser.feed(text)
    return parser


def test_segment_table_shades_skill_and_scrolls() -> None:
    # synthetic: no segments exist yet; rows forecasters, columns segments, skill in percent
    frame = pd.DataFrame(
        {"smooth": [31.25, -4.0, 0.0], "lumpy": [-62.5, 12.0, 0.0], "A <tier>": [np.nan, 3.0, 0.0]},
        index=["theta", "ets", "seasonal_naive"],
    )
    parsed = _parse(segment_skill_html(frame, reference="seasonal_naive"))
    assert len(parsed.boxes) == 1 and parsed.boxes[0]["tabindex"] == "0"
    head, *body = parsed.rows
    assert [c[2] for c in head] == ["forecaster", "smooth", "lumpy", "A <tier>"]  # escaped
    assert "sticky" in head[0][1]["class"] and all("sticky" in r[0][1]["class"] for r in body)
    texts = [[c[2] for c in r] for r in body]
    assert texts == [["theta", "+31.2%", "-62.5%", "-"], ["ets", "-4.0%", "+12.0%", "+3.0%"],
                     ["seasonal_naive", "0.0%", "0.0%", "0.0%"]]
    styles = [[c[1].get("style", "") for c in r[1:]] for r in body]
    assert "46,139,87" in styles[0][0] and "192,57,43" in styles[0][1]  # green gain, red loss
    assert styles[0][2] == "" and styles[2] == ["", "", ""]  # no score, no change: no shade
    # deeper for a larger skill, full at 50% and beyond
    alpha = [float(skill_shade(v).rsplit(",", 1)[1].rstrip(")")) for v in (3, 12, 50, 90)]
    assert alpha[0] < alpha[1] < alpha[2] == alpha[3]


def test_leaderboard_table_formats_each_column_alike(tmp_path: Path) -> None:
    view, _ = _view(make_results(tmp_path / "r", runs=1))
    parsed = _parse(leaderboard_html(view))
    head, *body = parsed.rows
    names = [c[2] for c in head]
    assert names[:4] == ["forecaster", "rank", "role", "mase"]
    col = {n: [r[i][2] for r in body] for i, n in enumerate(names)}
    decimals = {len(v.split(".")[1]) for v in col["mase"]}
    assert len(decimals) == 1  # one number of decimals for the whole column
    ref = col["forecaster"].index(REFERENCE)
    assert col["skill"][ref] == "0.0%" and col["Wilcoxon p"][ref] == "-"
    expected = (1 - view.board["mase_rel"]) * 100
    assert [float(s.rstrip("%")) for s in col["skill"]] == pytest.approx(expected, abs=0.05)
    assert "complete" not in names  # an older folder: no complete column, no error


def test_optional_columns_are_read_in_one_place(tmp_path: Path) -> None:
    view, results = _view(make_results(tmp_path / "r", runs=1))
    assert complete_flags(view.board) is None
    board = view.board.assign(complete=["true", "false", "true", "true", "true"])
    assert complete_flags(board).tolist() == [True, False, True, True, True]
    parsed = _parse(leaderboard_html(DatasetView(view.dataset, view.rank_by, board,
                                                 view.reference, view.looks)))
    assert [c[2] for c in parsed.rows[0]][-1] == "complete"
    assert fold_key(results.scores) == "origin"  # one origin per fold in the fixture
    assert fold_key(results.scores.drop(columns="origin")) == "fold"
    two = results.scores.copy()
    two.loc[two["series"] == "north", "origin"] = "2000-01-01"  # origins differ within a fold
    assert fold_key(two) == "fold"
    assert set(metric_flags(["mae", "mape", "r2", "coverage_80", "unknown"])) == {"mape", "r2"}


def test_metrics_table_flags_unreliable_metrics(tmp_path: Path) -> None:
    view, _ = _view(make_results(tmp_path / "r", runs=1))
    board = view.board.assign(mape_mean=12.5, mape_sd=1.25)
    text = metrics_html(DatasetView(view.dataset, view.rank_by, board, view.reference,
                                    view.looks))
    head = [c[2] for c in _parse(text).rows[0]]
    assert head == ["forecaster", "mae", "mase", "mape \u2020"]
    assert "† mape: unreliable for comparing forecasts (undefined" in text
    assert "12.50 \u00b1 1.25" in text
