"""Checking forecasters before a run: entries import, honour the protocol, accept their params.

:func:`validate_forecasters` is called at ``check`` and ``run`` time, before any task starts, so
a misspelt entry, a class without ``predict`` or a bad parameter value is one clear line naming
the config file and the field, not a thousand failed tasks. What can only be known while
running (a wrong output shape, NaN forecasts) is recorded per task by
:func:`runner.execution.tasks.run_model_task`, naming the forecaster.
"""

from __future__ import annotations

import inspect
import math
import re
from pathlib import Path
from typing import Any

from runner.config import Config, ForecasterSpec
from runner.errors import ConfigError, PluginError
from runner.forecasters.contract import panel_protocol_problem, protocol_problem
from runner.forecasters.registry import PANEL_PLUGIN, PLUGIN, entry_of, is_panel, load_entry
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


def validate_forecasters(cfg: Config, config_path: str | Path) -> None:
    """Load, inspect and build every forecaster of ``cfg`` once; raise on the first problem.

    Raises :class:`~runner.errors.PluginError` when an entry cannot be imported or its object
    lacks the protocol's methods, and :class:`~runner.errors.ConfigError` when its params are
    rejected, as ``FILE: models[i].params.NAME: message``.
    """
    src = str(config_path)
    check_specs(cfg, src)
    for spec, loc, source in _locations(cfg):
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
                    f"{src}: {loc}.{where}.{unknown[0]}: unknown parameter of {spec.kind} "
                    f"{spec.name} (expected {expected})"
                )
        try:
            obj = factory(**spec.params)
        except (TypeError, ValueError) as exc:
            msg = str(exc)
            m = _PARAM_PREFIX.match(msg)
            if m and m.group(1) in spec.params:
                where = f"{source.get(m.group(1), 'params')}.{m.group(1)}"
                msg = msg[m.end() :]
            else:
                where = "params"
            raise ConfigError(f"{src}: {loc}.{where}: {msg}") from None
        except Exception as exc:  # user code may raise anything; it is still a plugin problem
            raise PluginError(
                f"{src}: {field}: building {spec.name} raised {type(exc).__name__}: {exc}"
            ) from None
        problem = panel_protocol_problem(obj) if is_panel(spec) else protocol_problem(obj)
        if problem is not None:
            raise PluginError(f"{src}: {field}: {entry} {problem}")
