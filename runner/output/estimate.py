"""How big a run's results will be, and how much memory it will take, before it runs.

``castgrid check`` prints both, from the plan's task counts and bytes per row measured on
castgrid's own outputs (tests/perf/bench_baselines.py; random walks of 120 monthly values
with three decimals, which compress about as badly as real data does):

* forecasts.parquet, per row (one step of one task of one forecaster): the key columns take
  :data:`KEY_BYTES` (dictionary text, run-length folds and steps, repeating times); the actual
  value :data:`ACTUAL_BYTES`; the forecast :data:`BENCHMARK_BYTES` and each interval bound
  :data:`BENCHMARK_BOUND_BYTES` for a benchmark (whose forecasts often repeat a value over the
  horizon, which compresses) and :data:`MODEL_BYTES` each for any other forecaster (float64
  that hardly compresses);
* scores.parquet, per row (one task of one forecaster): :data:`SCORE_KEY_BYTES` of keys and
  :data:`SCORE_BYTES` per metric column;
* every file: the series names once per row group (``chunk`` series each), compressed.

Memory: :data:`BASE_MEMORY` (the interpreter and the libraries), the panel (values and times,
8 bytes each per observation, and the series names), the per-task scores kept for the whole
run (the leaderboard and scores.parquet need every one), and the working set of one chunk of
series (training-slice statistics, forecasts, bounds, losses and the table being written), per
forecast value :data:`CHUNK_BYTES_PER_VALUE`.
"""

from __future__ import annotations

from dataclasses import dataclass

from runner.forecasters.registry import is_vectorised
from runner.scoring import metrics as M
from runner.windows.plan import Plan

KEY_BYTES = 0.3
ACTUAL_BYTES = 3.5
BENCHMARK_BYTES = 2.5
BENCHMARK_BOUND_BYTES = 4.0
MODEL_BYTES = 7.6
SCORE_KEY_BYTES = 0.4
SCORE_BYTES = 7.6
#: Bytes a series name takes in a row group's dictionary, compressed (names are near-unique).
NAME_BYTES = 6.0
#: The interpreter, numpy, pandas, pyarrow and castgrid's modules.
BASE_MEMORY = 260 * 2**20
#: Per task of the run, kept to the end: every metric's score, the rank metric's mean loss,
#: the failed flag and the task's keys (series, fold, origin).
TASK_BYTES = 40
#: Per forecast value (task x step x forecaster) of one chunk: the forecast and its
#: intermediates (slices, losses, scores by step, the Arrow table written).
CHUNK_BYTES_PER_VALUE = 180
#: Per observation of the panel: the value and its time (float64 and int64).
OBSERVATION_BYTES = 16


@dataclass
class Estimate:
    """Estimated bytes of each results file and of the run's peak memory."""

    files: dict[str, int]
    peak_memory: int

    @property
    def total(self) -> int:
        """All files together."""
        return sum(self.files.values())


def chunk_series(plan: Plan) -> int:
    """Series per chunk (``execution.chunk``; a dataset of fewer series is one chunk)."""
    return min(plan.config.execution.chunk,
               max([dp.panel.n_series for dp in plan.datasets] + [1]))


def estimate(plan: Plan) -> Estimate:
    """The sizes of forecasts.parquet and scores.parquet (and the small files) and the peak
    memory of running ``plan``."""
    from runner.output.parquet_files import kept_forecasts

    cfg = plan.config
    h, n_levels = cfg.horizon, len(cfg.intervals)
    n_metrics = len(M.columns(cfg.metrics, tuple(cfg.intervals)))
    chunk = chunk_series(plan)
    forecasts = scores = 0.0
    names = tasks_total = 0.0
    data = 0.0
    widest_chunk = 0.0
    for dp in plan.datasets:
        specs = [plan.forecasters[f] for f in dp.forecasters]
        per_row = 0.0
        for spec in specs:
            if not kept_forecasts(cfg.output.forecasts, spec.role, spec.name, dp.reference):
                continue
            if is_vectorised(spec):
                value = BENCHMARK_BYTES + BENCHMARK_BOUND_BYTES * 2 * n_levels
            else:
                value = MODEL_BYTES * (1 + 2 * n_levels)
            per_row += KEY_BYTES + ACTUAL_BYTES + value
        forecasts += dp.n_tasks * h * per_row
        scores += dp.n_tasks * len(specs) * (SCORE_KEY_BYTES + SCORE_BYTES * n_metrics)
        n_series = dp.panel.n_series
        key_bytes = sum(len(k) for k in dp.panel.keys[: min(n_series, 1000)])
        names += NAME_BYTES * n_series + (key_bytes / max(min(n_series, 1000), 1)) * n_series
        tasks_total += dp.n_tasks * len(specs)
        data += OBSERVATION_BYTES * len(dp.panel.values)
        share = min(1.0, chunk / max(n_series, 1))
        widest_chunk = max(widest_chunk, dp.n_tasks * share * len(specs) * h * (1 + 2 * n_levels))
    files = {"scores.parquet": int(scores + names), "report": 700_000 * len(plan.datasets)}
    if cfg.output.forecasts != "none":
        files["forecasts.parquet"] = int(forecasts + names)
    peak = (BASE_MEMORY + data + names + TASK_BYTES * tasks_total * (1 + n_metrics / 5)
            + CHUNK_BYTES_PER_VALUE * widest_chunk)
    return Estimate(files, int(peak))


def human(n: float) -> str:
    """Bytes as a short text: 512 B, 3.4 MiB, 1.2 GiB."""
    for unit, size in (("GiB", 2**30), ("MiB", 2**20), ("KiB", 2**10)):
        if n >= size:
            return f"{n / size:.1f} {unit}"
    return f"{int(n)} B"
