"""``castgrid cache info`` and ``castgrid cache prune CONFIG...``: the forecast cache's size and
entries, and dropping the entries no listed config uses."""

from __future__ import annotations

import argparse
from pathlib import Path

from runner.execution.cache import ForecastCache, cache_file, task_keys


def add_arguments(parser: argparse.ArgumentParser) -> None:
    """``castgrid cache info [CONFIG] [--dir DIR]`` and ``castgrid cache prune CONFIG...``."""
    sub = parser.add_subparsers(dest="cache_command", metavar="ACTION", required=True)
    info = sub.add_parser(
        "info", help="size, entries and entries per forecaster kind",
        description="Show the size of the forecast cache, its entries and entries per "
        "forecaster kind.",
    )
    info.add_argument("config", nargs="?", help="use this config's execution.cache folder")
    info.add_argument("--dir", help="the cache folder (default: results/.cache)")
    prune = sub.add_parser(
        "prune", help="drop the entries no given config uses",
        description="Delete every cached forecast that none of the given configs would use.",
    )
    prune.add_argument("configs", nargs="+", metavar="CONFIG")
    prune.add_argument("--dir", help="the cache folder (default: the configs' execution.cache)")
    prune.add_argument("--dry-run", action="store_true", help="only say how many would go")


def _human(n: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB"):
        if n < 1024 or unit == "GiB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1024
    raise AssertionError("unreachable")


def _config_cache_folder(config_path: str) -> Path | None:
    from runner.config import load_config

    return load_config(config_path).execution.cache_folder()


def _folder(args: argparse.Namespace, configs: list[str]) -> Path:
    from runner.errors import ConfigError

    if args.dir:
        return Path(args.dir)
    folders = {f for f in (_config_cache_folder(c) for c in configs) if f is not None}
    if not configs:
        from runner.config import ExecutionConfig

        return Path(str(ExecutionConfig().cache))
    if not folders:
        raise ConfigError(f"{configs[0]}: execution.cache: is false; name the cache with --dir")
    if len(folders) > 1:
        names = ", ".join(sorted(str(f) for f in folders))
        raise ConfigError(f"the configs use different caches ({names}); choose one with --dir")
    return folders.pop()


def _info(args: argparse.Namespace) -> int:
    folder = _folder(args, [args.config] if args.config else [])
    path = cache_file(folder)
    if not path.exists():
        print(f"cache {path}: no cache yet (0 entries)")
        return 0
    with ForecastCache.open(folder) as cache:
        print(f"cache {path}")
        print(f"  size     {_human(cache.size_bytes())}")
        print(f"  entries  {cache.entries()}")
        for kind, n in cache.by_kind():
            print(f"    {kind:<14} {n}")
    return 0


def _prune(args: argparse.Namespace) -> int:
    from runner.execution.model_tasks import build_model_tasks
    from runner.execution.panel_tasks import build_panel_tasks
    from runner.pipeline import prepare

    folder = _folder(args, list(args.configs))
    keep: set[bytes] = set()
    for config in args.configs:
        plan = prepare(config)
        tasks, shared = build_model_tasks(plan)
        keep.update(task_keys([*tasks, *build_panel_tasks(plan, len(tasks))], shared))
    path = cache_file(folder)
    if not path.exists():
        print(f"cache {path}: no cache yet, nothing to prune")
        return 0
    with ForecastCache.open(folder) as cache:
        before_n, before_size = cache.entries(), cache.size_bytes()
        if args.dry_run:
            found = len(cache.lookup(keep))
            print(f"cache {path}: would drop {before_n - found} of {before_n} entries "
                  f"(the configs use {found})")
            return 0
        deleted = cache.prune(keep)
        print(f"cache {path}: dropped {deleted} of {before_n} entries, kept {before_n - deleted}; "
              f"{_human(before_size)} -> {_human(cache.size_bytes())}")
    return 0


def main(args: argparse.Namespace) -> int:
    """Run ``castgrid cache info`` or ``castgrid cache prune``."""
    if args.cache_command == "info":
        return _info(args)
    return _prune(args)
