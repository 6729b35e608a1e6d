"""Benchmarks for intermittent demand, vectorised over many (series, fold) tasks at once.

Three published methods, each a flat forecast of the mean demand per period:

* ``croston``: Croston, J. D. (1972), "Forecasting and stock control for intermittent demands",
  *Operational Research Quarterly* 23(3), 289-303. Simple exponential smoothing of the non-zero
  demand sizes (constant ``alpha``) and, separately, of the intervals between demands (constant
  ``beta``), both updated only in periods with demand; forecast = size / interval.
* ``sba``: the Syntetos-Boylan approximation, Syntetos, A. A. & Boylan, J. E. (2005), "The
  accuracy of intermittent demand estimates", *International Journal of Forecasting* 21(2),
  303-314. Croston's estimate is biased upwards; multiplying it by ``1 - beta/2``, with
  ``beta`` the interval smoothing constant, removes most of that bias.
* ``tsb``: Teunter, R. H., Syntetos, A. A. & Babai, M. Z. (2011), "Intermittent demand: linking
  forecasting to inventory obsolescence", *European Journal of Operational Research* 214(3),
  606-615. The probability of demand is smoothed in every period (constant ``beta``, towards 1
  in a period with demand and towards 0 in one without) and the size only in periods with
  demand (constant ``alpha``); forecast = probability * size. Unlike Croston's, the forecast
  decays while no demand occurs, which is the paper's point (obsolescence).

The update equations, for a training slice y_1..y_T; "demand" means y_t != 0 (the methods are
meant for non-negative counts; a negative value is smoothed as a size like any other)::

    Croston / SBA, in a period t with demand, q_t periods after the previous demand:
        z <- z + alpha (y_t - z)          (size)
        p <- p + beta  (q_t - p)          (interval)
    and nothing changes in a period without demand.
    Croston: y_hat = z / p               SBA: y_hat = (1 - beta/2) z / p

    TSB, in every period t after the first demand:
        d <- d + beta (1[y_t != 0] - d)  (probability of demand)
        z <- z + alpha (y_t - z)          (size; only when y_t != 0)
    y_hat = d z

Initialisation (castgrid's stated choice; Croston's paper does not fix one): the state starts
at the first period with demand, t_1 (1-based within the slice), with size z = y_{t_1} and
interval p = t_1, the number of periods from the start of the slice up to and including that
first demand: the first interval, counted from the slice's start because the demand before it
is not observed. Textbook decompositions of a series into sizes and intervals count the first
interval the same way (Hyndman & Athanasopoulos, *Forecasting: Principles and Practice*,
2nd ed., section 12.2, from memory). TSB starts with the same size and the probability
d = 1 / t_1, the inverse of that first interval, so that at t_1 all three methods agree up to
SBA's factor; the smoothing then runs from t_1 + 1 on.

Defaults ``alpha = beta = 0.1``: a low constant, because each estimate is fed by few demands.
Croston (1972) recommends low smoothing constants for intermittent items, and Syntetos & Boylan
(2005) evaluate 0.05 to 0.20 on real demand data (both from memory of the papers, not
re-checked); 0.1 sits inside that range. Both constants must lie in (0, 1].

Edge cases: a training slice with no demand at all forecasts 0 (no size has been observed;
common practice). One observation is enough (it either starts the state or is a slice without
demand), so the methods need at least 1 training value, like the naive method; an empty series
is refused with ``ValueError`` by ``fit``.

Intervals: none. The three papers give estimators of the mean demand per period, not a
predictive distribution of future demand; Croston's variance expression is the variance of
the estimate (and was corrected by Rao, 1973), not of the demand to come, so castgrid offers no
published interval formula for these methods and leaves the bounds empty, as for
``moving_average``.

Computation: the recursion runs over time steps, once per column of the right-aligned padded
matrix of :func:`runner.forecasters.slices.padded`, updating all (series, fold) slices of a
chunk at once; there is no Python loop per series.
"""

from __future__ import annotations

import numpy as np

from runner.forecasters.benchmarks import _Baseline
from runner.forecasters.slices import chunks, padded


