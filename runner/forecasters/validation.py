"""Checking forecasters before a run: entries import, honour the protocol, accept their params.

:func:`validate_forecasters` is called at ``check`` and ``run`` time, before any task starts, so
a misspelt entry, a class without ``predict`` or a bad parameter value is one clear line naming
the config file and the field, not a thousand failed tasks. What can only be known while
running (a wrong output shape, NaN forecasts) is recorded per task by
:func:`runner.execution.tasks.run_model_task`, naming the forecaster. Derived candidates
(:mod:`runner.forecasters.derived`) are never built: the forecasters they name are checked.
"""

from __future__ import annotations

import inspect
import math
import re
import sys
from pathlib import Path
from typing import Any

from runner.config import Config, ForecasterSpec, ModelConfig
from runner.errors import ConfigError, PluginError, clip
from runner.forecasters.contract import panel_protocol_problem, protocol_problem
from runner.forecasters.derived import derived_problem
from runner.forecasters.registry import (
    PANEL_PLUGIN,
    PLUGIN,
    entry_of,
    is_derived,
    is_from_file,
    is_panel,
    load_entry,
)
from runner.forecasters.specs import baseline_specs, candidate_specs, check_specs


def _locations(cfg: Config) -> list[tuple[ForecasterSpec, str, dict[str, str]]]:
    """Each forecaster of the run with its YAML location and where each param came from."""
    out: list[tuple[ForecasterSpec, str, dict[str, str]]] = []
    for i, spec in enumerate(baseline_specs(cfg)):
        loc = "baselines" if spec.default else f"baselines[{i}]"
        # YAML spells a baseline's params as `- moving_average: {size: 4}`.
        out.append((spec, loc, {k: spec.kind for k in spec.params}))
    # candidate_specs expands each model entry in config order into prod(len(grid values))
    # candidates; walk the same order to map every candidate back to its entry.
    candidates = iter(candidate_specs(cfg))
    for i, m in enumerate(cfg.models):
        count = math.prod(len(v) for v in m.grid.values()) if m.grid else 1
        source = {**{k: "params" for k in m.params}, **{k: "grid" for k in m.grid}}
        for _ in range(count):
            out.append((next(candidates), f"models[{i}]", source))
    return out


_PARAM_PREFIX = re.compile(r"^([A-Za-z_][A-Za-z0-9_]*): ")


def _accepted(factory: Any) -> list[str] | None:
    try:
        sig = inspect.signature(factory)
    except (TypeError, ValueError):
        return None
    if any(p.kind is p.VAR_KEYWORD for p in sig.parameters.values()):
        return None
    return [p.name for p in sig.parameters.values() if p.kind is not p.VAR_POSITIONAL]


def _plugin_folder_importable(cfg: Config, config_path: str | Path) -> None:
    """Put the config's folder on the import path when the config names plugins.

    Users keep a plugin module next to the config that uses it and expect it to be found, as
    Python finds modules next to a script. The folder is appended, so it never shadows an
    installed package; worker processes and dask workers receive ``sys.path`` from this process
    (:mod:`runner.execution.workers`, :mod:`runner.execution.dask_cluster`), so they find the
    module too.
    """
    if not any(m.kind in (PLUGIN, PANEL_PLUGIN) for m in cfg.models):
        return
    folder = str(Path(config_path).resolve().parent)
    if folder not in sys.path:
        sys.path.append(folder)


