"""Reading a YAML config file into a validated :class:`~runner.config.model.Config`.

Every problem becomes one line, ``FILE: path.to.field: what was expected, got what``, raised
as :class:`~runner.errors.ConfigError` (exit code 2).

The YAML is read by :class:`StrictLoader`, a safe loader that refuses what plain YAML lets slip:
a key given twice in one mapping (plain YAML keeps the last one, so a second ``windows:`` block
would silently replace the first), aliases that expand to more than :data:`MAX_VALUES` values
(a few nested aliases, the "billion laughs", would otherwise grow memory without bound when the
config is echoed or written to the manifest), an alias that contains itself, and scalars that
look like numbers or dates but are not (``0x_``, ``2021-13-45``).
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import yaml
from pydantic import ValidationError
from yaml.nodes import MappingNode, Node, ScalarNode, SequenceNode

from runner.config.model import Config
from runner.errors import ConfigError, brief, clip

#: Most values (scalars, lists and mappings, counted after every alias is expanded) one config
#: may hold. A real config holds a few hundred; the cap only stops alias bombs.
MAX_VALUES = 100_000

_MERGE_TAG = "tag:yaml.org,2002:merge"


class _Problem(yaml.MarkedYAMLError):
    """A problem :class:`StrictLoader` found, at a line of the file."""

    def __init__(self, problem: str, node: Node) -> None:
        super().__init__(problem=problem, problem_mark=node.start_mark)


class StrictLoader(yaml.SafeLoader):
    """A :class:`yaml.SafeLoader` that rejects duplicate keys and caps alias expansion.

    Problems are raised as :class:`yaml.MarkedYAMLError` (line and message), like YAML syntax
    errors, before any Python value is built.

    >>> yaml.load("a: 1", Loader=StrictLoader)
    {'a': 1}
    """

    def get_single_node(self) -> Node | None:
        """Compose the document, then check its node graph (duplicates, aliases)."""
        node = super().get_single_node()
        if node is not None:
            _NodeCheck(self).size(node, "")
        return node

    def construct_object(self, node: Node, deep: bool = False) -> Any:
        """Build a value; a scalar that matches a YAML type but cannot be read is a problem.

        PyYAML's resolvers accept ``0x_`` as an integer, ``._`` as a float and ``2021-13-45``
        as a date, and their constructors then raise ``ValueError``; a 5000-digit integer
        exceeds Python's int conversion limit the same way.
        """
        try:
            return super().construct_object(node, deep=deep)
        except (ValueError, IndexError, OverflowError) as exc:
            tag = node.tag.rpartition(":")[2]
            raise _Problem(
                f"{brief(node.value)} is not a valid {tag} ({clip(str(exc), 80)}); quote it "
                "to keep it as text",
                node,
            ) from None


class _NodeCheck:
    """One walk over the composed node graph, each node visited once (aliases share nodes)."""

    def __init__(self, loader: StrictLoader) -> None:
        self.loader = loader
        self.sizes: dict[int, int] = {}
        self.open: set[int] = set()

    def key_of(self, node: Node) -> Any:
        # `yes` and `true`, `1` and `0x1` are the same key once read: compare the values
        try:
            key = self.loader.construct_object(node)
            hash(key)
        except (yaml.YAMLError, TypeError):
            return (node.tag, node.value)
        return key

    def size(self, node: Node, path: str) -> int:
        """Values under ``node`` once aliases are expanded; raises past :data:`MAX_VALUES`."""
        ident = id(node)
        if ident in self.sizes:
            return self.sizes[ident]
        if ident in self.open:
            raise _Problem(f"{path or '(top level)'}: an alias refers to a value that contains "
                           "it", node)
        self.open.add(ident)
        total = 1
        if isinstance(node, SequenceNode):
            for i, child in enumerate(node.value):
                total += self.size(child, f"{path}[{i}]")
        elif isinstance(node, MappingNode):
            first: dict[Any, int] = {}
            for key_node, value_node in node.value:
                name = clip(key_node.value, 40) if isinstance(key_node, ScalarNode) else "?"
                child = f"{path}.{name}" if path else name
                if isinstance(key_node, ScalarNode) and key_node.tag != _MERGE_TAG:
                    key = self.key_of(key_node)
                    line = key_node.start_mark.line + 1
                    if key in first:
                        raise _Problem(
                            f"{child}: duplicate key (first at line {first[key]}); YAML would "
                            "silently keep only the last one, so remove one of them",
                            key_node,
                        )
                    first[key] = line
                total += self.size(key_node, child) + self.size(value_node, child)
        self.open.discard(ident)
        if total > MAX_VALUES:
            raise _Problem(
                f"{path or '(top level)'}: aliases expand to more than {MAX_VALUES} values; "
                "write the values out or use fewer nested aliases",
                node,
            )
        self.sizes[ident] = total
        return total


_UNION_LABEL = re.compile(
    r"^(str|int|float|bool|none|(function-[a-z-]+|literal|list|dict|nullable|union|"
    r"tagged-union|lax-or-strict|json-or-python)\[.*\])$"
)


def _loc_path(loc: tuple[Any, ...]) -> str:
    parts: list[str] = []
    for item in loc:
        if isinstance(item, int):
            parts.append(f"[{item}]")
        elif _UNION_LABEL.match(str(item)):
            continue  # union branch labels pydantic adds; not part of the YAML path
        else:
            parts.append(("." if parts else "") + clip(str(item), 40))
    return "".join(parts) or "(top level)"


def _hint(got: Any) -> str:
    """Why a value YAML read differently from what the user meant, when that is likely."""
    if isinstance(got, bool):
        return " (YAML reads yes/no/on/off/true/false as true or false)"
    if isinstance(got, str) and got.strip().lstrip("+-").replace(".", "", 1).isdigit():
        return " (a number in quotes is text: remove the quotes)"
    return ""


def _describe(err: dict[str, Any]) -> str:
    typ, ctx, got = err["type"], err.get("ctx") or {}, err.get("input")
    tail = f", got {brief(got)}" if "input" in err else ""
    if typ == "extra_forbidden":
        return "unknown key"
    if typ == "missing":
        return "required key is missing"
    if typ == "value_error":
        return clip(str(ctx.get("error", err["msg"])).removeprefix("Value error, "))
    if typ == "literal_error":
        return f"expected one of {ctx.get('expected')}{tail}"
    if typ in ("int_parsing", "int_type", "int_from_float"):
        return f"expected an integer{tail}{_hint(got)}"
    if typ in ("float_parsing", "float_type", "finite_number"):
        return f"expected a number{tail}{_hint(got)}"
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
    return f"{clip(err['msg'])}{tail}"


def format_validation_error(source: str, exc: ValidationError) -> str:
    """Turn a pydantic error into one line: ``FILE: path.to.field: what was expected, got what``.

    A value that fits none of a field's accepted forms (``series: 5``: neither text nor a list)
    gives pydantic one error per form; they are joined with "or" into one statement. Further
    mistakes at other fields are counted on the same line, so the message stays one line.
    """
    by_path: dict[str, list[str]] = {}
    for err in exc.errors():
        path = _loc_path(tuple(err["loc"]))
        if path == "(top level)" and err["type"] == "value_error":
            path = ""  # a whole-config rule: its message starts with the field it is about
        said = by_path.setdefault(path, [])
        text = _describe(err)
        if text not in said:
            said.append(text)
    lines = []
    for path, said in by_path.items():
        if len(said) > 1 and all(t.startswith("expected ") for t in said):
            # "expected text, got 5" + "expected a list, got 5" -> "expected text or a list, got 5"
            heads = [t.removeprefix("expected ").split(", got ")[0] for t in said]
            got = said[0].partition(", got ")[2]
            said = ["expected " + " or ".join(dict.fromkeys(heads)) + (f", got {got}" if got
                                                                          else "")]
        lines.append(f"{path}: {'; '.join(said)}" if path else "; ".join(said))
    more = f" (and {len(lines) - 1} more problem(s))" if len(lines) > 1 else ""
    return f"{source}: {lines[0]}{more}"


def parse_config(data: Any, source: str = "<config>") -> Config:
    """Validate an already-parsed mapping; errors name ``source``."""
    if not isinstance(data, dict):
        raise ConfigError(
            f"{source}: expected a mapping of config keys at the top level, got {brief(data)}"
        )
    try:
        return Config.model_validate(data)
    except ValidationError as exc:
        raise ConfigError(format_validation_error(source, exc)) from None


def _decode(path: Path, raw: bytes) -> str:
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise ConfigError(f"{path}: the file is UTF-16 text; save it as UTF-8")
    try:
        return raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise ConfigError(
            f"{path}: line {line}: not UTF-8 text (byte 0x{raw[exc.start]:02x}); save the "
            "file as UTF-8"
        ) from None


def _yaml_problem(exc: yaml.YAMLError, text: str) -> str:
    """One line for a YAML error: the line, the problem and what it was inside."""
    if isinstance(exc, yaml.reader.ReaderError):
        line = text[: exc.position].count("\n") + 1
        code = exc.character if isinstance(exc.character, int) else ord(exc.character)
        return f"line {line}: control character #x{code:04x} cannot appear in YAML text"
    mark = getattr(exc, "problem_mark", None)
    where = f"line {mark.line + 1}: " if mark is not None else ""
    problem = getattr(exc, "problem", None) or "not valid YAML"
    context = getattr(exc, "context", None)
    context_mark = getattr(exc, "context_mark", None)
    if context:
        # PyYAML's context says what the problem is inside ("while scanning a quoted
        # scalar", "found duplicate anchor 'x'; first occurrence") and where that started
        at = f" at line {context_mark.line + 1}" if context_mark is not None else ""
        problem = f"{problem} ({context}{at})"
    return clip(f"{where}{problem}")


def load_config(path: str | Path) -> Config:
    """Read and validate a YAML config file.

    Raises :class:`~runner.errors.ConfigError` with one line naming the file and the problem:
    unreadable or non-UTF-8 file, YAML syntax, duplicate keys, alias bombs, wrong types.
    """
    path = Path(path)
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise ConfigError(f"{path}: config file not found") from None
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read config file ({exc.strerror})") from None
    text = _decode(path, raw)
    try:
        data = yaml.load(text, Loader=StrictLoader)
    except yaml.YAMLError as exc:
        raise ConfigError(f"{path}: {_yaml_problem(exc, text)}") from None
    except RecursionError:
        raise ConfigError(f"{path}: values are nested too deeply") from None
    return parse_config(data, str(path))
