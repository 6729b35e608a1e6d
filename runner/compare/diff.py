"""``castgrid diff OLD NEW``: what changed between two evaluations, and whether it is the model.

This module computes the comparison (:func:`compare` builds a :class:`Diff`);
:mod:`runner.compare.diff_text` prints it. For every dataset the comparison holds forecasters
added and gone, rank changes, each metric's change (absolute and relative), and whether the
config, the data, the library versions or the platform (CPU, BLAS library and kernel) changed,
so a better score can be told apart from different data or a different machine.
:meth:`Diff.worse_than` backs ``--fail-if-worse PCT``, which makes the command a gate: exit
code 4 when a candidate's rank metric got worse by more than PCT percent.

On one platform a rerun gives the same bits, so every difference counts. When the two
manifests record different platforms (or either records none), a score that moved by no more
than its numerical tolerance (:func:`runner.scoring.metrics.noise_tolerance`: 2% of the value,
5% for interval scores, one interval hit per fold for coverage) is shown as "within
tolerance": what another CPU or BLAS kernel does to the same computation. It is not a change in
the closing line and never trips ``--fail-if-worse``.

OLD and NEW are results folders or ``REV:path`` read from git (see :mod:`runner.output.reader`).
"""

from __future__ import annotations

import math
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


def same_score(a: Any, b: Any) -> bool:
    """Whether two scores are equal (two NaNs, two missing scores, are the same)."""
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
        return not same_score(*self.values.get(metric, (math.nan, math.nan)))

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
    tolerance: float = 0.0  # largest change of the rank metric that is numerical noise
    #: every rank metric of this row's segment moved by no more than its tolerance, so a rank
    #: swap inside the segment is noise too (as for the leaderboard, ranks follow the scores)
    segment_within_tolerance: bool = False

    def within_tolerance(self) -> bool:
        """Whether the rank metric differs, but by no more than its numerical tolerance."""
        old, new = self.value
        if same_score(old, new) or not (math.isfinite(old) and math.isfinite(new)):
            return False
        return abs(new - old) <= self.tolerance

    def changed(self) -> bool:
        """Whether the row differs between the two folders beyond numerical tolerance."""
        if self.rank[0] is None or self.rank[1] is None:
            return self.rank[0] != self.rank[1]
        if self.beats[0] != self.beats[1] or not same_score(*self.series):
            return True
        if not same_score(*self.value) and not self.within_tolerance():
            return True
        return self.rank[0] != self.rank[1] and not self.segment_within_tolerance


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
            if not (f.in_old and f.in_new) or not same_score(*f.failed):
                return True
            if f.old_rank != f.new_rank and rank_by is None:
                return True
            if any(f.really_differs(m) for m in f.values):
                return True
        return False

    def within_tolerance(self) -> int:
        """How many (forecaster, metric) scores, and segment rows' rank metrics, differ within
        their tolerance."""
        return (sum(f.within_tolerance(m) for f in self.forecasters if f.in_old and f.in_new
                    for m in f.values)
                + sum(s.within_tolerance() for s in self.segments))


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


def platform_text(blas: list[dict[str, Any]]) -> str:
    """The BLAS libraries of a manifest's platform on one line: ``openblas 0.3.31 Haswell``."""
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
    bo, bn = platform_text(po.get("blas") or []), platform_text(pn.get("blas") or [])
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
        whole = {f: float(r["series"]) for f, r in old_rows.items() if "series" in r}
        _compare_segments(dd, old, new, rank_by, horizon, exact=same_platform, whole=whole)
        datasets.append(dd)
    return Diff(old, new, rank_by, config_changes, version_changes, datasets, platforms)


def _compare_segments(dd: DatasetDiff, old: Results, new: Results, rank_by: str,
                      horizon: int, exact: bool, whole: dict[str, float]) -> None:
    """Fill ``dd.segments``: rank, series count, rank metric (with its numerical tolerance;
    none when ``exact``, as on one platform) and win of every forecaster in every segment, old
    and new (rows in the new file's order, then those only in the old).

    A segment's mean averages fewer series than the leaderboard's, so the same per-series
    noise moves it more: by the usual 1/sqrt(n) of a mean of independent errors, its tolerance
    is the leaderboard's times sqrt(series in the dataset / series in the segment), where
    ``whole`` gives the dataset's series per forecaster (old leaderboard).
    """
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
            tolerance=0.0 if exact else _segment_tolerance(o, rank_by, horizon,
                                                           whole.get(key[2], math.nan)),
        ))
    # A segment whose rows all kept their rank metric within tolerance has only noise in it;
    # its rank swaps follow from that noise (another CPU or BLAS kernel), not from a change.
    noisy: dict[tuple[str, str], bool] = {}
    for s in dd.segments:
        calm = s.rank[0] is not None and s.rank[1] is not None and (
            same_score(*s.value) or s.within_tolerance())
        noisy[(s.attribute, s.segment)] = noisy.get((s.attribute, s.segment), True) and calm
    for s in dd.segments:
        s.segment_within_tolerance = noisy[(s.attribute, s.segment)]


def _segment_tolerance(row: dict[str, Any] | None, rank_by: str, horizon: int,
                       whole: float) -> float:
    base = _tolerances(row, [rank_by], horizon).get(rank_by, 0.0)
    part = math.nan if row is None else float(row.get("series", math.nan))
    if not (math.isfinite(whole) and math.isfinite(part)) or part <= 0 or whole <= part:
        return base
    return base * math.sqrt(whole / part)


def _failed(row: dict[str, Any] | None) -> float:
    if row is None or "failed" not in row:
        return math.nan
    return float(row["failed"])


def _rank(v: Any) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None
