"""Axis ranges that one wild forecaster cannot flatten.

A benchmark that is far off (a skill of -211%, a MASE of 40 at the last step) would otherwise
set the axis, and the forecasters a reader came to compare would be squashed into one line.

The choice: clip, do not transform. The axis stays linear, so equal distances mean equal
differences (a log or symlog axis would need explaining and cannot show a skill below -100%
sensibly). Its range is the range of the plotted values that lie within Tukey's "far out"
fences, ``Q1 - 3 IQR`` and ``Q3 + 3 IQR`` of every value plotted (Tukey 1977, *Exploratory
Data Analysis*, ch. 2), padded by 5%, and always includes the values a plot must show (zero in
the skill plot, the actual values in the forecasts plot). Values beyond the range are drawn at
the edge or leave the plot, and the page names each forecaster concerned in a note under the
plot ("mean: skill -211.0% (off the scale)"). When the middle half of the values are equal
(IQR 0) or there are fewer than four values, nothing is clipped.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

#: Tukey's "far out" fence, in interquartile ranges beyond the quartiles.
FENCE = 3.0
#: Padding added on each side of the range, as a share of it.
PAD = 0.05
#: Fewer plotted values than this are never clipped: quartiles of three values say nothing.
MIN_VALUES = 4


@dataclass
class Scale:
    """An axis range and, per forecaster, its values that fall outside it."""

    low: float
    high: float
    off: dict[str, list[float]] = field(default_factory=dict)

    def contains(self, value: float) -> bool:
        """Whether ``value`` is drawn inside the axis."""
        return self.low <= value <= self.high


def _quantile(sorted_values: list[float], q: float) -> float:
    """Linear-interpolation quantile (numpy's default method) of sorted values."""
    pos = (len(sorted_values) - 1) * q
    lo = math.floor(pos)
    hi = min(lo + 1, len(sorted_values) - 1)
    return sorted_values[lo] + (sorted_values[hi] - sorted_values[lo]) * (pos - lo)


def robust_scale(values: Mapping[str, Sequence[float]], include: Sequence[float] = ()
                 ) -> Scale | None:
    """The axis range for ``values`` (name -> the values plotted for it); None if none is finite.

    ``include`` are values the range always covers (they take no part in the fences).
    """
    pooled = sorted(float(v) for vs in values.values() for v in vs if math.isfinite(float(v)))
    must = [float(v) for v in include if math.isfinite(float(v))]
    if not pooled and not must:
        return None
    low_fence, high_fence = -math.inf, math.inf
    if len(pooled) >= MIN_VALUES:
        q1, q3 = _quantile(pooled, 0.25), _quantile(pooled, 0.75)
        iqr = q3 - q1
        if iqr > 0:
            low_fence, high_fence = q1 - FENCE * iqr, q3 + FENCE * iqr
    kept = [v for v in pooled if low_fence <= v <= high_fence] + must
    low, high = min(kept), max(kept)
    span = high - low
    if span == 0:  # one value: give it some room
        span = abs(high) if high != 0 else 1.0
    low, high = low - PAD * span, high + PAD * span
    off: dict[str, list[float]] = {}
    for name, vs in values.items():
        beyond = [float(v) for v in vs if math.isfinite(float(v)) and not low <= v <= high]
        if beyond:
            off[name] = beyond
    return Scale(low, high, off)
