"""Reading a YAML config file into a validated :class:`~runner.config.model.Config`.

Every problem becomes one line per mistake, ``FILE: path.to.field: what was expected, got
what``, raised as :class:`~runner.errors.ConfigError` (exit code 2).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import yaml
from pydantic import ValidationError

from runner.config.model import Config
from runner.errors import ConfigError


def _loc_path(loc: tuple[Any, ...]) -> str:
    parts: list[str] = []
    for item in loc:
        if isinstance(item, int):
            parts.append(f"[{item}]")
        elif str(item).startswith("function-") or item in ("str", "int", "list[str]", "none"):
            continue  # union branch labels pydantic adds; not part of the YAML path
        else:
            parts.append(("." if parts else "") + str(item))
    return "".join(parts) or "(top level)"


def _describe(err: dict[str, Any]) -> str:
    typ, ctx, got = err["type"], err.get("ctx") or {}, err.get("input")
    shown = json.dumps(got) if isinstance(got, (str, int, float, bool)) or got is None else None
    tail = f", got {shown}" if shown is not None else ""
    if typ == "extra_forbidden":
        return "unknown key"
    if typ == "missing":
        return "required key is missing"
    if typ == "value_error":
        return str(ctx.get("error", err["msg"])).removeprefix("Value error, ")
    if typ == "literal_error":
        return f"expected one of {ctx.get('expected')}{tail}"
    if typ in ("int_parsing", "int_type", "int_from_float"):
        return f"expected an integer{tail}"
    if typ in ("float_parsing", "float_type"):
        return f"expected a number{tail}"
    if typ in ("bool_parsing", "bool_type"):
        return f"expected true or false{tail}"
    if typ in ("string_type",):
        return f"expected text{tail}"
    if typ in ("list_type",):
        return f"expected a list{tail}"
    if typ in ("dict_type", "model_type", "model_attributes_type"):
        return f"expected a mapping{tail}"
    if typ == "greater_than_equal":
        return f"expected a number >= {ctx.get('ge')}{tail}"
    if typ == "greater_than":
        return f"expected a number > {ctx.get('gt')}{tail}"
    if typ == "too_short":
        return f"expected at least {ctx.get('min_length')} item(s)"
    return f"{err['msg']}{tail}"


def format_validation_error(source: str, exc: ValidationError) -> str:
    """Turn a pydantic error into ``FILE: path.to.field: what was expected, got what`` lines."""
    lines, seen = [], set()
    for err in exc.errors():
        line = f"{source}: {_loc_path(tuple(err['loc']))}: {_describe(err)}"
        if line not in seen:
            seen.add(line)
            lines.append(line)
    return "\n".join(lines[:5])


def parse_config(data: Any, source: str = "<config>") -> Config:
    """Validate an already-parsed mapping; errors name ``source``."""
    if not isinstance(data, dict):
        raise ConfigError(f"{source}: expected a mapping of config keys at the top level")
    try:
        return Config.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(source, exc)) from None


def load_config(path: str | Path) -> Config:
    """Read and validate a YAML config file.

    Raises :class:`~runner.errors.ConfigError` with one line per problem.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{path}: config file not found") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read config file ({exc.strerror})") from None
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f"line {mark.line + 1}: " if mark is not None else ""
        problem = getattr(exc, "problem", None) or "not valid YAML"
        raise ConfigError(f"{path}: {where}{problem}") from None
    return parse_config(data, str(path))
