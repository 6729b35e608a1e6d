"""Cache keys: a SHA-256 over everything that can change a forecast, and nothing else.

The key covers the forecaster's identity (kind, canonical parameters, implementation version,
and a plugin's entry: :func:`runner.forecasters.registry.identity`), the training values it saw
(raw float64 bytes), the covariates it saw (training and test block, only for forecasters that
are given covariates), the horizon, the season, the gap and the interval levels. The position of
a slice in its series is not part of it, so appended observations leave the keys of earlier
folds unchanged and a revised value changes exactly the keys of the folds that saw it.

The key of a panel task (one fit per dataset and origin, :mod:`runner.execution.panel_tasks`)
covers everything its forecaster is given, built by the same function that builds its input:
every field of the history record (every series' values, positions, times, covariates, static
covariates and attributes up to the origin, the keys, the origin, season and frequency), the
series it forecasts and their forecast-period covariates, plus its identity, the horizon, the
steps forecast (gap included) and the interval levels.
"""

from __future__ import annotations

import dataclasses
import hashlib
import struct
from collections.abc import Sequence
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import numpy as np

    from runner.execution.panel_tasks import PanelTask
    from runner.execution.tasks import SharedData, Task

_KEY_PREFIX = b"castgrid-forecast-key\x00v1\x00"
_PANEL_KEY_PREFIX = b"castgrid-panel-forecast-key\x00v1\x00"


def _digest(*parts: bytes | memoryview) -> bytes:
    h = hashlib.sha256()
    for part in parts:
        h.update(struct.pack("<Q", len(part)))
        h.update(part)
    return h.digest()


def _array_bytes(a: np.ndarray) -> bytes:
    import numpy as np

    a = np.ascontiguousarray(a, dtype=np.float64)
    return struct.pack("<Q", a.ndim) + struct.pack(f"<{a.ndim}Q", *a.shape) + a.tobytes()


def task_keys(tasks: Sequence[Task], shared: SharedData) -> list[bytes]:
    """The cache key of every task (32 bytes each), in task order.

    Slices shared by many forecasters are hashed once.
    """
    import numpy as np

    from runner.execution.panel_tasks import PanelTask
    from runner.execution.tasks import training_values
    from runner.forecasters.registry import accepts_covariates, identity

    idents: dict[int, tuple[bytes, bool]] = {}
    value_digests: dict[tuple[int, int, int], bytes] = {}
    cov_digests: dict[tuple[int, int, int, int], bytes] = {}
    h = shared.horizon
    levels = np.asarray(shared.levels, dtype=np.float64).tobytes()
    panel_digests: dict[tuple[int, int, bool], bytes] = {}
    keys = []
    for task in tasks:
        if task.forecaster not in idents:
            spec = shared.forecasters[task.forecaster]
            idents[task.forecaster] = (
                identity(spec).encode(), accepts_covariates(spec)
            )
        ident, uses_cov = idents[task.forecaster]
        if isinstance(task, PanelTask):
            keys.append(_panel_key(task, shared, ident, uses_cov, panel_digests))
            continue
        vk = (task.dataset, task.start, task.end)
        if vk not in value_digests:
            # what the forecaster sees: the slice with its gaps filled from the slice alone
            y = np.ascontiguousarray(training_values(task, shared), dtype=np.float64)
            value_digests[vk] = _digest(memoryview(y).cast("B"))
        cov_digest = b"not-given"
        cov = shared.covariates[task.dataset]
        if uses_cov and cov is not None:
            ck = (task.dataset, task.start, task.end, task.test_start)
            if ck not in cov_digests:
                cov_digests[ck] = _digest(
                    _array_bytes(cov[task.start : task.end]),
                    _array_bytes(cov[task.end : task.test_start + h]),
                )
            cov_digest = cov_digests[ck]
        numbers = struct.pack("<qqq", h, task.season, task.test_start - task.end)
        keys.append(_digest(_KEY_PREFIX, ident, value_digests[vk], cov_digest, numbers, levels))
    return keys


# ----------------------------------------------------------------------------- the store


def _panel_key(
    task: PanelTask, shared: SharedData, ident: bytes, uses_cov: bool,
    digests: dict[tuple[int, int, bool], bytes],
) -> bytes:
    """The key of a panel task: a digest of exactly what :func:`panel_inputs` gives its fit and
    predict, so no input can change without changing the key."""
    import numpy as np

    from runner.execution.panel_tasks import panel_inputs

    layout = shared.panels[task.dataset]
    steps = layout.gap + shared.horizon
    where = (task.dataset, task.fold, uses_cov)
    if where not in digests:
        cov = shared.covariates[task.dataset] if uses_cov else None
        history, series, future = panel_inputs(
            layout, shared.values[task.dataset], cov, task.fold, steps
        )
        parts: list[bytes] = []
        for f in dataclasses.fields(history):
            parts += [f.name.encode(), _any_bytes(getattr(history, f.name))]
        parts += [b"series", _any_bytes(series), b"future", _any_bytes(future)]
        digests[where] = _digest(*parts)
    numbers = struct.pack("<qq", shared.horizon, steps)
    levels = np.asarray(shared.levels, dtype=np.float64).tobytes()
    return _digest(_PANEL_KEY_PREFIX, ident, digests[where], numbers, levels)


def _any_bytes(v: object) -> bytes:
    """Unambiguous bytes of a field of the panel input: arrays with their dtype and shape,
    texts and tuples and mappings element by element."""
    import numpy as np

    if v is None:
        return b"N"
    if isinstance(v, str):
        return b"S" + v.encode()
    if isinstance(v, (bool, int, float)):
        return b"V" + repr(v).encode()
    if isinstance(v, (tuple, list)):
        return b"T" + _digest(*(_any_bytes(x) for x in v))
    if isinstance(v, dict) or hasattr(v, "items"):
        items = sorted(v.items())  # type: ignore[union-attr]
        return b"M" + _digest(*(_any_bytes(x) for kv in items for x in kv))
    a = np.ascontiguousarray(np.asarray(v))
    head = f"{a.dtype.str}|{a.shape}".encode()
    return b"A" + _digest(head, a.tobytes())
