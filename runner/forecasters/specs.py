"""From a config to the forecasters of a run: default baselines, grid expansion, name checks.

Every forecaster of a run is a :class:`~runner.config.ForecasterSpec` with a unique name;
a ``grid`` entry becomes one candidate per combination (``ets[trend=add,damped=true]``).
"""

from __future__ import annotations

import itertools
import json
from typing import Any

from runner.config import Config, ForecasterSpec
from runner.errors import ConfigError, brief, clip
from runner.forecasters.registry import BY_KIND, KINDS, PANEL_PLUGIN, PLUGIN, kinds_for


def _format_value(v: Any) -> str:
    return json.dumps(v, separators=(",", ":")).replace('"', "")


def baseline_specs(cfg: Config) -> list[ForecasterSpec]:
    """The baselines of the run, in config order (every baseline when none are listed)."""
    if cfg.baselines is None:
        return [
            ForecasterSpec(name=k.name, kind=k.name, role="baseline", params={}, default=True,
                           seasonal_only=k.seasonal_only)
            for k in KINDS if k.role == "baseline" and k.default
        ]
    out = []
    for b in cfg.baselines:
        name = b.kind
        if b.params:
            name += "[" + ",".join(f"{k}={_format_value(v)}" for k, v in b.params.items()) + "]"
        kind = BY_KIND.get(b.kind)
        out.append(ForecasterSpec(name=name, kind=b.kind, role="baseline", params=dict(b.params),
                                  seasonal_only=kind is not None and kind.seasonal_only))
    return out


def candidate_specs(cfg: Config) -> list[ForecasterSpec]:
    """The candidate models after expanding every ``grid`` into its combinations."""
    out = []
    for m in cfg.models:
        if not m.grid:
            out.append(
                ForecasterSpec(
                    name=m.name, kind=m.kind, role="candidate", params=dict(m.params), entry=m.entry
                )
            )
            continue
        keys = list(m.grid)
        for combo in itertools.product(*(m.grid[k] for k in keys)):
            chosen = dict(zip(keys, combo))
            label = ",".join(f"{k}={_format_value(v)}" for k, v in chosen.items())
            out.append(
                ForecasterSpec(
                    name=f"{m.name}[{label}]",
                    kind=m.kind,
                    role="candidate",
                    params={**m.params, **chosen},
                    entry=m.entry,
                )
            )
    return out


def forecaster_specs(cfg: Config) -> list[ForecasterSpec]:
    """Baselines then candidates: every forecaster the run evaluates."""
    return baseline_specs(cfg) + candidate_specs(cfg)


def check_specs(cfg: Config, source: str) -> None:
    """Raise :class:`~runner.errors.ConfigError` for unknown kinds, reused names or a reference
    that is not a baseline, naming the config field."""
    baselines = kinds_for("baseline")
    if cfg.baselines == []:
        raise ConfigError(
            f"{source}: baselines: expected at least one baseline (every forecaster is compared "
            "with a reference baseline); leave the key out to run them all"
        )
    for i, b in enumerate(cfg.baselines or []):
        if b.kind not in baselines:
            raise ConfigError(
                f"{source}: baselines[{i}]: unknown baseline {brief(b.kind)}; expected one of "
                f"{', '.join(baselines)}"
            )
    models = [*kinds_for("candidate"), PLUGIN, PANEL_PLUGIN]
    for i, m in enumerate(cfg.models):
        if m.kind not in models:
            hint = " (it is a baseline: list it under baselines)" if m.kind in baselines else ""
            raise ConfigError(
                f"{source}: models[{i}].kind: unknown kind {brief(m.kind)}; expected one of "
                f"{', '.join(models)}{hint}"
            )
    specs = forecaster_specs(cfg)
    names = [s.name for s in specs]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise ConfigError(f"{source}: forecaster name {brief(dup[0])} is used twice")
    baseline_names = [s.name for s in specs if s.role == "baseline"]
    if cfg.reference is not None and cfg.reference not in baseline_names:
        raise ConfigError(
            f"{source}: reference: {brief(cfg.reference)} is not one of the baselines "
            f"({clip(', '.join(baseline_names))})"
        )
