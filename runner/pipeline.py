"""The whole evaluation as one call: plan, forecast, score, rank, write.

>>> import runner
>>> result = runner.run("configs/demo.yaml")          # doctest: +SKIP
>>> result.leaderboard[["forecaster", "mase_mean"]]   # doctest: +SKIP
"""

from __future__ import annotations

import sys
from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import TYPE_CHECKING, Any

import pandas as pd

from runner.config import Config
from runner.output.uptodate import Inputs
from runner.scoring.evaluate import Evaluation, evaluate
from runner.scoring.leaderboard import build_leaderboard
from runner.windows.plan import Plan, build_plan

if TYPE_CHECKING:
    from runner.report.painter import Painter


@dataclass
class RunResult:
    """What :func:`run` returns: the leaderboard, the task scores and where they were written."""

    leaderboard: pd.DataFrame
    out_dir: Path | None
    manifest: dict[str, Any]
    evaluation: Evaluation

    @cached_property
    def scores(self) -> pd.DataFrame:
        """One row per dataset, series, forecaster and fold (:func:`scores_frame`); built on
        first use, since the command line never needs it as a DataFrame."""
        return scores_frame(self.evaluation)

    @property
    def failed_tasks(self) -> int:
        """Number of tasks that failed."""
        return int(self.manifest["tasks"]["failed"])

    @cached_property
    def segments(self) -> pd.DataFrame:
        """The leaderboard by segment (leaderboard_segments.csv as a DataFrame; no rows when
        the config names no ``segments``)."""
        from runner.scoring.segments import build_segment_leaderboard

        return build_segment_leaderboard(self.evaluation)


#: Tasks from which a run draws its report's plots in a painter process started with the run
#: (:mod:`runner.report.painter`). The painter costs about half a second of a second core to
#: load and warm up matplotlib, drawn or not; it saves wall time when that core is idle and the
#: run is long enough to hide the loading. A small run (a test, the demo) draws its few plots
#: itself and leaves the other core to whatever else runs (a test suite's other worker).
PAINT_ASIDE_TASKS = 5_000


def output_dir(cfg: Config, override: str | Path | None = None) -> Path:
    """results/<experiment>, or output.dir, or the ``--out`` override."""
    if override is not None:
        return Path(override)
    if cfg.output.dir:
        return Path(cfg.output.dir)
    return Path("results") / cfg.experiment


def scores_frame(ev: Evaluation) -> pd.DataFrame:
    """One row per dataset, series, forecaster and fold with every metric column: the table
    written as scores.parquet (:func:`runner.output.writer.scores_table`), as a DataFrame.

    ``fold`` numbers the dataset's origins from the oldest; ``origin`` is the time of the
    fold's last training observation, the same for every series.
    """
    from runner.output.writer import scores_table
    from runner.scoring.metrics import columns

    cfg = ev.plan.config
    frame = scores_table(ev, columns(cfg.metrics, tuple(cfg.intervals))).to_pandas()
    for name in ("dataset", "series", "forecaster"):
        frame[name] = frame[name].astype(str)
    return frame


def prepare(config: str | Path | Config, config_path: Path | None = None) -> Plan:
    """Check the config's forecasters (imports, protocol, params), then load data and plan.

    Forecasters are checked before any data is read, so a misspelt entry or a bad parameter is
    one line naming the config field, not a failed task per series.
    """
    from runner.config import load_config
    from runner.forecasters.recorded import RecordedSources
    from runner.forecasters.specs import forecaster_specs
    from runner.forecasters.validation import validate_forecasters
    from runner.scoring.metrics import DEFAULT_METRICS, check_metrics, unreliable_rank_warning

    if isinstance(config, (str, Path)):
        inputs = Inputs.of_config(config)  # hashed before it is read, as every input below
        config_path = Path(config)
        config = load_config(config_path)
    else:
        inputs = Inputs.refusing("the config was given as an object, not read from a file")
    config_path = config_path or Path("config.yaml")
    rank_by, note = check_metrics(
        config.metrics, config.rank_by, bool(config.intervals), str(config_path)
    )
    notes = [note] if note else []
    # defaults are written into the config the run records, so the manifest's config (and its
    # hash) says exactly what ran
    config = config.model_copy(update={
        "metrics": list(DEFAULT_METRICS) if config.metrics is None else config.metrics,
        "rank_by": rank_by,
    })
    _record_inputs(inputs, config, config_path)
    dropped = validate_forecasters(config, config_path)
    inputs.confirm_plugins()
    notes.extend(dropped.values())
    specs = [s for s in forecaster_specs(config) if s.name not in dropped]
    # forecasts made elsewhere: read and checked here, before any work, like the datasets
    recorded = RecordedSources(config, specs, config_path)
    plan = build_plan(config, specs, config_path, file_origins=recorded.origins)
    recorded.attach(plan)
    plan.notes.extend(notes)
    plan.inputs = inputs
    warning = unreliable_rank_warning(rank_by)
    if warning is not None:
        plan.warnings.append(warning)
    return plan


