"""``castgrid diff OLD NEW``: what changed between two evaluations, and whether it is the model.

For every dataset it lists forecasters added and gone, rank changes, each metric's change
(absolute and relative), and whether the config, the data, the library versions or the platform
(CPU, BLAS library and kernel) changed, so a better score can be told apart from different data
or a different machine. ``--fail-if-worse PCT`` makes the command a gate: exit code 4 when a
candidate's rank metric got worse by more than PCT percent.

On one platform a rerun gives the same bits, so every difference counts. When the two
manifests record different platforms (or either records none), a score that moved by no more
than its numerical tolerance (:func:`runner.scoring.metrics.noise_tolerance`: 1% of the value,
5% for interval scores, one interval hit per fold for coverage) is shown as "within
tolerance": what another CPU or BLAS kernel does to the same computation. It is not a change in
the closing line and never trips ``--fail-if-worse``.

OLD and NEW are results folders or ``REV:path`` read from git (see :mod:`runner.output.reader`).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from runner.output.reader import (
    SEGMENT_LEADERBOARD,
    ResultsFolder,
    dataset_fingerprints,
    read_leaderboard,
    read_manifest,
    read_segment_leaderboard,
)

if TYPE_CHECKING:
    import pandas as pd

#: Exit code when a candidate got worse than --fail-if-worse allows.
EXIT_WORSE = 4
_NUMERIC = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?%?$|^-$|^$|^nan$")


# ------------------------------------------------------------------------------ text tables


def _numeric(cell: str) -> bool:
    """A number, a percentage, '-' or 'a -> b' of those: right-aligned in a table."""
    return all(_NUMERIC.match(part.strip()) for part in cell.split(" -> "))


def render_table(header: list[str], rows: list[list[Any]], markdown: bool = False,
                 indent: str = "") -> str:
    """A plain-text table (columns padded, numbers right-aligned) or a Markdown table."""
    cells = [[str(c) for c in header]] + [["" if c is None else str(c) for c in r] for r in rows]
    ncol = len(header)
    right = [
        len(cells) > 1 and all(_numeric(r[i]) for r in cells[1:]) for i in range(ncol)
    ]
    if markdown:
        esc = [[c.replace("|", "\\|") for c in r] for r in cells]
        lines = ["| " + " | ".join(esc[0]) + " |",
                 "|" + "|".join("---:" if right[i] else "---" for i in range(ncol)) + "|"]
        lines += ["| " + " | ".join(r) + " |" for r in esc[1:]]
        return "\n".join(indent + line for line in lines)
    widths = [max(len(r[i]) for r in cells) for i in range(ncol)]

    def line(r: list[str]) -> str:
        parts = [r[i].rjust(widths[i]) if right[i] else r[i].ljust(widths[i])
                 for i in range(ncol)]
        return (indent + "  ".join(parts)).rstrip()

    rule = indent + "  ".join("-" * w for w in widths)
    return "\n".join([line(cells[0]), rule] + [line(r) for r in cells[1:]])


def _num(v: float | None) -> str:
    if v is None or not math.isfinite(v):
        return "-"
    return format(v, ".6g")


def percent_text(v: float | None) -> str:
    if v is None or math.isnan(v):
        return "-"
    if math.isinf(v):
        return "+inf%" if v > 0 else "-inf%"
    return f"{v:+.2f}%"


# ------------------------------------------------------------------------------ the comparison


@dataclass
class Results:
    """A results folder's manifest and numeric leaderboard (and segment leaderboard, if any)."""

    folder: ResultsFolder
    manifest: dict[str, Any]
    leaderboard: pd.DataFrame
    segments: pd.DataFrame | None = None

    @classmethod
    def load(cls, spec: str) -> Results:
        """Read a folder (or ``REV:path``); DataError names what is missing."""
        folder = ResultsFolder.open(spec)
        manifest = read_manifest(folder)
        board = read_leaderboard(folder, manifest["rank_by"])
        segments = read_segment_leaderboard(folder, manifest["rank_by"])
        return cls(folder, manifest, board, segments)

    @property
    def metrics(self) -> list[str]:
        """Metric columns of the leaderboard (``mase``, ``coverage_80``), in file order."""
        return [c[: -len("_mean")] for c in self.leaderboard.columns if c.endswith("_mean")]

    def datasets(self) -> list[str]:
        """Datasets in leaderboard order."""
        return list(dict.fromkeys(self.leaderboard["dataset"]))

    def rows(self, dataset: str) -> dict[str, dict[str, Any]]:
        """forecaster -> its leaderboard row (as a dict), for one dataset."""
        part = self.leaderboard[self.leaderboard["dataset"] == dataset]
        return {str(r["forecaster"]): r for r in part.to_dict("records")}


