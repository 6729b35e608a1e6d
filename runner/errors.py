"""Errors castgrid reports to its users.

The tree::

    CastgridError             anything castgrid reports as a user-facing problem (exit code 2)
    ├── ConfigError           the YAML config is malformed or names something that does not exist
    ├── DataError             a dataset file is missing, unreadable or does not fit the config
    ├── PluginError           a plugin forecaster cannot be imported or breaks the protocol
    └── PathError             a folder or file castgrid must write (results, cache) cannot be
                              written: no permission, a file where a folder should be, ...

The command line also reports an ``OSError`` about a path of the user's machine (permission
denied, read-only file system, disk full, a folder where a file should be) as one line naming
the path, exit code 2: it is the user's environment, not a castgrid bug.

Every message is one line that names the file, then the field or column, then what was
expected and what was found, for example::

    configs/shop.yaml: windows.train: expected a count >= 1 or a share like "50%", got "half"
"""

from __future__ import annotations

import datetime
import json


class CastgridError(Exception):
    """Base of every user-facing castgrid error; the command line turns it into exit code 2."""


class ConfigError(CastgridError):
    """The config file is malformed, has unknown keys or values out of range."""


class DataError(CastgridError):
    """A dataset cannot be read or does not match what the config says about it."""


class PluginError(CastgridError):
    """A plugin forecaster cannot be imported, built, or does not honour the protocol."""


class PathError(CastgridError):
    """A folder or file castgrid must create or write cannot be used as it is."""


#: Longest a value from the user's input may be when a message echoes it (characters).
BRIEF_LIMIT = 80


class _Full(Exception):
    pass


def brief(value: object, limit: int = BRIEF_LIMIT) -> str:
    """``value`` as JSON-like text, cut to ``limit`` characters (with "...") for a message.

    A config value echoed in an error message may be huge (a megabyte string, or nested YAML
    aliases that expand to millions of items), so the text is built piece by piece and building
    stops as soon as the limit is passed: the cost is bounded whatever the value.

    >>> brief([1, 2, [3]])
    '[1, 2, [3]]'
    >>> brief("x" * 200, 10)
    '"xxxxxx...'
    """
    parts: list[str] = []
    room = [limit + 1]

    def emit(text: str) -> None:
        parts.append(text[: max(room[0], 0)])
        room[0] -= len(text)
        if room[0] <= 0:
            raise _Full

    def scalar(v: object) -> str:
        if isinstance(v, str):
            return json.dumps(v[: limit + 1])
        if isinstance(v, int) and not isinstance(v, bool) and v.bit_length() > 64:
            # int -> str is refused past 4300 digits, and no config value is that long anyway
            return f"<an integer of about {int(v.bit_length() * 0.30103)} digits>"
        if v is None or isinstance(v, (bool, int, float)):
            return json.dumps(v)
        if isinstance(v, (datetime.date, datetime.time)):
            return v.isoformat()
        return repr(v)[: limit + 1]

    def walk(v: object) -> None:
        if isinstance(v, dict):
            emit("{")
            for i, (k, x) in enumerate(v.items()):
                emit(", " if i else "")
                walk(k)
                emit(": ")
                walk(x)
            emit("}")
        elif isinstance(v, (list, tuple)):
            emit("[")
            for i, x in enumerate(v):
                emit(", " if i else "")
                walk(x)
            emit("]")
        else:
            emit(scalar(v))

    try:
        walk(value)
    except _Full:
        return "".join(parts)[: limit - 3] + "..."
    return "".join(parts)


def clip(text: str, limit: int = 4 * BRIEF_LIMIT) -> str:
    """``text`` cut to ``limit`` characters and kept to one line (for messages from user code)."""
    one = " ".join(str(text).split())
    return one if len(one) <= limit else one[: limit - 3] + "..."
