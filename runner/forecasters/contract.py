"""The value a forecaster returns: point forecasts and optional central prediction intervals."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True)
class Forecast:
    """Point forecasts for ``horizon`` steps and, per interval level, lower and upper bounds.

    ``levels`` are central interval levels in percent (80 means the 10% and 90% quantiles).

    >>> f = Forecast(np.array([1.0, 2.0]), lower={80.0: np.array([0.5, 1.0])},
    ...              upper={80.0: np.array([1.5, 3.0])})
    >>> f.horizon
    2
    """

    point: np.ndarray
    lower: Mapping[float, np.ndarray] = field(default_factory=dict)
    upper: Mapping[float, np.ndarray] = field(default_factory=dict)

    @property
    def horizon(self) -> int:
        """Number of forecast steps."""
        return int(np.shape(self.point)[0])


def as_forecast(value: object, horizon: int, levels: tuple[float, ...]) -> Forecast:
    """Normalise what ``predict`` returned into a checked :class:`Forecast`.

    Raises ``ValueError`` with a readable reason when the shape is wrong, a value is NaN or
    infinite, or a requested interval level is missing.
    """
    if isinstance(value, Forecast):
        point = np.asarray(value.point, dtype=float)
        lower = {float(k): np.asarray(v, dtype=float) for k, v in value.lower.items()}
        upper = {float(k): np.asarray(v, dtype=float) for k, v in value.upper.items()}
    else:
        point = np.asarray(value, dtype=float)
        lower, upper = {}, {}
    if point.shape != (horizon,):
        raise ValueError(f"predict returned shape {point.shape}, expected ({horizon},)")
    if not np.all(np.isfinite(point)):
        raise ValueError("predict returned NaN or infinite point forecasts")
    for level in levels:
        if level not in lower or level not in upper:
            continue  # a forecaster without intervals leaves the bounds empty (NaN)
        for name, bound in (("lower", lower[level]), ("upper", upper[level])):
            if bound.shape != (horizon,):
                raise ValueError(
                    f"predict returned {name} bound at {level:g}% of shape {bound.shape}, "
                    f"expected ({horizon},)"
                )
    return Forecast(point, lower, upper)
