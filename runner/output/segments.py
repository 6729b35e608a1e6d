"""Writing the results by segment: leaderboard_segments.csv / .md and series_segments.csv.

Written only when the config names ``segments:``; what a segment is and how its leaderboard is
computed is in :mod:`runner.scoring.segments`. The CSV has the leaderboard's columns after
``dataset``, ``attribute`` and ``segment``, with the leaderboard's fixed number format; the
Markdown opens with the skill of each forecaster per segment (one table per dataset and
attribute, to read at a glance), then gives each segment's leaderboard as leaderboard.md does.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from runner.output.reader import SEGMENT_LEADERBOARD
from runner.output.tables import to_csv_text, to_markdown
from runner.scoring.classify import ADI_CUTOFF, CV2_CUTOFF, TIER_SHARES
from runner.scoring.evaluate import Evaluation
from runner.scoring.segments import (
    SEGMENT_KEYS,
    build_segment_leaderboard,
    segment_skill,
    series_segments,
)

SEGMENT_MARKDOWN = "leaderboard_segments.md"
SERIES_SEGMENTS = "series_segments.csv"


def segment_notes(ev: Evaluation) -> list[str]:
    """What each derived segment means, and which datasets an attribute does not apply to."""
    cfg = ev.plan.config
    adi, cv2 = f"{ADI_CUTOFF:g}", f"{CV2_CUTOFF:g}"
    notes = []
    if "demand_pattern" in cfg.segments:
        notes.append(
            "demand_pattern: Syntetos, Boylan & Croston (2005), on each series' history up to "
            "its first origin (series_segments.csv, history_until): ADI = periods / periods "
            f"with demand, CV² = squared coefficient of variation of the non-zero values; "
            f"smooth: ADI < {adi} and CV² < {cv2}; erratic: ADI < {adi}, CV² >= {cv2}; "
            f"intermittent: ADI >= {adi}, CV² < {cv2}; lumpy: ADI >= {adi}, CV² >= {cv2}; "
            "too_few_demands: fewer than 2 periods with demand."
        )
    if "volume_tier" in cfg.segments:
        notes.append(
            "volume_tier: series by mean volume per period over the same history, largest "
            f"first: A up to {TIER_SHARES[0]:.0%} of the total volume (with the series that "
            f"crosses it), B up to {TIER_SHARES[1]:.0%} (likewise), then C."
        )
    for ds in cfg.datasets:
        missing = [s for s in cfg.segments if s not in cfg.dataset_segments(ds)]
        if missing:
            notes.append(f"{ds.name}: not segmented by {', '.join(missing)} (not among its "
                         "attributes).")
    return notes


def segments_markdown(board: pd.DataFrame, rank_by: str, metrics: list[str],
                      notes: list[str] | None = None,
                      order: dict[str, list[str]] | None = None) -> str:
    """leaderboard_segments.md from the segment leaderboard (see the module docstring).

    ``order`` lists each dataset's forecasters in the order the skill tables show them (its
    leaderboard's order, so every table of a dataset reads alike).
    """
    out = ["# Skill by segment", "",
           f"Skill against the reference: 1 - {rank_by}_rel, in percent, on each segment's "
           "series (positive: better than the reference there).", ""]
    for (dataset, attribute), _ in board.groupby(["dataset", "attribute"], sort=False):
        skill = segment_skill(board, str(dataset), str(attribute),
                              (order or {}).get(str(dataset)))
        out.append(f"## {dataset}: {attribute}\n")
        out.append("| forecaster | " + " | ".join(str(c) for c in skill.columns) + " |")
        out.append("|---|" + "|".join("---:" for _ in skill.columns) + "|")
        for name, values in skill.iterrows():
            cells = ["-" if np.isnan(v) else f"{v:+.1f}%" for v in values.tolist()]
            out.append(f"| {name} | " + " | ".join(cells) + " |")
        out.append("")
    out += ["# Leaderboard by segment", ""]
    # Each segment becomes one "dataset" of the leaderboard's own Markdown, titled by its key.
    titles = {}
    for key, block in board.groupby(list(SEGMENT_KEYS), sort=False):
        dataset, attribute, value = (str(k) for k in key)
        beats = [str(f) for f in block.loc[block["beats_reference"].astype(bool), "forecaster"]]
        verdict = ("beats the reference: " + ", ".join(beats) if beats
                   else "nothing beats the reference")
        series = int(block["series"].max())
        titles[key] = f"{dataset}: {attribute} = {value} ({series} series; {verdict})"
    keys = list(zip(*(board[k] for k in SEGMENT_KEYS)))
    titled = board.drop(columns=list(SEGMENT_KEYS)).assign(dataset=[titles[k] for k in keys])
    titled = titled[["dataset", *[c for c in titled.columns if c != "dataset"]]]
    out.append(to_markdown(titled, rank_by, metrics).rstrip("\n"))
    out.append("Within each segment, ranks, scores, the relative score and the significance "
               "columns are computed on that segment's series only.")
    out.extend(notes or [])
    return "\n".join(out) + "\n"


def write_segment_files(ev: Evaluation, folder: Path, leaderboard: pd.DataFrame) -> None:
    """Write the segment files into ``folder`` (nothing when the config names no segments);
    ``leaderboard`` is the run's leaderboard (its order is the skill tables' row order)."""
    cfg = ev.plan.config
    if not cfg.segments:
        return
    assert cfg.rank_by is not None and cfg.metrics is not None  # filled in by prepare
    board = build_segment_leaderboard(ev)
    order = {str(d): [str(f) for f in block["forecaster"]]
             for d, block in leaderboard.groupby("dataset", sort=False)}
    (folder / SEGMENT_LEADERBOARD).write_text(to_csv_text(board), encoding="utf-8")
    (folder / SEGMENT_MARKDOWN).write_text(
        segments_markdown(board, cfg.rank_by, cfg.metrics, segment_notes(ev), order),
        encoding="utf-8",
    )
    (folder / SERIES_SEGMENTS).write_text(to_csv_text(series_segments(ev)), encoding="utf-8")