def _build(
    src: str, spec: ForecasterSpec, loc: str, source: dict[str, str],
    run_specs: list[ForecasterSpec],
) -> tuple[Any, ConfigError | None]:
    """Load and build ``spec``: (the object, None), or (None, the ConfigError its params give).

    Problems that no choice of params can fix (the entry cannot be imported, an unknown param,
    the object breaks the protocol) are raised at once.
    """
    entry = entry_of(spec)
    field = f"{loc}.entry" if spec.kind in (PLUGIN, PANEL_PLUGIN) else f"{loc} ({spec.kind})"
    try:
        factory = load_entry(entry)
    except PluginError as exc:
        msg = str(exc).removeprefix("entry ")  # the field already says it is the entry
        raise PluginError(f"{src}: {field}: {msg}") from None
    accepted = _accepted(factory)
    if accepted is not None:
        unknown = [k for k in spec.params if k not in accepted]
        if unknown:
            where = source.get(unknown[0], "params")
            expected = ", ".join(accepted) if accepted else "no parameters"
            raise ConfigError(
                f"{src}: {loc}.{where}.{clip(unknown[0], 40)}: unknown parameter of {spec.kind} "
                f"{clip(spec.name, 80)} (expected {expected})"
            )
    if is_derived(spec):
        # nothing to build: its forecasts come from other forecasters of the run
        problem = derived_problem(spec, run_specs)
        if problem is not None:
            param, msg = problem
            raise ConfigError(f"{src}: {loc}.{source.get(param, 'params')}.{param}: {msg}")
        return None, None
    try:
        obj = factory(**spec.params)
    except (TypeError, ValueError) as exc:
        msg = clip(str(exc))
        m = _PARAM_PREFIX.match(msg)
        if m and m.group(1) in spec.params:
            where = f"{source.get(m.group(1), 'params')}.{m.group(1)}"
            msg = msg[m.end() :]
        else:
            where = "params"
        error = ConfigError(f"{src}: {loc}.{where}: {msg}")
        if isinstance(exc, TypeError):
            raise error from None
        return None, error
    except Exception as exc:  # user code may raise anything; it is still a plugin problem
        raise PluginError(
            f"{src}: {field}: building {clip(spec.name, 80)} raised {type(exc).__name__}: "
            f"{clip(str(exc))}"
        ) from None
    # a recorded candidate checks its params when built, and has no fit / predict
    if is_from_file(spec):
        problem = None
    elif is_panel(spec):
        problem = panel_protocol_problem(obj)
    else:
        problem = protocol_problem(obj)
    if problem is not None:
        raise PluginError(f"{src}: {field}: {entry} {problem}")
    return obj, None


def _impossible_values(
    model: ModelConfig, failed: dict[str, ConfigError], combos: list[ForecasterSpec]
) -> ConfigError | None:
    """The error of a grid value that fails in every combination it is part of, if any.

    Such a value is a mistake (a typo, a value out of range), not an impossible pairing.
    """
    for key, values in model.grid.items():
        for value in values:
            having = [s for s in combos if s.params[key] is value or (
                s.params[key] == value and type(s.params[key]) is type(value))]
            if having and all(s.name in failed for s in having):
                return failed[having[0].name]
    return None


def validate_forecasters(cfg: Config, config_path: str | Path) -> dict[str, str]:
    """Load, inspect and build every forecaster of ``cfg`` once; raise on the first problem.

    Raises :class:`~runner.errors.PluginError` when an entry cannot be imported or its object
    lacks the protocol's methods, and :class:`~runner.errors.ConfigError` when its params are
    rejected, as ``FILE: models[i].params.NAME: message``.

    A ``grid`` may pair values that cannot go together (``trend: [add, null]`` x
    ``damped: [true, false]``: a damped trend needs a trend). A combination whose build raises
    ``ValueError`` is impossible and is dropped, provided every value of the grid works in some
    combination; a value that fails in every combination (a typo) and a grid whose every
    combination fails stay errors. Returns the dropped forecasters: name -> a note saying why.
    """
    src = str(config_path)
    check_specs(cfg, src)
    _plugin_folder_importable(cfg, config_path)
    dropped: dict[str, str] = {}
    by_entry: dict[str, list[tuple[ForecasterSpec, ConfigError | None]]] = {}
    located = _locations(cfg)
    run_specs = [spec for spec, _, _ in located]
    for spec, loc, source in located:
        _, error = _build(src, spec, loc, source, run_specs)
        if error is not None and not (loc.startswith("models[") and "grid" in source.values()):
            raise error
        by_entry.setdefault(loc, []).append((spec, error))
    for i, m in enumerate(cfg.models):
        built = by_entry.get(f"models[{i}]", [])
        failed = {s.name: e for s, e in built if e is not None}
        if not failed:
            continue
        if len(failed) == len(built):
            raise next(iter(failed.values()))
        bad_value = _impossible_values(m, failed, [s for s, _ in built])
        if bad_value is not None:
            raise bad_value
        for name, error in failed.items():
            why = str(error).removeprefix(f"{src}: models[{i}].")
            dropped[name] = (
                f"models[{i}]: grid combination {clip(name, 120)} dropped: it cannot be built "
                f"({why})"
            )
    return dropped
