"""``castgrid diff`` as text: a :class:`~runner.compare.diff.Diff` printed for the terminal or
as Markdown for a review comment.

Every number goes through the one formatter of human-readable output
(:mod:`runner.output.numbers`), so a score reads the same here as in the leaderboard, the
report and the history: a metric's old value, new value and change share one number of
decimals, chosen from that metric's values in the dataset (:func:`column_decimals`); ranks,
failed tasks and series counts are whole numbers; relative changes have
:data:`PERCENT_DECIMALS` decimals. Tables are aligned by :func:`format_table`.
"""

from __future__ import annotations

import math
from collections.abc import Iterable

from runner.compare.diff import (
    DatasetDiff,
    Diff,
    ForecasterChange,
    platform_text,
    relative_change,
    same_score,
    worsening,
)
from runner.output.numbers import column_decimals, format_number, format_percent, format_table
from runner.output.reader import SEGMENT_LEADERBOARD, dataset_fingerprints

#: Decimals of a relative change ("+0.05%"). Two, not the report's one: a score moving within
#: its numerical tolerance (0.1%) must still read as a non-zero change here.
PERCENT_DECIMALS = 2


def format_diff(d: Diff, markdown: bool = False, fail_pct: float | None = None) -> str:
    """The comparison as readable text, or as Markdown for a review comment.

    ``fail_pct`` (``--fail-if-worse``) marks the candidates that got worse by more than it.
    """
    lines = (["### castgrid diff", ""] if markdown else []) + _header(d, markdown)
    bullet = "- " if markdown else "  "
    for ds in d.datasets:
        lines.append("")
        lines.append(f"#### dataset {ds.name}" if markdown else f"dataset {ds.name}")
        if markdown:
            lines.append("")
        lines.extend(_dataset_lines(d, ds, bullet))
        if markdown:
            lines.append("")
        lines.append(_forecaster_table(ds, d.rank_by, markdown, fail_pct))
        lines.extend(_other_metric_lines(ds, d.rank_by, markdown, bullet))
        lines.extend(_segment_lines(ds, d.rank_by, markdown, bullet))
    lines.append("")
    lines.append(_summary(d))
    return "\n".join(lines)


def format_change_percent(percent: float) -> str:
    """A relative change as diff prints it: ``+10.00%`` (:data:`PERCENT_DECIMALS` decimals)."""
    return format_percent(percent, PERCENT_DECIMALS)


# ------------------------------------------------------------------------------ cells


def _pair(old: str, new: str) -> str:
    """One cell for a value that may have changed: ``a``, or ``a -> b``."""
    return old if old == new else f"{old} -> {new}"


def _decimals(values: Iterable[float | None]) -> int:
    # One scale per quantity: the old and new values (and their difference) of a metric
    # share it, so that they line up and read alike.
    return column_decimals(v for v in values if v is not None)


def _metric_decimals(forecasters: list[ForecasterChange], metric: str) -> int:
    return _decimals(v for f in forecasters for v in f.values.get(metric, ()))


def _value_cells(old: float, new: float, decimals: int) -> list[str]:
    """Old, new and the change of one score, with one number of decimals."""
    change = new - old if math.isfinite(old) and math.isfinite(new) else math.nan
    return [format_number(v, decimals) for v in (old, new, change)]


def _beats(value: bool | None) -> str:
    return "-" if value is None else "yes" if value else "no"


def _verdict(metric: str, old: float, new: float, noise: bool = False) -> str:
    if math.isnan(old) and math.isnan(new):
        return ""
    if math.isnan(old):
        return "new"
    if same_score(old, new):
        return "same"
    if noise:
        return "within tolerance"
    w = worsening(metric, old, new)
    return "worse" if w > 0 else "better" if w < 0 else "same"


# ------------------------------------------------------------------------------ sections


