"""Small plugin forecasters for the engine tests: fast ones, and ones that misbehave on purpose.

Each misbehaving plugin misbehaves only on a training slice of one chosen length
(``when_length``), so a test can say exactly which tasks must fail and which must not.
:class:`Gate` lets a test decide by events instead of by timing: it announces that it has
started a fit and holds it until the test lets it go.
"""

from __future__ import annotations

import builtins
import ctypes
import os
import time
import uuid
from pathlib import Path

import numpy as np

from runner.forecasters.contract import Forecast


class LineFit:
    """Least-squares line through the training values, extended; intervals from its residuals.

    Fast and deterministic, with enough floating-point work that a changed input changes the
    output bits. Ignores covariates (``uses_covariates = False``).
    """

    version = "1"
    uses_covariates = False

    def __init__(self, weight: float = 1.0) -> None:
        self.weight = weight

    def fit(self, y, *, season, covariates=None):
        t = np.arange(len(y), dtype=float)
        slope, intercept = np.polyfit(t, y, 1) if len(y) > 1 else (0.0, float(y[0]))
        self.n_ = len(y)
        self.coef_ = (float(intercept), float(slope) * self.weight)
        resid = y - (intercept + slope * t)
        self.sigma_ = float(np.sqrt(np.mean(resid**2))) if len(y) > 1 else 0.0
        self.info_ = {"slope": self.coef_[1], "n": int(len(y))}
        return self

    def predict(self, horizon, *, covariates=None, levels=()):
        t = np.arange(self.n_, self.n_ + horizon, dtype=float)
        point = self.coef_[0] + self.coef_[1] * t
        lower, upper = {}, {}
        for level in levels:
            half = (1.0 + level / 100.0) * self.sigma_
            lower[level] = point - half
            upper[level] = point + half
        return Forecast(point, lower, upper)


class CovariateMean:
    """Last value plus the mean test-block covariate: a forecaster that uses covariates."""

    version = "1"
    uses_covariates = True

    def __init__(self) -> None:
        pass

    def fit(self, y, *, season, covariates=None):
        self.last_ = float(y[-1])
        return self

    def predict(self, horizon, *, covariates=None, levels=()):
        bump = 0.0 if covariates is None else float(np.mean(covariates))
        return np.full(horizon, self.last_ + bump)


class Sleepy:
    """Sleeps ``seconds`` when the training slice has ``when_length`` values (any if None)."""

    version = "1"
    uses_covariates = False

    def __init__(self, seconds: float = 60.0, when_length: int | None = None) -> None:
        self.seconds = seconds
        self.when_length = when_length

    def fit(self, y, *, season, covariates=None):
        if self.when_length is None or len(y) == self.when_length:
            time.sleep(self.seconds)
        self.last_ = float(y[-1])
        return self

    def predict(self, horizon, *, covariates=None, levels=()):
        return np.full(horizon, self.last_)


class Stubborn(Sleepy):
    """Like :class:`Sleepy`, but swallows every exception raised while it sleeps."""

    def fit(self, y, *, season, covariates=None):
        if self.when_length is None or len(y) == self.when_length:
            end = time.monotonic() + self.seconds
            while time.monotonic() < end:
                try:
                    time.sleep(0.05)
                except BaseException:  # noqa: B036 - the point of this plugin
                    pass
        self.last_ = float(y[-1])
        return self


class Exits:
    """Ends its process with ``os._exit(code)`` when the training slice has ``when_length``."""

    version = "1"
    uses_covariates = False

    def __init__(self, when_length: int = 0, code: int = 3) -> None:
        self.when_length = when_length
        self.code = code

    def fit(self, y, *, season, covariates=None):
        if len(y) == self.when_length:
            os._exit(self.code)
        self.last_ = float(y[-1])
        return self

    def predict(self, horizon, *, covariates=None, levels=()):
        return np.full(horizon, self.last_)


class Segfaults(Exits):
    """Reads address 0 (a segmentation fault) when the training slice has ``when_length``."""

    def fit(self, y, *, season, covariates=None):
        if len(y) == self.when_length:
            ctypes.string_at(0)
        self.last_ = float(y[-1])
        return self


class Raises(Exits):
    """Raises the builtin exception ``error`` when the training slice has ``when_length``."""

    def __init__(self, when_length: int = 0, error: str = "ValueError") -> None:
        super().__init__(when_length)
        self.error = error

    def fit(self, y, *, season, covariates=None):
        if len(y) == self.when_length:
            raise getattr(builtins, self.error)("refusing this slice")
        self.last_ = float(y[-1])
        return self


class SlowLine(LineFit):
    """:class:`LineFit` that takes ``delay`` seconds per fit (for runs killed mid-way)."""

    def __init__(self, weight: float = 1.0, delay: float = 0.05) -> None:
        super().__init__(weight)
        self.delay = delay

    def fit(self, y, *, season, covariates=None):
        time.sleep(self.delay)
        return super().fit(y, season=season, covariates=covariates)


class FailsUnlessLength(Exits):
    """Raises ValueError on every training slice except those of ``keep_length`` values.

    With expanding windows each fold has its own training length, so this fails every fold
    but one: a forecaster with failed tasks, for the ranking tests.
    """

    def __init__(self, keep_length: int = 0) -> None:
        super().__init__(when_length=keep_length)
        self.keep_length = keep_length

    def fit(self, y, *, season, covariates=None):
        if len(y) != self.keep_length:
            raise ValueError(f"only fits {self.keep_length} values, got {len(y)}")
        self.last_ = float(y[-1])
        return self


class Gate(LineFit):
    """:class:`LineFit` that, on training slices of the lengths in ``when_lengths``, writes a
    file ``blocked-<pid>-<length>-<id>`` into ``folder`` and then waits until ``folder/open``
    exists.

    A test that sees N ``blocked-*`` files knows N fits are held at that moment, whatever the
    machine's speed or load; creating ``open`` releases them. ``limit`` seconds is only a guard
    against a test that died without releasing its gate: the fit then fails.
    """

    def __init__(self, folder: str = ".", when_lengths: list[int] | None = None,
                 limit: float = 600.0) -> None:
        super().__init__()
        self.folder = folder
        self.when_lengths = when_lengths or []
        self.limit = limit

    def fit(self, y, *, season, covariates=None):
        if len(y) in self.when_lengths:
            folder = Path(self.folder)
            gate = folder / "open"
            if not gate.exists():
                marker = folder / f"blocked-{os.getpid()}-{len(y)}-{uuid.uuid4().hex}"
                marker.write_text("")
                end = time.monotonic() + self.limit
                while not gate.exists():
                    if time.monotonic() > end:
                        raise RuntimeError(f"the gate {gate} was never opened")
                    time.sleep(0.01)
        return super().fit(y, season=season, covariates=covariates)
