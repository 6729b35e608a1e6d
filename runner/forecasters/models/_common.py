"""Shared helpers of the statsmodels-backed forecasters: parameter checks, input checks, quiet fits.

Parameter checks accept what YAML gives (lists for orders, ``null``, booleans) and raise
``ValueError`` messages that start with the parameter name, so that the config check can point
at ``models[i].params.<name>``.
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from typing import Any

import numpy as np

from runner.errors import brief
from runner.forecasters.contract import Forecast


class ConvergenceError(RuntimeError):
    """The likelihood optimiser did not converge; the task is recorded as failed."""


def shown(value: Any) -> str:
    """A value as the user wrote it in YAML/JSON, for error messages (at most ~80 characters:
    a huge value, such as nested YAML aliases, must not flood or stall the message)."""
    return brief(value)


def int_tuple(value: Any, name: str, length: int | tuple[int, ...]) -> tuple[int, ...]:
    """``value`` as a tuple of non-negative integers of an allowed length, or ValueError."""
    lengths = (length,) if isinstance(length, int) else length
    want = " or ".join(str(n) for n in lengths)
    ok = isinstance(value, (list, tuple)) and len(value) in lengths
    if ok:
        ok = all(
            isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= 0 for v in value
        )
    if not ok:
        raise ValueError(f"{name}: expected {want} non-negative integers, got {shown(value)}")
    return tuple(int(v) for v in value)


def choice(value: Any, name: str, options: Sequence[Any]) -> Any:
    """``value`` if it is one of ``options`` (``None`` is written ``null``), else ValueError."""
    for opt in options:
        if value is opt or (value == opt and type(value) is type(opt)):
            return value
    names = ", ".join("null" if o is None else str(o) for o in options)
    raise ValueError(f"{name}: expected one of {names}, got {shown(value)}")


def boolean(value: Any, name: str) -> bool:
    """``value`` if it is true or false, else ValueError."""
    if not isinstance(value, (bool, np.bool_)):
        raise ValueError(f"{name}: expected true or false, got {shown(value)}")
    return bool(value)


def number(value: Any, name: str, *, low: float | None = None) -> float:
    """``value`` as a finite float (optionally >= ``low``), else ValueError."""
    ok = isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)
    if ok:
        ok = bool(np.isfinite(value)) and (low is None or value >= low)
    if not ok:
        bound = f" >= {low:g}" if low is not None else ""
        raise ValueError(f"{name}: expected a number{bound}, got {shown(value)}")
    return float(value)


def positive_int(value: Any, name: str, *, low: int = 0) -> int:
    """``value`` as an integer >= ``low``, else ValueError."""
    if not isinstance(value, (int, np.integer)) or isinstance(value, bool) or value < low:
        raise ValueError(f"{name}: expected an integer >= {low}, got {shown(value)}")
    return int(value)


def series(y: Any, owner: str) -> np.ndarray:
    """The training series as a 1-D float array of finite values (not copied when it is one)."""
    arr = np.asarray(y, dtype=float)
    if arr.ndim != 1:
        raise ValueError(f"{owner}: expected a 1-D training series, got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{owner}: the training series has NaN or infinite values")
    return arr


def season_length(season: Any, owner: str) -> int:
    """The ``season`` given to fit, checked."""
    if not isinstance(season, (int, np.integer)) or isinstance(season, bool) or season < 1:
        raise ValueError(f"{owner}: season: expected an integer >= 1, got {shown(season)}")
    return int(season)


def need_length(n: int, minimum: int, owner: str, what: str) -> None:
    """Raise a clear ValueError when a series of ``n`` observations is shorter than needed."""
    if n < minimum:
        raise ValueError(
            f"{owner}: the training series has {n} observation(s); {what} needs at least {minimum}"
        )


def covariate_matrix(cov: Any, n: int, owner: str, where: str) -> np.ndarray | None:
    """Covariates as a finite 2-D float array with ``n`` rows, or None."""
    if cov is None:
        return None
    arr = np.asarray(cov, dtype=float)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2 or arr.shape[0] != n:
        raise ValueError(
            f"{owner}: {where} covariates: expected {n} rows, got shape {np.shape(cov)}"
        )
    if not np.all(np.isfinite(arr)):
        raise ValueError(f"{owner}: {where} covariates have NaN or infinite values")
    return arr


def horizon_steps(horizon: Any, owner: str) -> int:
    """The forecast horizon, checked."""
    if not isinstance(horizon, (int, np.integer)) or isinstance(horizon, bool) or horizon < 1:
        raise ValueError(f"{owner}: horizon: expected an integer >= 1, got {shown(horizon)}")
    return int(horizon)


def check_levels(levels: Sequence[float], owner: str) -> tuple[float, ...]:
    """Interval levels in percent, each strictly between 0 and 100."""
    out = tuple(float(v) for v in levels)
    for v in out:
        if not 0.0 < v < 100.0:
            raise ValueError(f"{owner}: levels: expected percentages between 0 and 100, got {v:g}")
    return out


def require_fitted(obj: Any, attr: str) -> Any:
    """The fitted attribute ``attr`` of ``obj``, or a RuntimeError asking for fit first."""
    value = getattr(obj, attr, None)
    if value is None:
        raise RuntimeError(f"{type(obj).__name__}: call fit before predict")
    return value


@contextmanager
def quiet() -> Iterator[None]:
    """Silence statsmodels' warnings for one fit (start values, frequency, convergence).

    Convergence is judged from the optimiser's own report (see :func:`check_converged`), not
    from warnings, so nothing is lost by silencing them.
    """
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        yield


def check_converged(res: Any, owner: str) -> None:
    """Raise ConvergenceError when a statsmodels MLE fit reports that it did not converge."""
    retvals = getattr(res, "mle_retvals", None)
    if isinstance(retvals, dict) and retvals.get("converged") is False:
        raise ConvergenceError(
            f"{owner}: maximum-likelihood optimisation did not converge "
            f"({retvals.get('iterations', '?')} iterations)"
        )
    llf = getattr(res, "llf", None)
    if llf is not None and not np.isfinite(llf):
        raise ConvergenceError(f"{owner}: the fit ended with a non-finite log-likelihood")


def with_bounds(point: np.ndarray, bounds: dict[float, np.ndarray]) -> np.ndarray | Forecast:
    """A plain point array, or a Forecast when interval bounds (level -> (h, 2) array) exist."""
    if not bounds:
        return point
    return Forecast(
        point,
        lower={lv: np.asarray(b[:, 0], dtype=float) for lv, b in bounds.items()},
        upper={lv: np.asarray(b[:, 1], dtype=float) for lv, b in bounds.items()},
    )
