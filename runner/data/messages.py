"""How the loader's messages name the file, its series and its values.

Every problem with a dataset is one line that names the file (as the config writes it), the
column or series, and what was expected; a value copied from the file into a message has its
control characters escaped, so a quoted newline or a NUL cannot break that line.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

from runner.errors import ConfigError, DataError


@dataclass
class Source:
    """How messages name one dataset file and its series; collects the loader's notices.

    ``label`` is the file as the config writes it; ``wide`` says whether series are columns.
    """

    label: str
    wide: bool
    notes: list[str] = field(default_factory=list)
    entry: str = ""  # how messages name the config entry: "c.yaml: datasets[0]."

    def fail(self, message: str) -> DataError:
        """The error for a problem with the file: ``label: message``, on one line."""
        # One line, whatever the file holds: control characters (a quoted newline, a NUL)
        # are shown escaped.
        return DataError(CONTROL.sub(_escape, f"{self.label}: {message}"))

    def config_fail(self, key: str, message: str) -> ConfigError:
        """The error for a bad setting ``key`` of the config's dataset entry."""
        return ConfigError(f"{self.entry}{key}: {message}")

    def series(self, key: str) -> str:
        """How a message names series ``key``: ``series "k"``, or ``column "k"`` (wide file)."""
        # In a wide file a series *is* a column, so name it the way the user sees it.
        return f'column "{shown(key)}"' if self.wide else f'series "{shown(key)}"'


#: Characters that break a line, or that a terminal would act on: shown escaped in messages.
CONTROL = re.compile("[\x00-\x1f\x7f-\x9f\u2028\u2029]")


def _escape(m: re.Match) -> str:
    return repr(m.group(0))[1:-1]


def shown(text: object, limit: int = 60) -> str:
    """A value from the file as a message shows it: control characters escaped, long text cut."""
    text = CONTROL.sub(_escape, str(text))
    return text if len(text) <= limit else text[: limit - 3] + "..."


def read_error_text(exc: Exception) -> str:
    """Why a file reader (pandas, pyarrow, gzip, csv) failed, as one short line for a message.

    Whitespace is collapsed, a decoding failure reads "not UTF-8 text", and text past 160
    characters is cut. Used wherever castgrid reads a file a person wrote: datasets and
    recorded forecasts.

    >>> read_error_text(ValueError("Expected 3 columns,\\n got 4"))
    'Expected 3 columns, got 4'
    """
    text = " ".join(str(exc).split()) or type(exc).__name__
    if isinstance(exc, UnicodeDecodeError) or "invalid UTF8" in text:
        text = "not UTF-8 text"
    return text if len(text) <= 160 else text[:157] + "..."