def relative_change(old: float, new: float) -> float:
    """(new - old) / |old| in percent; inf when old is 0 and new is not, NaN without values."""
    if not (math.isfinite(old) and math.isfinite(new)):
        return math.nan
    if old == 0:
        return 0.0 if new == 0 else math.copysign(math.inf, new)
    return (new - old) / abs(old) * 100.0


def worsening(metric: str, old: float, new: float) -> float:
    """How much worse ``new`` is than ``old`` in percent (negative: better).

    Lower is better for error metrics, closer to 0 for ``me``, higher for ``r2``; a score
    that disappeared (NaN, e.g. every task failed) counts as infinitely worse.
    """
    from runner.scoring.metrics import info

    if math.isfinite(old) and not math.isfinite(new):
        return math.inf
    direction = info(metric).better
    if direction == "abs":
        old, new = abs(old), abs(new)
    elif direction == "higher":
        old, new = -old, -new
    elif direction == "target":
        target = info(metric).target
        old, new = abs(old - target), abs(new - target)
    return relative_change(old, new)


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, float) and isinstance(b, float):
        return (math.isnan(a) and math.isnan(b)) or a == b
    return a == b


def _dict_changes(old: Any, new: Any, prefix: str = "") -> list[str]:
    """Dotted paths of keys whose values differ between two nested JSON values."""
    if isinstance(old, dict) and isinstance(new, dict):
        out = []
        for key in list(dict.fromkeys([*old, *new])):
            path = f"{prefix}.{key}" if prefix else str(key)
            if key not in old or key not in new:
                out.append(path)
            else:
                out.extend(_dict_changes(old[key], new[key], path))
        return out
    return [] if old == new else [prefix or "(whole config)"]


@dataclass
class ForecasterChange:
    """One forecaster of a dataset in the old and the new leaderboard."""

    name: str
    role: str
    old_rank: float | None
    new_rank: float | None
    in_old: bool = True
    in_new: bool = True
    failed: tuple[float, float] = (0.0, 0.0)  # failed tasks, old and new
    values: dict[str, tuple[float, float]] = field(default_factory=dict)  # metric -> (old, new)
    tolerance: dict[str, float] = field(default_factory=dict)  # metric -> largest noise change

    def differs(self, metric: str) -> bool:
        """Whether ``metric`` differs at all between old and new."""
        return not _same(*self.values.get(metric, (math.nan, math.nan)))

    def within_tolerance(self, metric: str) -> bool:
        """Whether ``metric`` differs, but by no more than its numerical tolerance."""
        old, new = self.values.get(metric, (math.nan, math.nan))
        if not self.differs(metric) or not (math.isfinite(old) and math.isfinite(new)):
            return False
        return abs(new - old) <= self.tolerance.get(metric, 0.0)

    def really_differs(self, metric: str) -> bool:
        """Whether ``metric`` differs by more than its numerical tolerance."""
        return self.differs(metric) and not self.within_tolerance(metric)


@dataclass
class SegmentChange:
    """One forecaster in one segment (attribute and value) of a dataset, old and new."""

    attribute: str
    segment: str
    forecaster: str
    rank: tuple[float | None, float | None]
    series: tuple[float, float]  # series in the segment (NaN: absent)
    value: tuple[float, float]  # rank metric mean
    beats: tuple[bool | None, bool | None]  # beats_reference (None: absent)

    def changed(self) -> bool:
        """Whether the row differs between the two folders."""
        return (self.rank[0] != self.rank[1] or self.beats[0] != self.beats[1]
                or not _same(*self.series) or not _same(*self.value))