def _smoothing_constant(name: str, value: object) -> None:
    """Refuse a smoothing constant outside (0, 1] with a message naming the parameter."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value <= 1:
        raise ValueError(f"{name}: expected a smoothing constant in (0, 1], got {value!r}")


def _columns(
    values: np.ndarray, starts: np.ndarray, ends: np.ndarray, part: slice
) -> tuple[np.ndarray, np.ndarray]:
    """The padded training values of the tasks in ``part``, one time step per row.

    Returns the transposed padded matrix (contiguous, so each time step is one fast row) and,
    per task, the first step inside its slice. Membership comes from the slice lengths rather
    than from the NaN padding, so a value of the series itself is never mistaken for padding.
    """
    mat = padded(values, starts[part], ends[part])
    first_step = mat.shape[1] - (ends[part] - starts[part])
    return np.ascontiguousarray(mat.T), first_step


def croston_state(
    values: np.ndarray, starts: np.ndarray, ends: np.ndarray, alpha: float, beta: float
) -> tuple[np.ndarray, np.ndarray]:
    """Croston's smoothed size ``z`` and interval ``p`` at the end of every training slice.

    Slices without demand get ``z = 0`` and ``p = 1`` (a zero forecast).
    """
    n = len(starts)
    z_out, p_out = np.zeros(n), np.ones(n)
    for part in chunks(starts, ends):
        steps, first_step = _columns(values, starts, ends, part)
        rows = steps.shape[1]
        z, p = np.zeros(rows), np.ones(rows)
        q = np.zeros(rows)  # periods since the previous demand (or the slice start), this one too
        seen = np.zeros(rows, dtype=bool)  # a demand has started the state
        # Branch-free updates (np.where) rather than masked assignments: several times faster
        # on wide chunks, and the same elementwise arithmetic, so results are identical.
        for j, y in enumerate(steps):
            inside = first_step <= j
            q += inside
            demand = inside & (y != 0)
            first = demand & ~seen
            later = demand & seen
            z = np.where(first, y, np.where(later, z + alpha * (y - z), z))
            p = np.where(first, q, np.where(later, p + beta * (q - p), p))
            q[demand] = 0.0
            seen |= demand
        z_out[part], p_out[part] = z, p
    return z_out, p_out


def tsb_state(
    values: np.ndarray, starts: np.ndarray, ends: np.ndarray, alpha: float, beta: float
) -> tuple[np.ndarray, np.ndarray]:
    """TSB's smoothed probability of demand ``d`` and size ``z`` at the end of every slice.

    Slices without demand get ``d = 0`` and ``z = 0`` (a zero forecast).
    """
    n = len(starts)
    d_out, z_out = np.zeros(n), np.zeros(n)
    for part in chunks(starts, ends):
        steps, first_step = _columns(values, starts, ends, part)
        rows = steps.shape[1]
        d, z = np.zeros(rows), np.zeros(rows)
        q = np.zeros(rows)  # periods up to and including the first demand
        seen = np.zeros(rows, dtype=bool)
        for j, y in enumerate(steps):
            inside = first_step <= j
            demand = inside & (y != 0)
            q += inside & ~seen
            first = demand & ~seen
            # every period after the first demand updates the probability; sizes only on demand
            later = inside & seen
            hit = later & demand
            d = np.where(first, 1.0 / np.maximum(q, 1.0),
                         np.where(later, d + beta * (demand - d), d))
            z = np.where(first, y, np.where(hit, z + alpha * (y - z), z))
            seen |= demand
        d_out[part], z_out[part] = d, z
    return d_out, z_out


class Croston(_Baseline):
    """Croston's method (Croston 1972): smoothed non-zero size over smoothed interval.

    ``alpha`` smooths the sizes, ``beta`` the intervals; both are updated only in periods with
    demand and the forecast is flat over the horizon. See the module docstring for the
    equations, the initialisation and the zero forecast of a slice without demand.
    No intervals (no published formula).

    >>> import numpy as np
    >>> Croston(alpha=0.5, beta=0.5).fit(np.array([0, 0, 4.0, 0, 2.0]), season=1).predict(2).point
    array([1.2, 1.2])
    """

    def __init__(self, alpha: float = 0.1, beta: float = 0.1) -> None:
        _smoothing_constant("alpha", alpha)
        _smoothing_constant("beta", beta)
        self.alpha = alpha
        self.beta = beta

    def _factor(self) -> float:
        return 1.0

    def _point_and_sigma(self, values, starts, ends, horizon, season, s):
        z, p = croston_state(values, starts, ends, float(self.alpha), float(self.beta))
        level = self._factor() * (z / p)
        return np.repeat(level[:, None], horizon, axis=1), None


class SBA(Croston):
    """The Syntetos-Boylan approximation (Syntetos & Boylan 2005): Croston * (1 - beta/2).

    ``beta`` is the interval smoothing constant, the one the bias correction is derived for;
    ``alpha`` smooths the sizes as in :class:`Croston`. No intervals (no published formula).

    >>> import numpy as np
    >>> SBA(alpha=0.5, beta=0.5).fit(np.array([0, 0, 4.0, 0, 2.0]), season=1).predict(1).point
    array([0.9])
    """

    def _factor(self) -> float:
        return 1.0 - float(self.beta) / 2.0


class TSB(_Baseline):
    """The Teunter-Syntetos-Babai method (Teunter, Syntetos & Babai 2011).

    ``beta`` smooths the probability of demand in every period, ``alpha`` the size in periods
    with demand; forecast = probability * size, flat over the horizon. See the module docstring
    for the equations, the initialisation and the zero forecast of a slice without demand.
    No intervals (no published formula).

    >>> import numpy as np
    >>> TSB(alpha=0.5, beta=0.5).fit(np.array([0, 0, 4.0, 0, 2.0]), season=1).predict(1).point
    array([1.75])
    """

    def __init__(self, alpha: float = 0.1, beta: float = 0.1) -> None:
        _smoothing_constant("alpha", alpha)
        _smoothing_constant("beta", beta)
        self.alpha = alpha
        self.beta = beta

    def _point_and_sigma(self, values, starts, ends, horizon, season, s):
        d, z = tsb_state(values, starts, ends, float(self.alpha), float(self.beta))
        return np.repeat((d * z)[:, None], horizon, axis=1), None


__all__ = ["SBA", "TSB", "Croston", "croston_state", "tsb_state"]
