"""Reusing a plot whose inputs did not change: a PNG is keyed by exactly what it draws.

Drawing a plot costs matplotlib's import (most of a second) and the drawing itself; a rerun of
an unchanged experiment would redraw the same pictures. So each PNG carries, in PNG text
chunks (``tEXt``, part of the PNG standard), the key of what it shows and the notes the page
prints under it. The key is a SHA-256 over

* the plot's :class:`~runner.report.plots.Sketch` data: the lines, labels, ticks and small
  tables it draws, fed value by value (:func:`_feed`);
* the style version: the source of the modules that draw (plots, scales, style), the
  matplotlib settings (:data:`runner.report.style.RC`) and matplotlib's version.

:func:`reusable` returns the bytes and notes of a previous PNG of the same file name when its
key is the same, so the report copies it instead of drawing; any change in what the plot
shows, or in how plots are drawn, changes the key and the plot is drawn again.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import struct
import zlib
from functools import cache
from pathlib import Path
from typing import Any

#: PNG text keywords of the key and of the notes.
KEY_FIELD = "castgrid-plot-key"
NOTES_FIELD = "castgrid-plot-notes"
_PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@cache
def style_version() -> str:
    """A digest of how plots are drawn: the drawing modules' source, RC and matplotlib's
    version (from its metadata: nothing is imported)."""
    from importlib.metadata import PackageNotFoundError, version

    from runner import __version__
    from runner.report import plots, scales, style

    h = hashlib.sha256()
    for module in (plots, scales, style):
        try:
            h.update(Path(module.__file__ or "").read_bytes())
        except OSError:  # installed without sources: the package version stands in
            h.update(__version__.encode())
    h.update(json.dumps(style.RC, sort_keys=True).encode())
    try:
        h.update(version("matplotlib").encode())
    except PackageNotFoundError:
        pass
    return h.hexdigest()


def _feed(h: Any, value: Any) -> None:
    """Feed ``value`` into the hash ``h`` with its type, so that distinct values differ."""
    import numpy as np

    if value is None or isinstance(value, (bool, int, float, str)):
        h.update(f"{type(value).__name__}:{value!r};".encode())
    elif isinstance(value, dict):
        h.update(f"dict{len(value)}:".encode())
        for k in sorted(value, key=str):
            _feed(h, str(k))
            _feed(h, value[k])
    elif isinstance(value, (list, tuple)):
        h.update(f"list{len(value)}:".encode())
        for v in value:
            _feed(h, v)
    elif dataclasses.is_dataclass(value) and not isinstance(value, type):
        h.update(f"{type(value).__name__}:".encode())
        for f in dataclasses.fields(value):
            _feed(h, f.name)
            _feed(h, getattr(value, f.name))
    elif isinstance(value, np.ndarray):
        _feed_array(h, value)
    elif isinstance(value, np.generic):
        _feed(h, value.item() if value.dtype.kind not in "mM" else str(value))
    elif hasattr(value, "columns") and hasattr(value, "dtypes"):  # a DataFrame
        h.update(f"frame{len(value)}:".encode())
        for col in value.columns:
            _feed(h, str(col))
            _feed_array(h, value[col].to_numpy())
    else:  # timestamps and other scalars print what they are
        h.update(f"{type(value).__name__}:{value!s};".encode())


def _feed_array(h: Any, a: Any) -> None:
    import numpy as np

    a = np.asarray(a)
    h.update(f"array{a.dtype.str}{a.shape}:".encode())
    if a.dtype.kind in "biufcmM":
        h.update(np.ascontiguousarray(a).tobytes())
    else:
        for v in a.ravel():
            _feed(h, v if isinstance(v, (str, bool, int, float)) or v is None else str(v))


def plot_key(file: str, data: dict[str, Any]) -> str:
    """The key of the PNG ``file`` drawing ``data`` (a sketch's data) in the current style."""
    h = hashlib.sha256()
    _feed(h, [style_version(), file])
    _feed(h, data)
    return h.hexdigest()


def png_text(data: bytes) -> dict[str, str]:
    """The text chunks (``tEXt``, ``zTXt``, ``iTXt``) of a PNG file; empty when it is not one."""
    out: dict[str, str] = {}
    if not data.startswith(_PNG_SIGNATURE):
        return out
    pos = len(_PNG_SIGNATURE)
    while pos + 8 <= len(data):
        (length,) = struct.unpack(">I", data[pos : pos + 4])
        kind = data[pos + 4 : pos + 8]
        body = data[pos + 8 : pos + 8 + length]
        pos += 12 + length
        if kind == b"IEND":
            break
        try:
            if kind == b"tEXt":
                key, _, text = body.partition(b"\x00")
                out[key.decode("latin-1")] = text.decode("latin-1")
            elif kind == b"zTXt":
                key, _, rest = body.partition(b"\x00")
                out[key.decode("latin-1")] = zlib.decompress(rest[1:]).decode("latin-1")
            elif kind == b"iTXt":
                key, _, rest = body.partition(b"\x00")
                compressed = rest[:1] == b"\x01"
                _, _, rest = rest[2:].partition(b"\x00")  # language tag
                _, _, text = rest.partition(b"\x00")  # translated keyword
                out[key.decode("latin-1")] = (zlib.decompress(text) if compressed
                                              else text).decode("utf-8")
        except (zlib.error, UnicodeDecodeError):
            continue
    return out


def stamp(key: str, notes: list[str]) -> dict[str, str]:
    """The PNG text chunks that make a drawn PNG reusable: its key and its notes (ASCII)."""
    return {KEY_FIELD: key, NOTES_FIELD: json.dumps(notes, ensure_ascii=True)}


def reusable(places: list[Path], file: str, key: str) -> tuple[bytes, list[str]] | None:
    """The bytes and notes of ``file`` in the first of ``places`` (plot folders) that holds a
    PNG of that name with key ``key``; None when none does."""
    for folder in places:
        try:
            data = (folder / file).read_bytes()
        except OSError:
            continue
        text = png_text(data)
        if text.get(KEY_FIELD) != key:
            continue
        try:
            notes = json.loads(text.get(NOTES_FIELD, "[]"))
        except json.JSONDecodeError:
            continue
        if isinstance(notes, list) and all(isinstance(n, str) for n in notes):
            return data, notes
    return None