def _header(d: Diff, markdown: bool) -> list[str]:
    om, nm = d.old.manifest, d.new.manifest
    out = [
        f"old: {d.old.folder.label} (experiment {om['experiment']}, "
        f"config {om['config_hash'][:12]})",
        f"new: {d.new.folder.label} (experiment {nm['experiment']}, "
        f"config {nm['config_hash'][:12]})",
    ]
    if d.config_changed:
        shown = ", ".join(d.config_changes[:8]) or "details not in the manifests"
        more = f" and {len(d.config_changes) - 8} more" if len(d.config_changes) > 8 else ""
        out.append(f"config: changed ({shown}{more})")
    else:
        out.append("config: unchanged")
    out.append("versions: " + ("changed (" + ", ".join(d.version_changes) + ")"
                               if d.version_changes else "unchanged"))
    missing = [side for side, m in (("old", om), ("new", nm)) if "platform" not in m]
    if missing:
        where = "" if len(missing) == 2 else f" in the {missing[0]} results"
        out.append(f"platform: not recorded{where}: scores are compared within the numerical "
                   "tolerance")
    elif d.platform_changes:
        out.append("platform: changed (" + "; ".join(d.platform_changes) + "): scores are "
                   "compared within the numerical tolerance")
    else:
        out.append(f"platform: unchanged ({nm['platform'].get('machine', '?')}, BLAS "
                   f"{platform_text(nm['platform'].get('blas') or [])}): scores are compared "
                   "exactly")
    if om["rank_by"] != nm["rank_by"]:
        out.append(f"rank metric: {nm['rank_by']} (was {om['rank_by']}; ranks are not "
                   "comparable)")
    else:
        out.append(f"rank metric: {nm['rank_by']}")
    return [f"- {line}" for line in out] if markdown else out




def _dataset_lines(d: Diff, ds: DatasetDiff, bullet: str) -> list[str]:
    """A dataset's status, data, forecasts files, reference and forecasters added or gone."""
    lines = []
    if ds.status != "both":
        lines.append(f"{bullet}dataset {'added' if ds.status == 'added' else 'gone'}"
                     + (f" ({ds.data_note})" if ds.data_note else ""))
    else:
        fp_old = dataset_fingerprints(d.old.manifest).get(ds.name) or "?"
        fp_new = dataset_fingerprints(d.new.manifest).get(ds.name) or "?"
        if ds.data_changed:
            lines.append(f"{bullet}data: CHANGED (fingerprint {fp_old[:12]} -> "
                         f"{fp_new[:12]}; {ds.data_note})")
        else:
            lines.append(f"{bullet}data: unchanged ({ds.data_note})" if ds.data_note
                         else f"{bullet}data: unchanged")
    for candidate, _, text in ds.files:
        lines.append(f"{bullet}forecasts file of {candidate}: {text}")
    ro, rn = ds.reference
    if ro != rn and ds.status == "both":
        lines.append(f"{bullet}reference: {ro} -> {rn}")
    elif rn or ro:
        lines.append(f"{bullet}reference: {rn or ro}")
    if ds.added:
        lines.append(f"{bullet}added: {', '.join(ds.added)}")
    if ds.gone:
        lines.append(f"{bullet}gone: {', '.join(ds.gone)}")
    return lines


def _forecaster_table(ds: DatasetDiff, m: str, markdown: bool, fail_pct: float | None) -> str:
    """One row per forecaster: rank, the rank metric old and new, its change, the verdict."""
    header = ["rank", "forecaster", "role", f"{m} old", f"{m} new", "change", "change %",
              "failed", ""]
    decimals = _metric_decimals(ds.forecasters, m)
    rank_d = _decimals(r for f in ds.forecasters for r in (f.old_rank, f.new_rank))
    failed_d = _decimals(v for f in ds.forecasters for v in f.failed)
    rows = []
    for f in ds.forecasters:
        old, new = f.values.get(m, (math.nan, math.nan))
        verdict = "gone" if not f.in_new else "added" if not f.in_old else _verdict(
            m, old, new, f.within_tolerance(m))
        if (fail_pct is not None and f.role == "candidate" and verdict == "worse"
                and worsening(m, old, new) > fail_pct):
            verdict = f"worse > {fail_pct:g}%"
        rank = _pair(format_number(f.old_rank, rank_d), format_number(f.new_rank, rank_d))
        failed = _pair(*(format_number(v, failed_d) for v in f.failed))
        rows.append([rank, f.name, f.role, *_value_cells(old, new, decimals),
                     format_change_percent(relative_change(old, new)), failed, verdict])
    return format_table(header, rows, markdown, indent="" if markdown else "  ")


