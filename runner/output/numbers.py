"""One number formatter for everything a person reads: terminal, Markdown, HTML, history, diff.

A column of numbers is shown with one number of decimals, chosen from the column's scale by
:func:`column_decimals`, so that digits line up and a reader compares like with like; the same
rounding (Python's round-half-even of the exact binary value, as ``format`` does) is used
everywhere. A missing value (None or NaN) is shown as ``-``. Machine formats
(``leaderboard.csv``) keep their own byte-stable format and do not use this module.

>>> d = column_decimals([61.0046, 79.9357, 173.474])
>>> d, format_number(61.0046, d)
(2, '61.00')
>>> format_percent(-211.04)
'-211.0%'
>>> print(format_table(["forecaster", "mase"], [["theta", 0.765855], ["mean", 1.59662]]))
forecaster   mase
----------  -----
theta       0.766
mean        1.597
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Sequence
from typing import Any

#: How a missing number is shown.
MISSING = "-"
#: Significant digits shown at a column's typical (median absolute) value.
SIGNIFICANT = 4
#: Bounds of the decimals :func:`column_decimals` chooses.
MAX_DECIMALS = 6
#: Below this, a p-value is shown as "<0.001" (common practice in reporting tests).
P_FLOOR = 0.001

# A formatted number: "12", "-0.5", "1e-05", "+4.5%", "<0.001", "-", "inf", or "a -> b" of those
# (diff's before -> after cells). Such cells are right-aligned by format_table.
_NUMBER = re.compile(r"^[<>]?[+-]?((\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?|inf)%?$|^-$|^$|^nan$")


def _as_float(value: Any) -> float | None:
    """The value as a float when it is a number (bools and text are not), else None."""
    if value is None or isinstance(value, (bool, str, bytes)):
        return None
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return out


def is_missing(value: Any) -> bool:
    """None, NaN, or pandas' NA/NaT: shown as :data:`MISSING`."""
    if value is None:
        return True
    try:
        return bool(value != value)  # NaN, pd.NA and NaT are the values unequal to themselves
    except (TypeError, ValueError):  # pd.NA refuses bool(); it is missing
        return True


def column_decimals(values: Iterable[Any]) -> int:
    """Decimals for a column: about 4 significant digits at its typical value, within 0..6.

    The typical value is the median absolute finite number of the column (zeros left out when
    there are others, so a column of mostly zeros still shows its non-zero values). A column of
    whole numbers gets 0; text, booleans and missing values are ignored.

    >>> column_decimals([0.57749, 0.765855, 2.6203]), column_decimals([1, 2, 13])
    (4, 0)
    """
    numbers = [abs(f) for v in values if (f := _as_float(v)) is not None and math.isfinite(f)]
    if not numbers or all(f.is_integer() for f in numbers):
        return 0
    nonzero = sorted(f for f in numbers if f > 0)
    mid = len(nonzero) // 2
    typical = nonzero[mid] if len(nonzero) % 2 else (nonzero[mid - 1] + nonzero[mid]) / 2
    decimals = SIGNIFICANT - 1 - math.floor(math.log10(typical))
    return min(max(decimals, 0), MAX_DECIMALS)


def format_number(value: Any, decimals: int) -> str:
    """``value`` with ``decimals`` decimals; ``-`` when missing; text is returned as it is.

    >>> format_number(2.5, 0), format_number(-0.0001, 2), format_number(None, 3)
    ('2', '0.00', '-')
    """
    if is_missing(value):
        return MISSING
    if isinstance(value, bool):
        return "yes" if value else "no"
    f = _as_float(value)
    if f is None:
        return str(value)
    if math.isinf(f):
        return "inf" if f > 0 else "-inf"
    text = f"{f:.{max(int(decimals), 0)}f}"
    if text.startswith("-") and float(text) == 0:  # -0.00: a sign the reader cannot use
        text = text[1:]
    return text


def format_percent(percent: Any, decimals: int = 1, signed: bool = True) -> str:
    """A value in percent points with a sign (``+44.5%``); ``-`` when missing.

    A value that rounds to zero has no sign; infinities read ``+inf%`` / ``-inf%``.

    >>> format_percent(44.546), format_percent(0.01), format_percent(float("nan"))
    ('+44.5%', '0.0%', '-')
    """
    if is_missing(percent):
        return MISSING
    f = _as_float(percent)
    if f is None:
        return str(percent)
    if math.isinf(f):
        return "+inf%" if f > 0 else "-inf%"
    text = format_number(f, decimals)
    if signed and f > 0 and float(text) != 0:
        text = "+" + text
    return text + "%"


def format_p(p: Any) -> str:
    """A p-value: three decimals, ``<0.001`` below that (common practice); ``-`` when missing.

    >>> format_p(0.0312), format_p(1.86e-09)
    ('0.031', '<0.001')
    """
    if is_missing(p):
        return MISSING
    f = _as_float(p)
    if f is None:
        return str(p)
    return f"<{P_FLOOR:g}" if f < P_FLOOR else format_number(f, 3)


def format_column(values: Sequence[Any], decimals: int | None = None) -> list[str]:
    """Every value of a column formatted alike (``decimals`` chosen from the column if None)."""
    d = column_decimals(values) if decimals is None else decimals
    return [format_number(v, d) for v in values]


def looks_numeric(cell: str) -> bool:
    """Whether a formatted cell reads as a number (or ``a -> b`` of numbers): right-aligned."""
    return all(_NUMBER.match(part.strip()) for part in cell.split(" -> "))


def format_table(header: Sequence[str], rows: Sequence[Sequence[Any]], markdown: bool = False,
                 indent: str = "") -> str:
    """A plain-text table with aligned columns, or a Markdown table.

    Numbers in ``rows`` are formatted per column (:func:`column_decimals`), missing values read
    ``-``, text is kept. A column whose cells all read as numbers is right-aligned (``---:`` in
    Markdown), any other column left-aligned.
    """
    ncol = len(header)
    for i, row in enumerate(rows):
        if len(row) != ncol:
            raise ValueError(f"row {i} has {len(row)} cells, the header {ncol}")
    columns = [format_column([row[c] for row in rows]) for c in range(ncol)]
    body = [[columns[c][r] for c in range(ncol)] for r in range(len(rows))]
    head = [str(h) for h in header]
    right = [bool(body) and all(looks_numeric(row[c]) for row in body) for c in range(ncol)]
    if markdown:
        esc = [[cell.replace("|", "\\|") for cell in row] for row in [head, *body]]
        lines = ["| " + " | ".join(esc[0]) + " |",
                 "|" + "|".join("---:" if right[c] else "---" for c in range(ncol)) + "|"]
        lines += ["| " + " | ".join(row) + " |" for row in esc[1:]]
        return "\n".join(indent + line for line in lines)
    widths = [max(len(row[c]) for row in [head, *body]) for c in range(ncol)]

    def line(row: list[str]) -> str:
        cells = [row[c].rjust(widths[c]) if right[c] else row[c].ljust(widths[c])
                 for c in range(ncol)]
        return (indent + "  ".join(cells)).rstrip()

    rule = indent + "  ".join("-" * w for w in widths)
    return "\n".join([line(head), rule, *(line(row) for row in body)])
