"""Messages of one kind as one line: a run must not bury its one important line under 10,000.

Two lines are of one kind when they are equal but for quoted names and numbers (``series 'c'
has 7 observations`` and ``series 'e' has 5 observations``). The first line of each kind is
kept as it is, followed by how many more there are and the first few of their names.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

_QUOTED = re.compile(r""""[^"]*"|'[^']*'""")
_NUMBER = re.compile(r"\d+(?:\.\d+)?")


def _kind(line: str) -> str:
    return _NUMBER.sub("#", _QUOTED.sub("Q", line))


def _subject(line: str) -> str:
    """The line's first quoted name (what makes it differ from others of its kind)."""
    m = _QUOTED.search(line)
    return m.group(0) if m else _NUMBER.sub("#", line)[:40]


def summarise(lines: Sequence[str], show: int = 3) -> list[str]:
    """One line per kind of message, in order of first appearance, with a count.

    >>> summarise(["series 'a' is short", "series 'b' is short", "series 'c' is short"])
    ["series 'a' is short (and 2 more like it: 'b', 'c')"]
    """
    groups: dict[str, list[str]] = {}
    for line in lines:
        groups.setdefault(_kind(line), []).append(line)
    out = []
    for members in groups.values():
        if len(members) == 1:
            out.append(members[0])
            continue
        names = [_subject(m) for m in members[1:]]
        more = f" and {len(names) - show} more" if len(names) > show else ""
        out.append(f"{members[0]} (and {len(names)} more like it: "
                   f"{', '.join(names[:show])}{more})")
    return out
