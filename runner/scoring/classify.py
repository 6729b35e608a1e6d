"""Segments castgrid derives from each series' own history: demand pattern and volume tier.

Which data
----------
Each series is classified on its **history at its first origin**: every observation from its
first one up to and including its first origin (the last training observation of its first
fold; for most series the dataset's first origin). That is the training part every one of its
folds has seen (all of it with expanding windows), and it is data no later observation
changes. Origins on the dataset's time axis stay put when data is appended, so appending data
never moves a series between segments; only a revised past value, or a config that moves the
first origin (``folds: N`` keeps the latest N origins, ``train`` as a share of the span,
``align: end``), changes its segment. Classifying on all data would move series between
segments at every new month, and would let the test periods decide a series' segment.
Missing values kept as gaps (``missing: interpolate``) are left out: a period counts when it
has a value.

Demand pattern (:func:`demand_pattern`)
---------------------------------------
Syntetos, Boylan & Croston (2005), "On the categorization of demand patterns", *Journal of the
Operational Research Society* 56(5), 495-503: two numbers per series,

* ADI, the average inter-demand interval: the number of periods divided by the number of
  periods with demand (a value that is not 0, as for the intermittent-demand benchmarks);
* CV², the squared coefficient of variation of the demand sizes (the non-zero values):
  their variance (divided by their count, not count - 1) over their squared mean;

against the paper's cut-offs ADI 1.32 and CV² 0.49:

=================  ============  ============
                   CV² < 0.49    CV² >= 0.49
=================  ============  ============
ADI < 1.32         smooth        erratic
ADI >= 1.32        intermittent  lumpy
=================  ============  ============

A value exactly at a cut-off goes to the upper class (ADI 1.32 is intermittent or lumpy). A
series with fewer than 2 demands in its history has no CV² worth the name (one size has no
spread) and is classed ``too_few_demands`` rather than forced into one of the four.

Volume tier (:func:`volume_tier`)
---------------------------------
The usual A/B/C split (common practice): series ordered by volume, largest first, A while the
volume of the series ranked above it is below 80% of the total, then B while that is below
95%, then C. So the series whose volume crosses 80% is still A (A always holds the largest
series and at least 80% of the volume), the one crossing 95% is still B, and a series that
starts exactly at 80% is B. Volume is the series' mean value per period over its history
(zero when negative); when every series has the same history, as in a panel with shared
origins, that is exactly its share of the total volume, and the mean keeps a series with a
shorter history from looking small. Equal volumes are ordered by series name.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from runner.windows.plan import DatasetPlan

#: Demand patterns in the order outputs list them.
DEMAND_PATTERNS = ("smooth", "erratic", "intermittent", "lumpy", "too_few_demands")
#: Syntetos, Boylan & Croston (2005): cut-offs of the average inter-demand interval and of
#: the squared coefficient of variation of demand sizes.
ADI_CUTOFF = 1.32
CV2_CUTOFF = 0.49
#: Volume tiers, and the cumulative volume shares that close A and B (common practice).
VOLUME_TIERS = ("A", "B", "C")
TIER_SHARES = (0.80, 0.95)


@dataclass
class DerivedSegments:
    """The derived segments of a dataset's evaluated series, with the numbers behind them.

    Arrays run over the panel's series (key order); a series with no fold has an empty label
    and NaN numbers. ``history_end`` is the flat index (exclusive) where each series' history
    ends: one past its first origin.
    """

    demand_pattern: np.ndarray
    volume_tier: np.ndarray
    adi: np.ndarray
    cv2: np.ndarray
    demands: np.ndarray
    volume_share: np.ndarray
    history_end: np.ndarray


def demand_stats(
    values: np.ndarray, starts: np.ndarray, ends: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """ADI, CV², periods and demands of each slice ``values[starts[i]:ends[i]]``.

    Periods count the values that are not NaN; a demand is a value that is not 0. ADI is
    periods / demands (inf without demand); CV² is the variance of the demand sizes (divided by
    their count) over their squared mean (NaN with fewer than 1 demand).

    >>> adi, cv2, n, k = demand_stats(np.array([0, 17, 0, 3.0]), np.array([0]), np.array([4]))
    >>> float(adi[0]), float(cv2[0])
    (2.0, 0.49)
    """
    seg, flat = _slices(starts, ends)
    v = values[flat]
    m = len(starts)
    valid = ~np.isnan(v)
    demand = valid & (v != 0)
    periods = np.bincount(seg, weights=valid, minlength=m)
    demands = np.bincount(seg, weights=demand, minlength=m)
    sizes = np.where(demand, v, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = np.bincount(seg, weights=sizes, minlength=m) / demands
        dev = np.where(demand, v - mean[seg], 0.0)  # two passes: no cancellation near a cut-off
        var = np.bincount(seg, weights=dev * dev, minlength=m) / demands
        cv2 = var / (mean * mean)
        adi = periods / demands
    return adi, cv2, periods.astype(np.int64), demands.astype(np.int64)


def demand_pattern(adi: np.ndarray, cv2: np.ndarray, demands: np.ndarray) -> np.ndarray:
    """Syntetos-Boylan-Croston class of each series (see the module docstring).

    >>> demand_pattern(np.array([1.0, 1.32, 1.31]), np.array([0.49, 0.1, 0.48]),
    ...                np.array([10, 10, 1])).tolist()
    ['erratic', 'intermittent', 'too_few_demands']
    """
    adi, cv2 = np.asarray(adi, dtype=float), np.asarray(cv2, dtype=float)
    frequent = ~(adi >= ADI_CUTOFF)
    steady = ~(cv2 >= CV2_CUTOFF)
    out = np.where(frequent, np.where(steady, "smooth", "erratic"),
                   np.where(steady, "intermittent", "lumpy")).astype(object)
    out[np.asarray(demands) < 2] = "too_few_demands"
    return out


def volume_tier(volume: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A/B/C tier and volume share of each series (see the module docstring).

    ``volume`` is one value per series, in series-name order (which breaks ties); negative
    volume counts as 0. Returns (tiers, shares).

    >>> volume_tier(np.array([5.0, 50, 15, 30]))[0].tolist()
    ['C', 'A', 'B', 'A']
    """
    vol = np.clip(np.asarray(volume, dtype=float), 0.0, None)
    total = float(vol.sum())
    order = np.lexsort((np.arange(len(vol)), -vol))  # largest first, ties by name
    ranked = vol[order]
    before = np.cumsum(ranked) - ranked
    with np.errstate(divide="ignore", invalid="ignore"):
        share_before = before / total if total > 0 else np.ones_like(before)
        shares = vol / total if total > 0 else np.zeros_like(vol)
    tier_ranked = np.where(share_before < TIER_SHARES[0], "A",
                           np.where(share_before < TIER_SHARES[1], "B", "C"))
    tiers = np.empty(len(vol), dtype=object)
    tiers[order] = tier_ranked
    return tiers, shares


