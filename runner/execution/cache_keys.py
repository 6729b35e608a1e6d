"""Cache keys: a SHA-256 over everything that can change a forecast, and nothing else.

The key covers the forecaster's identity (kind, canonical parameters, implementation version,
and a plugin's entry: :func:`runner.forecasters.registry.identity`), the training values it saw
(raw float64 bytes), the covariates it saw (training and test block, only for forecasters that
are given covariates), the horizon, the season, the gap and the interval levels. The position of
a slice in its series is not part of it, so appended observations leave the keys of earlier
folds unchanged and a revised value changes exactly the keys of the folds that saw it.
"""

from __future__ import annotations

import hashlib
import struct
from collections.abc import Sequence
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import numpy as np

    from runner.execution.tasks import ModelTask, SharedData

_KEY_PREFIX = b"castgrid-forecast-key\x00v1\x00"


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


def task_keys(tasks: Sequence[ModelTask], shared: SharedData) -> list[bytes]:
    """The cache key of every task (32 bytes each), in task order.

    Slices shared by many forecasters are hashed once.
    """
    import numpy as np

    from runner.execution.tasks import training_values
    from runner.forecasters.registry import accepts_covariates, identity

    idents: dict[int, tuple[bytes, bool]] = {}
    value_digests: dict[tuple[int, int, int], bytes] = {}
    cov_digests: dict[tuple[int, int, int, int], bytes] = {}
    h = shared.horizon
    levels = np.asarray(shared.levels, dtype=np.float64).tobytes()
    keys = []
    for task in tasks:
        if task.forecaster not in idents:
            spec = shared.forecasters[task.forecaster]
            idents[task.forecaster] = (
                identity(spec).encode(), accepts_covariates(spec)
            )
        ident, uses_cov = idents[task.forecaster]
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
