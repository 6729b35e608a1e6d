"""Is a forecaster's win over the reference baseline real, or luck? Three answers per dataset.

* ``win_share``: the share of (series, fold) tasks where the forecaster's score is strictly
  lower than the reference's (a tie is not a win).
* ``dm_better`` / ``dm_worse``: per series, the Diebold-Mariano test of equal predictive
  accuracy (Diebold & Mariano 1995, "Comparing predictive accuracy", Journal of Business &
  Economic Statistics 13(3), 253-263) with the small-sample correction of Harvey, Leybourne &
  Newbold (1997, "Testing the equality of prediction mean squared errors", International
  Journal of Forecasting 13(2), 281-291); the counts of series where it rejects at 5%
  (two-sided) with the forecaster better, and worse.
* ``wilcoxon_p``: the Wilcoxon signed-rank test (Wilcoxon 1945, "Individual comparisons by
  ranking methods", Biometrics Bulletin 1(6)) of the per-series mean loss differences, as
  ``scipy.stats.wilcoxon`` computes it with its defaults (:func:`wilcoxon_pvalue`): do the
  series, taken together, favour one side?

The distributions come from ``scipy.special`` (``stdtr``, ``ndtr``), which loads in a tenth of
the time ``scipy.stats`` takes; ``scipy.stats`` is imported only for the one case the Wilcoxon
test needs it for (ties or zeros among at most 13 series).

How a series' folds become the sequence the Diebold-Mariano test needs
-----------------------------------------------------------------------
The test is stated for a sequence ``d_1..d_T`` of loss differences of forecasts made from
successive origins, which is at most (h-1)-dependent for h-step forecasts. A castgrid fold is a
block of ``horizon`` steps from one origin, so castgrid takes, per series, one value per fold:
``d_f`` = the mean over the block's steps of the pointwise loss of the forecaster minus that of
the reference, in chronological fold order. Two folds' blocks share no test observation when the
origins are at least ``horizon`` apart (the default ``step`` equals ``horizon``), and the
sequence is then treated as 0-dependent: ``h = 1``. When ``step < horizon`` the blocks of
``ceil(horizon / step)`` successive folds overlap, so the sequence is taken as
``(ceil(horizon / step) - 1)``-dependent: ``h = ceil(horizon / step)``. This keeps the published
test as is; only what counts as "one forecast" (the whole block, scored by its mean loss) is a
castgrid choice. Folds missing for either forecaster (a failed task) are left out of the
sequence.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

#: Two-sided level of every test here.
ALPHA = 0.05


@dataclass(frozen=True)
class RefComparison:
    """How one forecaster compares with the reference baseline on one dataset.

    ``significant`` is what the leaderboard's ``beats_reference`` shows: the forecaster's mean
    rank metric is below the reference's AND the Wilcoxon test rejects at 5% in the
    forecaster's favour (or, with fewer than 6 series, where that test can never reject, the
    Diebold-Mariano test says better on every series).
    """

    win_share: float
    dm_better: int
    dm_worse: int
    wilcoxon_p: float
    significant: bool


def diebold_mariano(d: np.ndarray, h: int, *, correction: bool = True) -> tuple[float, float]:
    """Diebold-Mariano statistic and two-sided p-value for the loss differences ``d``.

    With ``d_bar`` the mean of the T values and ``g_k = 1/T sum_{t=k+1..T} (d_t - d_bar)
    (d_{t-k} - d_bar)`` the sample autocovariances, the statistic is (Diebold & Mariano 1995,
    eq. 9, with the truncated rectangular lag window at h - 1 that the paper uses for h-step
    forecasts)::

        DM = d_bar / sqrt((g_0 + 2 sum_{k=1..h-1} g_k) / T)

    compared with the standard normal. ``correction=True`` (the default) applies Harvey,
    Leybourne & Newbold (1997, eq. 9)::

        DM* = DM * sqrt((T + 1 - 2h + h(h - 1) / T) / T)

    compared with Student's t with T - 1 degrees of freedom. A negative ``d_bar`` means the
    first forecaster has the lower loss.

    Returns ``(nan, nan)`` when the test is undefined: fewer than 2 values, ``h < 1``, a
    non-positive variance estimate (the rectangular window does not guarantee a positive one;
    castgrid then declines to test rather than guess), or a correction factor that is not
    positive (h too large for T).

    >>> stat, p = diebold_mariano(np.array([1.0, 3.0, 2.0, 4.0, 5.0]), 2)
    >>> round(stat, 6)
    3.0
    """
    from scipy import special

    d = np.asarray(d, dtype=float)
    t = d.size
    if t < 2 or h < 1 or not np.isfinite(d).all():
        return math.nan, math.nan
    dev = d - d.mean()
    gamma = [float(dev[k:] @ dev[: t - k]) / t for k in range(min(h, t))]
    variance = gamma[0] + 2.0 * sum(gamma[1:])
    if not variance > 0:
        return math.nan, math.nan
    stat = float(d.mean() / math.sqrt(variance / t))
    if not correction:
        return stat, float(2.0 * special.ndtr(-abs(stat)))  # the normal survival function
    factor = (t + 1 - 2 * h + h * (h - 1) / t) / t
    if not factor > 0:
        return math.nan, math.nan
    stat *= math.sqrt(factor)
    return stat, float(2.0 * special.stdtr(t - 1, -abs(stat)))  # Student's t survival function


def diebold_mariano_by_series(
    d: np.ndarray, series: np.ndarray, folds: np.ndarray, h: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """:func:`diebold_mariano` for every series at once: (mean d, statistic, p-value) per series.

    The values of each series are put in fold order in one padded matrix, so ten thousand
    series cost a few array operations rather than ten thousand scipy calls; the arithmetic is
    that of :func:`diebold_mariano` (HLN-corrected, Student's t with T - 1 df).
    """
    from scipy import special

    codes, inverse = np.unique(series, return_inverse=True)
    order = np.lexsort((folds, inverse))
    inv_sorted = inverse[order]
    counts = np.bincount(inv_sorted, minlength=len(codes))
    starts = np.r_[0, np.cumsum(counts)[:-1]]
    position = np.arange(len(order)) - starts[inv_sorted]
    mat = np.full((len(codes), int(counts.max())), np.nan)
    mat[inv_sorted, position] = d[order]
    t = counts.astype(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.nansum(mat, axis=1) / t
        dev = np.nan_to_num(mat - mean[:, None])  # padding contributes nothing to the sums
        variance = np.sum(dev * dev, axis=1) / t
        for k in range(1, h):
            if k < mat.shape[1]:
                variance += 2.0 * np.sum(dev[:, k:] * dev[:, :-k], axis=1) / t
        factor = (t + 1 - 2 * h + h * (h - 1) / t) / t
        valid = (t >= 2) & (variance > 0) & (factor > 0)
        stat = np.where(valid, mean / np.sqrt(variance / t) * np.sqrt(factor), np.nan)
        # Student's t survival function, as scipy.stats.t.sf computes it
        p = np.where(valid, 2.0 * special.stdtr(np.maximum(t - 1, 1), -np.abs(stat)), np.nan)
    return mean, stat, p


def dm_lag_order(horizon: int, step: int | None = None) -> int:
    """The ``h`` of the Diebold-Mariano test for per-fold block means (see the module doc)."""
    step = horizon if step is None else step
    if horizon < 1 or step < 1:
        raise ValueError(f"horizon and step must be >= 1, got {horizon} and {step}")
    return max(1, math.ceil(horizon / step))


def average_ranks(x: np.ndarray) -> tuple[np.ndarray, bool, np.ndarray]:
    """Ranks 1..n of ``x`` with ties sharing their mean rank, whether there are ties, and the
    size of each tie group (at the group's first sorted position, 0 elsewhere).

    The arithmetic of ``scipy.stats.rankdata(x, "average")`` (stable sort, ``min rank +
    (count - 1) / 2`` per group), so the ranks are bit for bit the same; NaN sorts last, and
    each NaN is a group of its own.
    """
    n = x.size
    order = np.argsort(x, kind="stable")
    y = x[order]
    first = np.concatenate([[True], y[:-1] != y[1:]])
    starts = np.arange(n)[first]
    counts = np.diff(starts, append=n)
    group_rank = np.arange(1, n + 1, dtype=float)[first] + (counts.astype(float) - 1) / 2
    ranks = np.empty(n, dtype=float)
    ranks[order] = np.repeat(group_rank, counts)
    ties = np.zeros(n, dtype=float)
    ties[first] = counts
    return ranks, bool(np.any(ties == 0)), ties


def _wilcoxon_null(n: int) -> np.ndarray:
    """P(R+ = r), r = 0..n(n+1)/2, for n untied non-zero differences under the null: each sign
    is + or - with probability 1/2, independently (Wilcoxon 1945), built one rank at a time."""
    c = np.ones(1, dtype=np.float64)
    for k in range(1, n + 1):
        prev = c
        c = np.zeros(k * (k + 1) // 2 + 1, dtype=np.float64)
        m = len(prev)
        c[:m] = prev * 0.5
        c[-m:] += prev * 0.5
    return c


def wilcoxon_pvalue(diffs: np.ndarray) -> float:
    """Two-sided p-value of the Wilcoxon signed-rank test that ``diffs`` are centred on 0.

    Zero differences are dropped (Wilcoxon's own treatment) and ties share their mean rank.
    The p-value is the one ``scipy.stats.wilcoxon(diffs)`` gives with its defaults (checked
    against it in tests/test_significance.py), computed the same way:

    * at most 50 differences, none zero and none tied: exact, from the null distribution of
      the sum of positive ranks ``R+`` (:func:`_wilcoxon_null`),
      ``2 min(P(R+ >= r), P(R+ <= r))``;
    * more than 50, or zeros or ties among more than 13: the normal approximation
      ``z = (R+ - n(n+1)/4) / sqrt((n(n+1)(2n+1) - sum(t^3 - t) / 2) / 24)`` over the ``n``
      non-zero differences with tie groups of sizes ``t``, without continuity correction;
    * zeros or ties among at most 13 differences: scipy's exact permutation test, by
      calling ``scipy.stats.wilcoxon`` (imported only then).

    NaN when fewer than two differences are non-zero.
    """
    d = np.asarray(diffs, dtype=float)
    n_zero = int(np.count_nonzero(d == 0))
    if d.size - n_zero < 2:
        return math.nan
    x = np.where(d == 0, np.nan, d)
    count = float(d.size - n_zero)
    ranks, has_ties, ties = average_ranks(np.abs(x))
    r_plus = float(np.sum((x > 0).astype(float) * ranks))
    if d.size > 50 or ((has_ties or n_zero) and d.size > 13):
        from scipy import special

        mean = count * (count + 1.0) * 0.25
        var = count * (count + 1.0) * (2.0 * count + 1.0)
        se = np.sqrt((var - np.sum(ties**3 - ties) / 2) / 24)
        return float(2 * special.ndtr(-abs((r_plus - mean) / se)))
    if has_ties or n_zero:
        from scipy import stats

        return float(stats.wilcoxon(d).pvalue)
    pmf = _wilcoxon_null(d.size)
    middle = d.size * (d.size + 1) / 4

    def sf(k: int) -> float:  # P(R+ >= k)
        return float(pmf[k:].sum()) if k <= middle else float(1 - pmf[:k].sum())

    def cdf(k: int) -> float:  # P(R+ <= k)
        return float(pmf[: k + 1].sum()) if k <= middle else float(1 - pmf[k + 1 :].sum())

    p = 2 * min(sf(math.floor(r_plus)), cdf(math.ceil(r_plus)))
    return float(np.clip(p, 0, 1))


def _wilcoxon(diffs: np.ndarray) -> tuple[float, bool]:
    """Two-sided Wilcoxon p-value of ``diffs`` and whether the negative side dominates.

    Zero differences are dropped (scipy's default ``zero_method="wilcox"``, Wilcoxon's own
    treatment); fewer than two non-zero differences leave nothing to test (NaN).
    """
    nonzero = diffs[diffs != 0]
    if nonzero.size < 2:
        return math.nan, False
    p = wilcoxon_pvalue(diffs)
    ranks, _, _ = average_ranks(np.abs(nonzero))
    favours_first = float(ranks[nonzero < 0].sum()) > float(ranks[nonzero > 0].sum())
    return p, favours_first


def block_differences(loss: np.ndarray, ref_loss: np.ndarray) -> np.ndarray:
    """Per task, the forecaster's mean pointwise loss over its test block minus the
    reference's: ``loss`` / ``ref_loss`` (n, H), the steps either has no finite loss for (a
    missing actual) left out of both means; NaN for a task without such a step.

    >>> block_differences(np.array([[1.0, 3.0], [2.0, np.nan]]), np.array([[1.0, 1.0],
    ...                                                                     [1.0, 5.0]]))
    array([1., 1.])
    """
    loss = np.asarray(loss, dtype=float)
    ref_loss = np.asarray(ref_loss, dtype=float).reshape(loss.shape)
    steps = np.isfinite(loss) & np.isfinite(ref_loss)
    if steps.all():
        return loss.mean(axis=1) - ref_loss.mean(axis=1)
    count = steps.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        out = (np.where(steps, loss, 0.0).sum(axis=1) / count
               - np.where(steps, ref_loss, 0.0).sum(axis=1) / count)
    out[count == 0] = np.nan
    return out


def compare_with_reference(
    score: np.ndarray,
    ref_score: np.ndarray,
    loss: np.ndarray,
    ref_loss: np.ndarray,
    series: np.ndarray,
    folds: np.ndarray,
    horizon: int,
    *,
    step: int | None = None,
) -> RefComparison:
    """Compare one forecaster with the reference on the tasks both completed.

    ``score`` / ``ref_score`` (n,) are per-task rank-metric values, ``loss`` / ``ref_loss``
    (n, H) the pointwise losses of that metric (``|e| / scale`` for mase, ``e**2`` for rmse),
    ``series`` (n,) integer codes and ``folds`` (n,) fold numbers, all aligned row by row.
    ``step`` is the origin advance between folds (default: ``horizon``), which sets the
    Diebold-Mariano ``h`` (see the module docstring). Tasks with a NaN score on either side
    are left out; steps with a NaN loss (a missing actual) are left out of a task's block.
    """
    score = np.asarray(score, dtype=float)
    loss = np.asarray(loss, dtype=float).reshape(score.size, -1)
    ref_loss = np.asarray(ref_loss, dtype=float).reshape(score.size, -1)
    if loss.shape != ref_loss.shape:
        raise ValueError("score, ref_score, loss, ref_loss, series and folds must align")
    return compare_blocks(score, ref_score, block_differences(loss, ref_loss), series, folds,
                          horizon, step=step)


def compare_blocks(
    score: np.ndarray,
    ref_score: np.ndarray,
    block_diff: np.ndarray,
    series: np.ndarray,
    folds: np.ndarray,
    horizon: int,
    *,
    step: int | None = None,
) -> RefComparison:
    """:func:`compare_with_reference` from each task's block difference
    (:func:`block_differences`) instead of the losses: all the tests use of them, and what a
    run keeps per task when it scores its series chunk by chunk."""
    score = np.asarray(score, dtype=float)
    ref_score = np.asarray(ref_score, dtype=float)
    block_diff = np.asarray(block_diff, dtype=float)
    series = np.asarray(series)
    folds = np.asarray(folds)
    if not (ref_score.size == series.size == folds.size == score.size == block_diff.size):
        raise ValueError("score, ref_score, loss, ref_loss, series and folds must align")
    ok = np.isfinite(score) & np.isfinite(ref_score) & np.isfinite(block_diff)
    if not ok.any():
        return RefComparison(math.nan, 0, 0, math.nan, False)
    score, ref_score, series, folds = score[ok], ref_score[ok], series[ok], folds[ok]
    block_diff = block_diff[ok]

    win_share = float(np.mean(score < ref_score))
    h = dm_lag_order(horizon, step)
    series_means, stat, p = diebold_mariano_by_series(block_diff, series, folds, h)
    tested = np.isfinite(p) & (p < ALPHA)
    better = int(np.sum(tested & (stat < 0)))
    worse = int(np.sum(tested & (stat > 0)))
    wilcoxon_p, favours = _wilcoxon(series_means)
    better_on_average = float(score.mean()) < float(ref_score.mean())
    # With fewer than 6 series a two-sided Wilcoxon test cannot reach 5% whatever the data, so
    # there the win must instead be significant on every series by the per-series DM test.
    by_wilcoxon = np.isfinite(wilcoxon_p) and wilcoxon_p < ALPHA and favours
    by_every_series = len(series_means) < 6 and better == len(series_means)
    significant = bool(better_on_average and (by_wilcoxon or by_every_series))
    return RefComparison(win_share, better, worse, wilcoxon_p, significant)