def history_bounds(dp: DatasetPlan) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(series, start, end): each evaluated series and the flat slice of its history up to and
    including its first origin."""
    series, first_task = np.unique(dp.series, return_index=True)
    return series, dp.panel.offsets[series], dp.ends[first_task]


def derive_segments(dp: DatasetPlan) -> DerivedSegments:
    """Demand pattern and volume tier of every evaluated series of ``dp``."""
    n = dp.panel.n_series
    series, starts, ends = history_bounds(dp)
    adi, cv2, periods, demands = demand_stats(dp.panel.values, starts, ends)
    seg, flat = _slices(starts, ends)
    v = dp.panel.values[flat]
    ok = ~np.isnan(v)
    with np.errstate(invalid="ignore", divide="ignore"):
        volume = np.bincount(seg, weights=np.where(ok, v, 0.0), minlength=len(series)) / periods
    tiers, shares = volume_tier(np.nan_to_num(volume))

    def spread(values: np.ndarray, fill: object, dtype: object) -> np.ndarray:
        out = np.full(n, fill, dtype=dtype)
        out[series] = values
        return out

    return DerivedSegments(
        demand_pattern=spread(demand_pattern(adi, cv2, demands), "", object),
        volume_tier=spread(tiers, "", object),
        adi=spread(adi, np.nan, float),
        cv2=spread(cv2, np.nan, float),
        demands=spread(demands, 0, np.int64),
        volume_share=spread(shares, np.nan, float),
        history_end=spread(ends, 0, np.int64),
    )


def _slices(starts: np.ndarray, ends: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Slice number and flat index of every element of the slices [starts[i], ends[i])."""
    starts = np.asarray(starts, dtype=np.int64)
    lengths = np.asarray(ends, dtype=np.int64) - starts
    seg = np.repeat(np.arange(len(starts)), lengths)
    first = np.cumsum(lengths) - lengths
    flat = starts[seg] + np.arange(int(lengths.sum())) - first[seg]
    return seg, flat
