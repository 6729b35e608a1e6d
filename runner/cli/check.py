"""``castgrid check CONFIG``: validate config and data and print the plan, running nothing."""

from __future__ import annotations

import argparse


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """Options of ``castgrid check``."""
    parser.add_argument("config", help="the experiment's YAML config")


def main(args: argparse.Namespace) -> int:
    """Print datasets, series, origins, folds per series, forecasters, tasks and how many are
    cached."""
    import numpy as np

    from runner.cli._summary import summarise
    from runner.pipeline import prepare

    plan = prepare(args.config)
    cfg = plan.config
    print(f"experiment {cfg.experiment}: horizon {cfg.horizon}, {cfg.windows.scheme} windows, "
          f"ranked by {cfg.rank_by}")
    for note in plan.all_notes():
        print(f"note: {note}")
    for warning in plan.warnings:
        print(f"warning: {warning}")
    for dp in plan.datasets:
        p = dp.panel
        folds = np.bincount(dp.series, minlength=p.n_series)[np.unique(dp.series)]
        used = len(np.unique(dp.series))
        lengths = np.diff(p.offsets)
        print(
            f"dataset {p.name} ({p.path}): {p.n_series} series, {len(p.values)} observations "
            f"(length {lengths.min()}-{lengths.max()}), frequency {p.frequency or 'integer'}, "
            f"season {p.season}"
        )
        print(
            f"  folds per series: {folds.min()}-{folds.max()}; {used} series evaluated, "
            f"{len(dp.skipped)} too short"
        )
        labels = dp.origin_labels()
        span = f"{labels[0]} to {labels[-1]}" if len(labels) > 1 else f"{labels[0]}"
        where = ("each series' own, from its last observation" if cfg.windows.align == "end"
                 else "shared by every series")
        print(f"  origins: {len(labels)} ({span}; {where})")
        for s in summarise(dp.skipped):
            print(f"  too short: {s}")
        for note in summarise(p.notes):
            print(f"  note: {note}")
        for line in _segment_sizes(cfg, dp):
            print(f"  {line}")
        names = [plan.forecasters[i].name for i in dp.forecasters]
        print(f"  forecasters ({len(names)}): {', '.join(names)}; reference {dp.reference}")
        print(f"  tasks: {dp.n_tasks * len(names)}")
    cached = _count_cached(plan)
    cached_txt = "cache off" if cached is None else f"{cached} model tasks already cached"
    print(f"total: {plan.n_tasks} tasks ({cached_txt})")
    return 0


def _segment_sizes(cfg, dp) -> list[str]:
    """``segments: format: bakery 24, cafe 6; volume_tier: A 24, B 8, C 10`` (series per
    segment value), or nothing when the dataset is not segmented."""
    import numpy as np

    from runner.scoring.segments import dataset_segments

    segs = dataset_segments(cfg, dp)
    if not segs.names:
        return []
    parts = []
    for name in segs.names:
        labels = segs.labels[name][np.unique(dp.series)]
        sizes = ", ".join(f"{v} {int(np.sum(labels == v))}" for v in segs.values(name))
        parts.append(f"{name}: {sizes}")
    return ["segments (series): " + "; ".join(parts)]


def _count_cached(plan) -> int | None:
    from runner.execution.cache import count_cached
    from runner.execution.model_tasks import build_model_tasks
    from runner.execution.panel_tasks import build_panel_tasks

    path = plan.config.execution.cache_folder()
    if path is None:
        return None
    tasks, shared = build_model_tasks(plan)
    every = [*tasks, *build_panel_tasks(plan, len(tasks))]
    return count_cached(every, shared, path) if every else 0