@dataclass
class DatasetDiff:
    """What changed for one dataset."""

    name: str
    status: str  # both | added | gone
    data_changed: bool = False
    data_note: str = ""
    #: (recorded candidate, whether its forecasts file changed, the line diff prints)
    files: list[tuple[str, bool, str]] = field(default_factory=list)
    reference: tuple[str | None, str | None] = (None, None)
    added: list[str] = field(default_factory=list)
    gone: list[str] = field(default_factory=list)
    forecasters: list[ForecasterChange] = field(default_factory=list)
    #: every (attribute, segment, forecaster) row of either leaderboard_segments.csv
    segments: list[SegmentChange] = field(default_factory=list)
    #: set when only one folder has segments, or neither has this dataset's
    segments_note: str = ""

    def changed(self, rank_by: str | None = None) -> bool:
        """Whether anything differs for this dataset beyond numerical tolerance.

        Ranks follow from the rank metric (``rank_by``): when every score moved within its
        tolerance, forecasters within noise of each other may swap places on another machine,
        and that is not a change. Without ``rank_by`` every rank change counts.
        """
        if self.status != "both" or self.data_changed or self.added or self.gone:
            return True
        if any(changed for _, changed, _ in self.files):
            return True
        if any(s.changed() for s in self.segments):
            return True
        if self.reference[0] != self.reference[1]:
            return True
        for f in self.forecasters:
            if not (f.in_old and f.in_new) or not _same(*f.failed):
                return True
            if f.old_rank != f.new_rank and rank_by is None:
                return True
            if any(f.really_differs(m) for m in f.values):
                return True
        return False

    def within_tolerance(self) -> int:
        """How many (forecaster, metric) scores differ within their tolerance."""
        return sum(f.within_tolerance(m) for f in self.forecasters if f.in_old and f.in_new
                   for m in f.values)


@dataclass
class Diff:
    """The whole comparison."""

    old: Results
    new: Results
    rank_by: str
    config_changes: list[str]
    version_changes: list[str]
    datasets: list[DatasetDiff]
    platform_changes: list[str] = field(default_factory=list)

    @property
    def config_changed(self) -> bool:
        """Whether the config hashes differ."""
        return self.old.manifest["config_hash"] != self.new.manifest["config_hash"]

    def changed(self) -> bool:
        """Whether anything differs between the two folders beyond numerical tolerance.

        A change of platform alone is not a change of results: it explains one.
        """
        return (self.config_changed or bool(self.version_changes)
                or any(d.changed(self.rank_by) for d in self.datasets))

    def within_tolerance(self) -> int:
        """How many scores differ, all within their numerical tolerance."""
        return sum(d.within_tolerance() for d in self.datasets)

    def worse_than(self, pct: float) -> list[tuple[str, str, float]]:
        """(dataset, candidate, percent worse) for candidates whose rank metric got worse."""
        out = []
        for d in self.datasets:
            for f in d.forecasters:
                if f.role != "candidate" or self.rank_by not in f.values:
                    continue
                old, new = f.values[self.rank_by]
                if not (f.in_old and f.in_new) or not math.isfinite(old):
                    continue
                if f.within_tolerance(self.rank_by):
                    continue  # numerical noise is never "worse"
                w = worsening(self.rank_by, old, new)
                if w > pct:
                    out.append((d.name, f.name, w))
        return out


def _data_note(old: dict[str, Any], new: dict[str, Any]) -> str:
    parts = []
    for key in ("series", "observations"):
        if key in old or key in new:
            a, b = old.get(key, "?"), new.get(key, "?")
            parts.append(f"{key} {a}" if a == b else f"{key} {a} -> {b}")
    if "origins" in old or "origins" in new:
        a, b = _origins_text(old.get("origins")), _origins_text(new.get("origins"))
        parts.append(f"origins {a}" if a == b else f"origins {a} -> {b}")
    return "; ".join(parts)


