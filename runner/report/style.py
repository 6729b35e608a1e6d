"""How the report looks: each forecaster's look in the plots, matplotlib's settings, the CSS.

Each forecaster drawn gets a :class:`Look` that combines a colour, a marker and a line style, so
that no two forecasters of a dataset look alike even where colours repeat or print in grey:

* the reference is emphasised: black, thick, dashed, with filled squares;
* candidates are solid and bold, in the colour-blind-safe palette of Okabe & Ito (2008), "Color
  Universal Design", with filled markers; after six candidates the line style changes, and the
  marker cycle (seven long) runs out of step with the colours;
* baselines are muted: thin, each with its own dash pattern, a muted colour and a hollow marker.

A forecaster keeps its look in every plot of its dataset.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # the command line imports this module at start; pandas loads when used
    import pandas as pd

#: Okabe & Ito (2008) colours, yellow left out (unreadable on white).
CANDIDATE_COLORS = ("#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9")
#: Muted colours, distinct from one another, for the benchmarks.
BASELINE_COLORS = ("#7f7f7f", "#a6761d", "#7570b3", "#8f8f2f", "#5f9ea0", "#b07aa1", "#b5835a")
#: Seven markers: a length prime to the six colours, so (colour, marker) repeats after 42.
MARKERS = ("o", "s", "^", "D", "v", "P", "X")
#: Line styles of candidates: solid first, then dash-dot and long dashes.
CANDIDATE_LINES: tuple[Any, ...] = ("-", (0, (8, 2, 2, 2)), (0, (10, 3)))
#: Dash patterns of baselines: dashed, dotted, dash-dot, dash-dot-dot.
BASELINE_LINES: tuple[Any, ...] = ((0, (5, 2)), (0, (1, 1.6)), (0, (6, 2, 1, 2)),
                                   (0, (3, 1.5, 1, 1.5, 1, 1.5)))
#: Five hollow markers for baselines: five is prime to the seven colours and four dashes.
BASELINE_MARKERS = ("o", "s", "^", "D", "v")
REFERENCE_COLOR = "#111111"
#: The actual values in the forecasts plot.
ACTUAL_COLOR = "#000000"


@dataclass(frozen=True)
class Look:
    """How one forecaster is drawn."""

    color: str
    marker: str
    linestyle: Any
    linewidth: float
    filled: bool = True
    zorder: float = 2.0

    def key(self) -> tuple[Any, ...]:
        """What makes two looks alike: colour, marker, line style and fill."""
        return (self.color, self.marker, self.linestyle, self.filled)

    def line(self, markersize: float = 4.5) -> dict[str, Any]:
        """Keyword arguments for ``Axes.plot``."""
        return {"color": self.color, "marker": self.marker, "linestyle": self.linestyle,
                "linewidth": self.linewidth, "markersize": markersize,
                "markerfacecolor": self.color if self.filled else "white",
                "markeredgecolor": self.color, "markeredgewidth": 1.1, "zorder": self.zorder}


REFERENCE_LOOK = Look(REFERENCE_COLOR, "s", (0, (6, 2.5)), 2.4, True, 4.0)
#: Any forecaster not in the dataset's table (should not happen; keeps a plot drawable).
FALLBACK_LOOK = Look("#999999", ".", ":", 1.0, True, 1.0)


def candidate_look(i: int) -> Look:
    """The ``i``-th candidate's look (0-based, in rank order)."""
    n = len(CANDIDATE_COLORS)
    line = CANDIDATE_LINES[(i // n) % len(CANDIDATE_LINES)]
    return Look(CANDIDATE_COLORS[i % n], MARKERS[i % len(MARKERS)], line, 2.0, True, 3.0)


def baseline_look(i: int) -> Look:
    """The ``i``-th baseline's look (0-based, in rank order, the reference left out)."""
    return Look(BASELINE_COLORS[i % len(BASELINE_COLORS)],
                BASELINE_MARKERS[i % len(BASELINE_MARKERS)],
                BASELINE_LINES[i % len(BASELINE_LINES)], 1.4, False, 2.0)


def forecaster_looks(board: pd.DataFrame, reference: str | None) -> dict[str, Look]:
    """A look per forecaster of one dataset's leaderboard rows (in rank order).

    Candidates and baselines are numbered separately in rank order, so the best candidate
    always gets the first colour.
    """
    out: dict[str, Look] = {}
    cand = base = 0
    for name, role in zip(board["forecaster"], board["role"]):
        name = str(name)
        if name in out:
            continue
        if name == reference:
            out[name] = REFERENCE_LOOK
        elif role == "candidate":
            out[name] = candidate_look(cand)
            cand += 1
        else:
            out[name] = baseline_look(base)
            base += 1
    return out


#: matplotlib settings of every plot.
RC = {
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
    "legend.handlelength": 3.2,  # long enough to show a dash pattern and a marker
    "savefig.dpi": 110,
}

#: Skill at or beyond this many percent points gets the strongest shading in tables.
SHADE_FULL = 50.0


def skill_shade(percent: float | None) -> str:
    """A background colour for a skill in percent: green above 0, red below, none if missing."""
    if percent is None or not math.isfinite(percent) or percent == 0:
        return ""
    alpha = 0.08 + 0.5 * min(abs(percent) / SHADE_FULL, 1.0)
    rgb = "46,139,87" if percent > 0 else "192,57,43"
    return f"background:rgba({rgb},{alpha:.2f})"


# The page's CSS. Tables sit in a .scroll box that scrolls sideways instead of cutting the
# table; its first column sticks to the left edge, and a shadow at an edge says there is more
# to see (background-attachment: local moves the covers with the content, scroll keeps the
# shadows at the box's edges).
CSS = """
body{font-family:-apple-system,"Segoe UI",Roboto,"Helvetica Neue",Arial,sans-serif;
 color:#1d1d1f;background:#f6f7f9;margin:0;line-height:1.45}
main{max-width:1180px;margin:0 auto;padding:24px 28px 48px}
h1{font-size:24px;margin:0 0 4px}h2{font-size:19px;margin:36px 0 6px;
 border-bottom:2px solid #d9dde3;padding-bottom:4px}h3{font-size:15px;margin:18px 0 6px}
.meta{color:#555;font-size:13px}.meta code{background:#eceff3;padding:1px 5px;border-radius:3px}
.card{background:#fff;border:1px solid #e1e4e8;border-radius:8px;padding:14px 18px;margin:14px 0;
 min-width:0}
.summary{font-size:14px}
.scroll{overflow-x:auto;max-width:100%;margin:6px 0;
 background:linear-gradient(to right,#fff 30%,rgba(255,255,255,0)) left/40px 100% no-repeat local,
 linear-gradient(to left,#fff 30%,rgba(255,255,255,0)) right/40px 100% no-repeat local,
 radial-gradient(farthest-side at 0 50%,rgba(0,0,0,.22),rgba(0,0,0,0))
  left/14px 100% no-repeat scroll,
 radial-gradient(farthest-side at 100% 50%,rgba(0,0,0,.22),rgba(0,0,0,0))
  right/14px 100% no-repeat scroll}
.scroll:focus{outline:2px solid #9ab;outline-offset:2px}
table{border-collapse:separate;border-spacing:0;font-size:12.5px}
th,td{padding:5px 9px;border-bottom:1px solid #e7e9ec;text-align:left;white-space:nowrap}
th{background:#f0f2f5;font-weight:600;vertical-align:bottom}
td.num,th.num{text-align:right;font-variant-numeric:tabular-nums}
th.sticky,td.sticky{position:sticky;left:0;z-index:1;border-right:1px solid #e1e4e8}
td.sticky{background:#fff}th.sticky{background:#f0f2f5;z-index:2}
th.key,td.key{background:#eef4fb;font-weight:600}
tr.baseline td{color:#555}tr.ref td{font-style:italic}tr.beats td.key{color:#1b7f43}
tr.incomplete td{color:#a33}
td.shade{text-align:right;font-variant-numeric:tabular-nums;min-width:4.5em}
.grid{display:grid;grid-template-columns:minmax(0,1fr);gap:14px}
figure.plot{background:#fff;border:1px solid #e1e4e8;border-radius:8px;margin:0;padding:10px}
figure.plot img{max-width:100%;height:auto;display:block;margin:0 auto}
figcaption{font-size:12.5px;color:#444;margin-top:6px}figure.missing{color:#777}
.offscale{color:#8a4b00}
.note{font-size:12.5px;color:#555}
"""
