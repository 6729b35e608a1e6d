"""An example castgrid plugin: the "median slope" forecaster.

INVENTED for castgrid's documentation: a simple method of our own, not a published one, chosen
only to show a complete plugin. It has not been validated on real data; do not mistake it for a
recommended forecasting method.

The method: over the last ``window`` training values, the slope is the median one-step change
and the level is the median value moved from the window's middle to its end along that slope
(the median of a straight line sits at its midpoint). Step k forecasts
``level + slope * (damping + damping**2 + ... + damping**k)``. The central intervals are
``point +- z * s * sqrt(k)``, with ``s`` the root mean square distance of the window's values
from the fitted line: a rough spread, not a calibrated one.

Use it from a config (with this folder on PYTHONPATH)::

    models:
      - name: median-slope
        kind: plugin
        entry: median_slope:MedianSlope
        params: {window: 12, damping: 0.9}
"""

from __future__ import annotations

from statistics import NormalDist

import numpy as np

from runner import Forecast


class MedianSlope:
    """Median level and median one-step change of the last ``window`` values, extended.

    Parameters
    ----------
    window:
        How many of the latest training values the medians use (an integer >= 2).
    damping:
        Factor in (0, 1] applied to the slope at each further step (1 keeps a straight line).
    """

    version = "1"
    uses_covariates = False  # the method ignores covariates, so castgrid need not pass them

    def __init__(self, window: int = 8, damping: float = 1.0) -> None:
        # Only check and store: fitting happens in fit, so castgrid can rebuild and pickle it.
        if isinstance(window, bool) or not isinstance(window, int) or window < 2:
            raise ValueError(f"window: expected an integer >= 2, got {window!r}")
        if isinstance(damping, bool) or not isinstance(damping, (int, float)):
            raise ValueError(f"damping: expected a number in (0, 1], got {damping!r}")
        if not 0.0 < damping <= 1.0:
            raise ValueError(f"damping: expected a number in (0, 1], got {damping!r}")
        self.window = window
        self.damping = damping

    def fit(self, y: np.ndarray, *, season: int, covariates: np.ndarray | None = None):
        """Estimate level, slope and spread from the last ``window`` values of ``y``."""
        y = np.asarray(y, dtype=float)
        if y.ndim != 1 or y.shape[0] < 2:
            raise ValueError(
                f"MedianSlope: needs a 1-D series of at least 2 values, got shape {y.shape}"
            )
        recent = y[-min(self.window, y.shape[0]) :]
        w = recent.shape[0]
        slope = float(np.median(np.diff(recent)))
        level = float(np.median(recent)) + slope * (w - 1) / 2.0
        line = level - slope * np.arange(w - 1, -1, -1)
        self.level_ = level
        self.slope_ = slope
        self.spread_ = float(np.sqrt(np.mean((recent - line) ** 2)))
        return self

    def predict(
        self,
        horizon: int,
        *,
        covariates: np.ndarray | None = None,
        levels: tuple[float, ...] = (),
    ):
        """Point forecasts for ``horizon`` steps and, per level in percent, central intervals."""
        if not hasattr(self, "level_"):
            raise RuntimeError("MedianSlope: call fit before predict")
        steps = np.arange(1, horizon + 1)
        weights = np.cumsum(float(self.damping) ** steps)
        point = self.level_ + self.slope_ * weights
        if not levels:
            return point
        lower, upper = {}, {}
        for level in levels:
            half = NormalDist().inv_cdf(0.5 + level / 200.0) * self.spread_ * np.sqrt(steps)
            lower[level] = point - half
            upper[level] = point + half
        return Forecast(point, lower, upper)