def _forecast_files(
    old: dict[str, Any], new: dict[str, Any], dataset: str
) -> list[tuple[str, bool, str]]:
    """The forecasts files of a dataset's recorded candidates (manifest ``recorded``), each
    with whether its content changed: a changed file is told apart from changed data."""
    def of(manifest: dict[str, Any]) -> dict[str, dict[str, Any]]:
        files = manifest.get("recorded") or {}
        return {k: v for k, v in files.items()
                if isinstance(v, dict) and v.get("dataset") == dataset}

    before, after = of(old), of(new)
    out = []
    for name, n in after.items():
        o = before.get(name)
        if o is None:
            out.append((name, False, f"{n.get('path')}, {n.get('rows')} rows (not in the old "
                                     "run)"))
            continue
        path = _change(o.get("path"), n.get("path"))
        rows = _change(o.get("rows"), n.get("rows"))
        if o.get("fingerprint") == n.get("fingerprint"):
            out.append((name, False, f"unchanged ({path}, {rows} rows)"))
        else:
            fp = f"{str(o.get('fingerprint'))[:12]} -> {str(n.get('fingerprint'))[:12]}"
            out.append((name, True, f"CHANGED ({path}, fingerprint {fp}; rows {rows})"))
    return out


def _change(a: Any, b: Any) -> str:
    return f"{a}" if a == b else f"{a} -> {b}"


def _origins_text(origins: Any) -> str:
    """A dataset's origins as the manifest records them: ``8 (2020-12-01 to 2024-06-01)``."""
    if not isinstance(origins, dict):
        return "?"
    count, first, last = origins.get("count"), origins.get("first"), origins.get("last")
    return f"{count} ({first} to {last})" if count != 1 else f"1 ({first})"


def _platform_text(blas: list[dict[str, Any]]) -> str:
    return ", ".join(f"{b.get('library', '?')} {b.get('version', '?')} {b.get('kernel', '?')}"
                     for b in blas) or "none"


def platform_changes(old: dict[str, Any], new: dict[str, Any]) -> list[str]:
    """What differs between the platforms two manifests recorded (``manifest["platform"]``).

    A manifest written before castgrid recorded the platform gives ``["not recorded in ..."]``.
    """
    po, pn = old.get("platform"), new.get("platform")
    if po is None or pn is None:
        if po is None and pn is None:
            return []
        return [f"not recorded in the {'old' if po is None else 'new'} results"]
    out = []
    for key in ("machine", "system", "cpu"):
        if po.get(key) != pn.get(key):
            out.append(f"{key} {po.get(key, '-')} -> {pn.get(key, '-')}")
    bo, bn = _platform_text(po.get("blas") or []), _platform_text(pn.get("blas") or [])
    if bo != bn:
        out.append(f"BLAS {bo} -> {bn}")
    return out


def _tolerances(row: dict[str, Any] | None, metrics: list[str], horizon: int
                ) -> dict[str, float]:
    from runner.scoring.metrics import noise_tolerance

    if row is None:
        return {}
    tasks = int(row["tasks"]) if "tasks" in row and math.isfinite(float(row["tasks"])) else 0
    folds = int(row["folds"]) if "folds" in row and math.isfinite(float(row["folds"])) else 1
    return {m: noise_tolerance(m, float(row.get(f"{m}_mean", math.nan)), tasks, horizon, folds)
            for m in metrics}