def _other_metric_lines(ds: DatasetDiff, m: str, markdown: bool, bullet: str) -> list[str]:
    """The scores of the other metrics that changed (each metric on its own scale)."""
    decimals = {metric: _metric_decimals(ds.forecasters, metric)
                for f in ds.forecasters for metric in f.values}
    other = []
    for f in ds.forecasters:
        if not (f.in_old and f.in_new):
            continue
        for metric, (old, new) in f.values.items():
            if metric == m or same_score(old, new):
                continue
            other.append([f.name, metric, *_value_cells(old, new, decimals[metric]),
                          format_change_percent(relative_change(old, new)),
                          "within tolerance" if f.within_tolerance(metric) else ""])
    if not other:
        if ds.status == "both" and ds.forecasters:
            return [f"{bullet}other metrics: unchanged"]
        return []
    header = ["forecaster", "metric", "old", "new", "change", "change %", ""]
    return ["", "other metrics that changed:", *([""] if markdown else []),
            format_table(header, other, markdown, indent="" if markdown else "  ")]


def _segment_lines(ds: DatasetDiff, m: str, markdown: bool, bullet: str) -> list[str]:
    """The segment section of one dataset: the rows that changed, or that none did."""
    if ds.segments_note:
        return [f"{bullet}segments: {ds.segments_note}; not compared"]
    if not ds.segments:
        return []
    changed = [s for s in ds.segments if s.changed()]
    if not changed:
        return [f"{bullet}segments: unchanged ({len(ds.segments)} rows of {SEGMENT_LEADERBOARD})"]
    lines = ["", f"segments that changed ({len(changed)} of {len(ds.segments)} rows of "
             f"{SEGMENT_LEADERBOARD}):"]
    if markdown:
        lines.append("")
    # Scales from every row of the dataset's segments, changed or not: the same data shows
    # the same decimals whichever rows moved.
    decimals = _decimals(v for s in ds.segments for v in s.value)
    rank_d = _decimals(r for s in ds.segments for r in s.rank)
    series_d = _decimals(v for s in ds.segments for v in s.series)
    rows = []
    for s in changed:
        old, new = s.value
        verdict = ("gone" if s.rank[1] is None else "added" if s.rank[0] is None
                   else _verdict(m, old, new, noise=s.within_tolerance()))
        rows.append([s.attribute, s.segment, s.forecaster,
                     _pair(*(format_number(v, series_d) for v in s.series)),
                     _pair(*(format_number(v, rank_d) for v in s.rank)),
                     format_number(old, decimals), format_number(new, decimals),
                     format_change_percent(relative_change(old, new)),
                     _pair(_beats(s.beats[0]), _beats(s.beats[1])), verdict])
    header = ["attribute", "segment", "forecaster", "series", "rank", f"{m} old", f"{m} new",
              "change %", "beats ref", ""]
    lines.append(format_table(header, rows, markdown, indent="" if markdown else "  "))
    return lines


def _summary(d: Diff) -> str:
    """One closing line: nothing changed, or what kinds of change there were."""
    noise = d.within_tolerance()
    if not d.changed():
        if not noise:
            files = " forecasts files," if any(ds.files for ds in d.datasets) else ""
            return f"no change: same config, data,{files} forecasters and scores"
        why = " (platform changed)" if d.platform_changes else ""
        return (f"no change beyond numerical tolerance: same config, data and forecasters; "
                f"{noise} score(s) differ within tolerance{why}")
    parts = []
    if d.config_changed:
        parts.append("config changed")
    if d.version_changes:
        parts.append("library versions changed")
    data = [ds.name for ds in d.datasets if ds.data_changed]
    if data:
        parts.append(f"data changed for {', '.join(data)}")
    files = [name for ds in d.datasets for name, changed, _ in ds.files if changed]
    if files:
        parts.append(f"forecasts file changed for {', '.join(files)}")
    for status in ("added", "gone"):
        names = [ds.name for ds in d.datasets if ds.status == status]
        if names:
            parts.append(f"dataset {status}: {', '.join(names)}")
    added = sum(len(ds.added) for ds in d.datasets)
    gone = sum(len(ds.gone) for ds in d.datasets)
    if added or gone:
        parts.append(f"{added} forecaster(s) added, {gone} gone")
    moved = sum(1 for ds in d.datasets for f in ds.forecasters
                if f.in_old and f.in_new and f.really_differs(d.rank_by))
    parts.append(f"{moved} {d.rank_by} score(s) changed")
    segments = sum(1 for ds in d.datasets for s in ds.segments if s.changed())
    if segments:
        parts.append(f"{segments} segment row(s) changed")
    if noise:
        parts.append(f"{noise} score(s) within tolerance")
    if d.platform_changes:
        parts.append("platform changed")
    return "changed: " + "; ".join(parts)
