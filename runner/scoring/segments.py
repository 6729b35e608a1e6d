"""Results by segment: the leaderboard within each group of series that share a label.

A segment is the set of a dataset's series with one value of one segment attribute: a series
attribute the config reads (``attributes:`` of a dataset, :mod:`runner.data.attributes`) or
a segment castgrid derives (demand pattern, volume tier: :mod:`runner.scoring.classify`). The
config's top-level ``segments:`` names the attributes to segment by.

Within a segment everything is the leaderboard's own computation
(:func:`runner.scoring.leaderboard.dataset_rows`) on that segment's tasks only: fold means and
sds, ``complete``, ranks, the relative score and the significance columns (the Wilcoxon test
over the segment's series, the Diebold-Mariano counts over them). So a forecaster can beat the
reference on the dataset and not within a segment, and a small segment (fewer than 6 series)
needs the per-series test on every series to count as a win, as the leaderboard does.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from runner.config import Config
from runner.scoring.classify import (
    DEMAND_PATTERNS,
    VOLUME_TIERS,
    DerivedSegments,
    derive_segments,
)
from runner.scoring.evaluate import Evaluation
from runner.scoring.leaderboard import board_columns, dataset_rows
from runner.windows.plan import DatasetPlan

#: The columns that name a segment, before the leaderboard's own columns.
SEGMENT_KEYS = ("dataset", "attribute", "segment")
#: Segment values of the derived attributes, in the order outputs list them.
DERIVED_ORDER = {"demand_pattern": DEMAND_PATTERNS, "volume_tier": VOLUME_TIERS}


@dataclass
class DatasetSegments:
    """The segment labels of one dataset: per attribute, one label per panel series ('' for a
    series with no fold)."""

    names: list[str]
    labels: dict[str, np.ndarray] = field(default_factory=dict)
    derived: DerivedSegments | None = None

    def values(self, name: str) -> list[str]:
        """The attribute's values among the evaluated series, in output order: the derived
        classes in their fixed order, attribute values in text order."""
        present = {str(v) for v in self.labels[name] if v != ""}
        if name in DERIVED_ORDER:
            return [v for v in DERIVED_ORDER[name] if v in present]
        return sorted(present)


def dataset_segments(cfg: Config, dp: DatasetPlan) -> DatasetSegments:
    """The labels of every segment attribute of ``cfg.segments`` that applies to ``dp``."""
    ds = next(d for d in cfg.datasets if d.name == dp.panel.name)
    names = cfg.dataset_segments(ds)
    out = DatasetSegments(names)
    evaluated = np.zeros(dp.panel.n_series, dtype=bool)
    evaluated[dp.series] = True
    if any(n in DERIVED_ORDER for n in names):
        out.derived = derive_segments(dp)
    for name in names:
        if name in DERIVED_ORDER:
            labels = getattr(out.derived, name)
        else:
            labels = np.where(evaluated, dp.panel.attributes[name], "").astype(object)
        out.labels[name] = labels
    return out


def build_segment_leaderboard(ev: Evaluation) -> pd.DataFrame:
    """One leaderboard per dataset, segment attribute and segment value, stacked.

    Columns: ``dataset``, ``attribute``, ``segment``, then the leaderboard's columns (rank
    within the segment). Rows by dataset, then attribute in ``segments:`` order, then segment
    value (:meth:`DatasetSegments.values`), then rank. Empty (with those columns) when the
    config names no segments.
    """
    cfg = ev.plan.config
    columns = [*SEGMENT_KEYS, *board_columns(ev)[1:]]
    rows = []
    for dr in ev.datasets:
        dp = dr.plan
        segs = dataset_segments(cfg, dp)
        for name in segs.names:
            task_labels = segs.labels[name][dp.series]
            for value in segs.values(name):
                for row in dataset_rows(ev, dr, task_labels == value):
                    rows.append({"attribute": name, "segment": value, **row})
    return pd.DataFrame(rows, columns=columns)


def series_segments(ev: Evaluation) -> pd.DataFrame:
    """One row per dataset and evaluated series: its label for each of ``segments:``, and,
    when a derived segment is asked for, the numbers behind it.

    Columns: ``dataset``, ``series``, one per segment attribute (empty where a dataset does not
    have it), ``history_until`` (the series' first origin: its history up to there is what the
    derived segments use), ``adi``, ``cv2``, ``demands`` (demand pattern) and
    ``volume_share`` (volume tier).
    """
    cfg = ev.plan.config
    derived = [n for n in cfg.segments if n in DERIVED_ORDER]
    extra = (["history_until"] if derived else []) + (
        ["adi", "cv2", "demands"] if "demand_pattern" in derived else []) + (
        ["volume_share"] if "volume_tier" in derived else [])
    frames = []
    for dr in ev.datasets:
        dp = dr.plan
        segs = dataset_segments(cfg, dp)
        series = np.unique(dp.series)
        part: dict[str, object] = {
            "dataset": dp.panel.name,
            "series": [dp.panel.keys[i] for i in series],
        }
        for name in cfg.segments:
            part[name] = segs.labels[name][series] if name in segs.labels else ""
        d = segs.derived
        if d is not None:
            part["history_until"] = dp.panel.format_time(d.history_end[series] - 1)
            if "demand_pattern" in derived:
                part.update(adi=d.adi[series], cv2=d.cv2[series], demands=d.demands[series])
            if "volume_tier" in derived:
                part["volume_share"] = d.volume_share[series]
        frames.append(pd.DataFrame(part, columns=["dataset", "series", *cfg.segments, *extra]))
    if not frames:
        return pd.DataFrame(columns=["dataset", "series", *cfg.segments, *extra])
    return pd.concat(frames, ignore_index=True)


def segment_skill(
    segments: pd.DataFrame, dataset: str, attribute: str, order: list[str] | None = None
) -> pd.DataFrame:
    """Skill against the reference per forecaster and segment, in percent: one table to read
    at a glance.

    ``segments`` is the segment leaderboard (:func:`build_segment_leaderboard`, or
    leaderboard_segments.csv as read back). Rows are forecasters (``order`` when given, e.g.
    the dataset's leaderboard order; else as they first appear, which is the rank order of the
    first segment), columns the attribute's segment values in file order, values
    ``(1 - <rank_by>_rel) * 100``: positive where the forecaster's rank metric is below the
    reference's on that segment's series, NaN where there is no ratio. The reference's row is
    0 wherever the ratio is defined.

    >>> frame = pd.DataFrame({"dataset": "d", "attribute": "a", "segment": ["x", "x", "y", "y"],
    ...                       "forecaster": ["m", "ref", "ref", "m"],
    ...                       "mase_rel": [0.8, 1.0, 1.0, 1.25]})
    >>> segment_skill(frame, "d", "a").round(6).to_dict("index")
    {'m': {'x': 20.0, 'y': -25.0}, 'ref': {'x': 0.0, 'y': 0.0}}
    """
    rel = [c for c in segments.columns if c.endswith("_rel")]
    if len(rel) != 1:
        raise ValueError(f"expected one <rank_by>_rel column, found {rel or 'none'}")
    part = segments[(segments["dataset"] == dataset) & (segments["attribute"] == attribute)]
    if part.empty:
        raise ValueError(f"no segment rows for dataset {dataset!r} and attribute {attribute!r}")
    columns = list(dict.fromkeys(str(v) for v in part["segment"]))
    names = list(dict.fromkeys(str(v) for v in part["forecaster"]))
    if order is not None:
        names = [n for n in order if n in names] + [n for n in names if n not in order]
    skill = part.assign(skill=(1.0 - part[rel[0]].astype(float)) * 100.0)
    table = skill.pivot_table(index="forecaster", columns="segment", values="skill",
                              aggfunc="first", dropna=False, sort=False)
    table = table.reindex(index=names, columns=columns).astype(float)
    table.index.name, table.columns.name = "forecaster", "segment"
    return table