def compare(old: Results, new: Results) -> Diff:
    """Compare two loaded results folders."""
    rank_by = new.manifest["rank_by"]
    metrics = list(dict.fromkeys(new.metrics + old.metrics))
    old_fp, new_fp = dataset_fingerprints(old.manifest), dataset_fingerprints(new.manifest)
    config_changes = []
    if old.manifest["config_hash"] != new.manifest["config_hash"]:
        config_changes = _dict_changes(old.manifest.get("config"), new.manifest.get("config"))
    old_v, new_v = old.manifest.get("versions") or {}, new.manifest.get("versions") or {}
    version_changes = [
        f"{k} {old_v.get(k, '-')} -> {new_v.get(k, '-')}"
        for k in dict.fromkeys([*new_v, *old_v]) if old_v.get(k) != new_v.get(k)
    ]
    old_ref, new_ref = old.manifest.get("reference") or {}, new.manifest.get("reference") or {}
    horizon = int((old.manifest.get("config") or {}).get("horizon") or 0)
    platforms = platform_changes(old.manifest, new.manifest)
    # the same platform gives the same bits: there, every difference is real
    same_platform = ("platform" in old.manifest and "platform" in new.manifest
                     and not platforms)

    datasets = []
    for name in dict.fromkeys(new.datasets() + old.datasets()):
        in_old, in_new = name in old.datasets(), name in new.datasets()
        status = "both" if in_old and in_new else ("added" if in_new else "gone")
        dd = DatasetDiff(name, status, reference=(old_ref.get(name), new_ref.get(name)))
        if status == "both":
            dd.data_changed = old_fp.get(name) != new_fp.get(name)
        dd.data_note = _data_note(old.manifest["data"].get(name) or {},
                                  new.manifest["data"].get(name) or {})
        dd.files = _forecast_files(old.manifest, new.manifest, name)
        old_rows, new_rows = old.rows(name), new.rows(name)
        dd.added = [f for f in new_rows if f not in old_rows]
        dd.gone = [f for f in old_rows if f not in new_rows]
        for fname in list(new_rows) + dd.gone:
            o, n = old_rows.get(fname), new_rows.get(fname)
            row = n if n is not None else o
            fc = ForecasterChange(
                fname, str(row["role"]),
                None if o is None else _rank(o["rank"]),
                None if n is None else _rank(n["rank"]),
                in_old=o is not None, in_new=n is not None,
                failed=(_failed(o), _failed(n)),
                tolerance={} if same_platform else _tolerances(o, metrics, horizon),
            )
            for m in metrics:
                col = f"{m}_mean"
                ov = float(o[col]) if o is not None and col in o else math.nan
                nv = float(n[col]) if n is not None and col in n else math.nan
                fc.values[m] = (ov, nv)
            dd.forecasters.append(fc)
        _compare_segments(dd, old, new, rank_by)
        datasets.append(dd)
    return Diff(old, new, rank_by, config_changes, version_changes, datasets, platforms)


def _compare_segments(dd: DatasetDiff, old: Results, new: Results, rank_by: str) -> None:
    """Fill ``dd.segments``: rank, series count, rank metric and win of every forecaster in
    every segment, old and new (rows in the new file's order, then those only in the old)."""
    if dd.status != "both" or (old.segments is None and new.segments is None):
        return
    if old.segments is None or new.segments is None:
        side = "new" if old.segments is None else "old"
        dd.segments_note = f"only the {side} results have {SEGMENT_LEADERBOARD}"
        return
    col = f"{rank_by}_mean"

    def rows(frame: pd.DataFrame) -> dict[tuple[str, str, str], dict[str, Any]]:
        part = frame[frame["dataset"] == dd.name]
        return {(str(r["attribute"]), str(r["segment"]), str(r["forecaster"])): r
                for r in part.to_dict("records")}

    o_rows, n_rows = rows(old.segments), rows(new.segments)
    for key in list(n_rows) + [k for k in o_rows if k not in n_rows]:
        o, n = o_rows.get(key), n_rows.get(key)
        dd.segments.append(SegmentChange(
            *key,
            rank=(None if o is None else _rank(o["rank"]), None if n is None else _rank(n["rank"])),
            series=(math.nan if o is None else float(o["series"]),
                    math.nan if n is None else float(n["series"])),
            value=(float(o[col]) if o is not None and col in o else math.nan,
                   float(n[col]) if n is not None and col in n else math.nan),
            beats=(None if o is None else bool(o["beats_reference"]),
                   None if n is None else bool(n["beats_reference"])),
        ))


def _failed(row: dict[str, Any] | None) -> float:
    if row is None or "failed" not in row:
        return math.nan
    return float(row["failed"])


def _rank(v: Any) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


# ------------------------------------------------------------------------------ formatting


def _rank_text(old: float | None, new: float | None) -> str:
    a = "-" if old is None else f"{old:g}"
    b = "-" if new is None else f"{new:g}"
    return a if a == b else f"{a} -> {b}"


def _failed_text(old: float, new: float) -> str:
    a = "-" if math.isnan(old) else f"{old:g}"
    b = "-" if math.isnan(new) else f"{new:g}"
    return a if a == b else f"{a} -> {b}"