def _record_inputs(inputs: Inputs, config: Config, config_path: Path) -> None:
    """Hash every file the run will read (datasets, attribute files, recorded forecasts,
    plugin modules) into ``inputs`` before it is read: rerun.json keeps them, so that a rerun
    on the same bytes can be found to have nothing to do."""
    from runner.forecasters.registry import BY_KIND, PANEL_PLUGIN, PLUGIN

    base = config_path.parent
    for ds in config.datasets:
        inputs.add_file("dataset", ds.path, base)
        if ds.attributes and ds.attribute_file is not None:
            inputs.add_file("attributes", ds.attribute_file, base)
    for m in config.models:
        kind = BY_KIND.get(m.kind)
        if kind is not None and kind.from_file:
            # a grid may list several files; a missing path is the validation's to report
            paths = m.grid.get("path") or [m.params.get("path")]
            for path in paths:
                inputs.add_file("recorded", path, base)
        if m.kind in (PLUGIN, PANEL_PLUGIN) and m.entry:
            inputs.add_plugin(m.entry, base)
    ex = config.execution
    if ex.engine == "dask" and ex.address:
        inputs.refuse(f"tasks ran on the dask cluster at {ex.address}, whose machines castgrid "
                      "does not check")


def _check_paths(plan: Plan, target: Path | None, use_cache: bool) -> None:
    """Fail before any computing when the results folder or the cache cannot be written."""
    from runner.execution.cache import check_cache_folder
    from runner.forecasters.registry import is_vectorised
    from runner.output.writer import check_output_dir

    if target is not None:
        check_output_dir(target)
    folder = plan.config.execution.cache_folder()
    # Only per-series models use the cache; a run of baselines alone never opens it.
    if use_cache and folder is not None and not all(map(is_vectorised, plan.forecasters)):
        check_cache_folder(folder)


def run(
    config: str | Path | Config | Plan,
    *,
    out_dir: str | Path | None = None,
    write: bool = True,
    use_cache: bool = True,
    jobs: int | None = None,
    quiet: bool = True,
    report: bool = True,
    painter: Painter | None = None,
) -> RunResult:
    """Run an evaluation from a config file path (or a parsed config, or a plan).

    Writes the results folder unless ``write`` is False, and returns the leaderboard and the
    per-task scores as DataFrames. Bad config or data raise :class:`runner.ConfigError` /
    :class:`runner.DataError` before anything is written, and a results folder or cache that
    cannot be written raises :class:`runner.PathError` before anything is computed.

    ``painter`` draws the report's plots in a process of its own
    (:mod:`runner.report.painter`); without one, a run of :data:`PAINT_ASIDE_TASKS` tasks or
    more starts its own where it can.
    """
    from runner.output.writer import Staging
    from runner.output.writer import manifest as build_manifest

    plan = config if isinstance(config, Plan) else prepare(config)
    target = output_dir(plan.config, out_dir) if write else None
    _check_paths(plan, target, use_cache)
    if target is None:
        ev = evaluate(plan, use_cache=use_cache, jobs=jobs, quiet=quiet)
        _show_notes(ev, quiet)
        board = build_leaderboard(ev)
        return RunResult(board, target, build_manifest(ev), ev)
    from contextlib import nullcontext
    from functools import partial

    from runner.report.page import build_report
    from runner.report.painter import start_painter

    # forecasts.parquet is written chunk by chunk while the run computes; the rest after.
    # The report's plots are drawn by a process started now, which loads matplotlib meanwhile
    # (it shares the libraries and data loaded so far).
    aside = (start_painter() if report and painter is None
             and plan.n_tasks >= PAINT_ASIDE_TASKS else nullcontext(painter))
    with aside as painter, Staging(target) as stage:
        ev = evaluate(plan, use_cache=use_cache, jobs=jobs, quiet=quiet,
                      sink=stage.forecast_sink(plan))
        _show_notes(ev, quiet)
        board = build_leaderboard(ev)
        # plots whose data did not change are copied from the results being replaced
        finish = partial(build_report, previous=target, painter=painter) if report else None
        man = stage.commit(ev, board, finish)
    return RunResult(board, target, man, ev)


def _show_notes(ev: Evaluation, quiet: bool) -> None:
    """The notes and warnings of the scoring (missing actuals, undefined scores) on stderr,
    as the run's other notes are shown; nothing when ``quiet``."""
    if quiet:
        return
    for dr in ev.datasets:
        for note in dr.notes:
            print(f"castgrid: note: {note}", file=sys.stderr)
        for w in dr.warnings:
            print(f"castgrid: warning: {w}", file=sys.stderr)