def _verdict(metric: str, old: float, new: float, noise: bool = False) -> str:
    if math.isnan(old) and math.isnan(new):
        return ""
    if math.isnan(old):
        return "new"
    if _same(old, new):
        return "same"
    if noise:
        return "within tolerance"
    w = worsening(metric, old, new)
    return "worse" if w > 0 else "better" if w < 0 else "same"


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
                   f"{_platform_text(nm['platform'].get('blas') or [])}): scores are compared "
                   "exactly")
    if om["rank_by"] != nm["rank_by"]:
        out.append(f"rank metric: {nm['rank_by']} (was {om['rank_by']}; ranks are not "
                   "comparable)")
    else:
        out.append(f"rank metric: {nm['rank_by']}")
    return [f"- {line}" for line in out] if markdown else out


def format_diff(d: Diff, markdown: bool = False, fail_pct: float | None = None) -> str:
    """The comparison as readable text, or as Markdown for a review comment."""
    lines = (["### castgrid diff", ""] if markdown else []) + _header(d, markdown)
    m = d.rank_by
    bullet = "- " if markdown else "  "
    for ds in d.datasets:
        lines.append("")
        lines.append(f"#### dataset {ds.name}" if markdown else f"dataset {ds.name}")
        if markdown:
            lines.append("")
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
        if markdown:
            lines.append("")
        header = ["rank", "forecaster", "role", f"{m} old", f"{m} new", "change", "change %",
                  "failed", ""]
        rows = []
        for f in ds.forecasters:
            old, new = f.values.get(m, (math.nan, math.nan))
            verdict = "gone" if not f.in_new else "added" if not f.in_old else _verdict(
                m, old, new, f.within_tolerance(m))
            if (fail_pct is not None and f.role == "candidate" and verdict == "worse"
                    and worsening(m, old, new) > fail_pct):
                verdict = f"worse > {fail_pct:g}%"
            change = new - old if math.isfinite(old) and math.isfinite(new) else math.nan
            rows.append([_rank_text(f.old_rank, f.new_rank), f.name, f.role, _num(old),
                         _num(new), _num(change) if math.isfinite(change) else "-",
                         percent_text(relative_change(old, new)), _failed_text(*f.failed), verdict])
        lines.append(render_table(header, rows, markdown, indent="" if markdown else "  "))
        other = []
        for f in ds.forecasters:
            if not (f.in_old and f.in_new):
                continue
            for metric, (old, new) in f.values.items():
                if metric == m or _same(old, new):
                    continue
                change = new - old if math.isfinite(old) and math.isfinite(new) else math.nan
                other.append([f.name, metric, _num(old), _num(new), _num(change),
                              percent_text(relative_change(old, new)),
                              "within tolerance" if f.within_tolerance(metric) else ""])
        if other:
            lines.append("")
            lines.append("other metrics that changed:")
            if markdown:
                lines.append("")
            lines.append(render_table(["forecaster", "metric", "old", "new", "change",
                                       "change %", ""], other, markdown,
                                      indent="" if markdown else "  "))
        elif ds.status == "both" and ds.forecasters:
            lines.append(f"{bullet}other metrics: unchanged")
        lines.extend(_segment_lines(ds, m, markdown, bullet))
    lines.append("")
    lines.append(_summary(d))
    return "\n".join(lines)


def _beats_text(old: bool | None, new: bool | None) -> str:
    a = "-" if old is None else "yes" if old else "no"
    b = "-" if new is None else "yes" if new else "no"
    return a if a == b else f"{a} -> {b}"


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
    rows = []
    for s in changed:
        old, new = s.value
        verdict = ("gone" if s.rank[1] is None else "added" if s.rank[0] is None
                   else _verdict(m, old, new))
        rows.append([s.attribute, s.segment, s.forecaster, _failed_text(*s.series),
                     _rank_text(*s.rank), _num(old), _num(new),
                     percent_text(relative_change(old, new)), _beats_text(*s.beats), verdict])
    header = ["attribute", "segment", "forecaster", "series", "rank", f"{m} old", f"{m} new",
              "change %", "beats ref", ""]
    lines.append(render_table(header, rows, markdown, indent="" if markdown else "  "))
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
