"""Diebold-Mariano (with the Harvey-Leybourne-Newbold correction), Wilcoxon and win share.

References checked against: scipy.stats (t and normal distributions, ttest_1samp, wilcoxon),
statsmodels.tsa.stattools.acovf (autocovariances), and a small case worked out by hand from
the formulas of Diebold & Mariano (1995, eq. 9) and Harvey, Leybourne & Newbold (1997, eq. 9).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.tsa.stattools import acovf

from runner.scoring.significance import (
    average_ranks,
    compare_with_reference,
    diebold_mariano,
    diebold_mariano_by_series,
    dm_lag_order,
    wilcoxon_pvalue,
)


def test_hand_worked_case_h2() -> None:
    # d = 1, 3, 2, 4, 5; T = 5, h = 2.
    # mean = 15 / 5 = 3; deviations = -2, 0, -1, 1, 2
    # g0 = (4 + 0 + 1 + 1 + 4) / 5 = 2
    # g1 = (0*(-2) + (-1)*0 + 1*(-1) + 2*1) / 5 = 1 / 5 = 0.2
    # long-run variance = g0 + 2 g1 = 2.4; Var(mean) = 2.4 / 5 = 0.48
    # DM = 3 / sqrt(0.48) = 4.330127...
    # HLN factor = (T + 1 - 2h + h(h-1)/T) / T = (5 + 1 - 4 + 2/5) / 5 = 2.4 / 5 = 0.48
    # DM* = DM * sqrt(0.48) = 3 / sqrt(0.48) * sqrt(0.48) = 3 exactly, on t with 4 df
    d = np.array([1.0, 3.0, 2.0, 4.0, 5.0])
    raw, raw_p = diebold_mariano(d, 2, correction=False)
    assert raw == pytest.approx(3 / math.sqrt(0.48), rel=1e-12)
    assert raw == pytest.approx(4.330127, rel=1e-6)
    assert raw_p == pytest.approx(2 * stats.norm.sf(4.330127), rel=1e-5)
    stat, p = diebold_mariano(d, 2)
    assert stat == pytest.approx(3.0, rel=1e-12)
    # two-sided t(4) tail at 3: scipy; t tables put it between 0.02 and 0.05 (t_.025,4 = 2.776,
    # t_.01,4 = 3.747, from memory of the standard t table)
    assert p == pytest.approx(2 * stats.t.sf(3.0, 4), rel=1e-12)
    assert 0.02 < p < 0.05


def test_h1_corrected_statistic_is_the_one_sample_t_test() -> None:
    # With h = 1 the HLN factor is (T - 1) / T, which turns d_bar / sqrt(g0 / T) (g0 divides by
    # T) into d_bar / (s / sqrt(T)) (s divides by T - 1): the one-sample t statistic, with the
    # same t(T - 1) reference distribution (HLN 1997, section 3).
    rng = np.random.default_rng(4)
    d = rng.normal(0.3, 1.0, 17)
    stat, p = diebold_mariano(d, 1)
    ref = stats.ttest_1samp(d, 0.0)
    assert stat == pytest.approx(ref.statistic, rel=1e-12)
    assert p == pytest.approx(ref.pvalue, rel=1e-10)


@pytest.mark.parametrize("h", [2, 3, 4])
def test_against_statsmodels_autocovariances_and_scipy_t(h: int) -> None:
    # independent computation of the textbook formula: statsmodels' acovf (divisor T, demeaned)
    # for the autocovariances, scipy's t distribution with T - 1 df for the p-value
    rng = np.random.default_rng(h)
    e = rng.normal(size=41)
    d = 0.4 + e[1:] + 0.5 * e[:-1]  # an MA(1) loss differential, as for 2-step forecasts
    t = d.size
    g = acovf(d, adjusted=False, demean=True, fft=False, nlag=h - 1)
    dm = d.mean() / math.sqrt((g[0] + 2 * g[1:h].sum()) / t)
    dm_star = dm * math.sqrt((t + 1 - 2 * h + h * (h - 1) / t) / t)
    stat, p = diebold_mariano(d, h)
    assert stat == pytest.approx(dm_star, rel=1e-10)
    assert p == pytest.approx(2 * stats.t.sf(abs(dm_star), t - 1), rel=1e-10)
    raw, raw_p = diebold_mariano(d, h, correction=False)
    assert raw == pytest.approx(dm, rel=1e-10)
    assert raw_p == pytest.approx(2 * stats.norm.sf(abs(dm)), rel=1e-10)


def test_sign_follows_the_first_forecaster() -> None:
    d = np.array([-0.5, -0.2, -0.9, -0.4, -0.6, -0.3])
    stat, p = diebold_mariano(d, 1)
    assert stat < 0 and p < 0.05
    flipped, p2 = diebold_mariano(-d, 1)
    assert flipped == pytest.approx(-stat) and p2 == pytest.approx(p)


@pytest.mark.parametrize(
    "d, h",
    [
        (np.array([0.5]), 1),  # one value
        (np.array([0.2, 0.2, 0.2, 0.2]), 1),  # no variance
        (np.array([1.0, -1.0, 1.0, -1.0]), 2),  # g0 + 2 g1 < 0 with the rectangular window
        (np.array([1.0, 3.0, 2.0]), 3),  # HLN factor (3 + 1 - 6 + 2) / 3 = 0
        (np.array([1.0, np.nan, 2.0]), 1),
    ],
)
def test_undefined_cases_give_nan(d: np.ndarray, h: int) -> None:
    stat, p = diebold_mariano(d, h)
    assert math.isnan(stat) and math.isnan(p)


def test_lag_order_from_block_overlap() -> None:
    assert dm_lag_order(6) == 1  # step defaults to the horizon: no shared test observations
    assert dm_lag_order(6, 6) == 1
    assert dm_lag_order(6, 12) == 1
    assert dm_lag_order(6, 4) == 2  # fold f and f+1 share 2 observations
    assert dm_lag_order(6, 2) == 3
    assert dm_lag_order(6, 1) == 6
    with pytest.raises(ValueError):
        dm_lag_order(6, 0)


def _tasks(n_series: int, n_folds: int, h: int, seed: int, edge: float):
    """Per-step losses of a forecaster and a reference; ``edge`` < 0 favours the forecaster."""
    rng = np.random.default_rng(seed)
    n = n_series * n_folds
    ref_loss = rng.gamma(2.0, 1.0, (n, h))
    loss = np.clip(ref_loss + edge + rng.normal(0, 0.3, (n, h)), 0, None)
    series = np.repeat(np.arange(n_series), n_folds)
    folds = np.tile(np.arange(n_folds), n_series)
    return loss.mean(axis=1), ref_loss.mean(axis=1), loss, ref_loss, series, folds


def test_compare_with_reference_against_direct_computation() -> None:
    h = 4
    score, ref_score, loss, ref_loss, series, folds = _tasks(8, 6, h, seed=1, edge=-0.25)
    c = compare_with_reference(score, ref_score, loss, ref_loss, series, folds, h)
    assert c.win_share == pytest.approx(np.mean(score < ref_score))
    block = loss.mean(axis=1) - ref_loss.mean(axis=1)
    per_series = [block[series == s].mean() for s in range(8)]
    assert c.wilcoxon_p == pytest.approx(stats.wilcoxon(per_series).pvalue)  # scipy directly
    better = worse = 0
    for s in range(8):
        d = block[series == s][np.argsort(folds[series == s])]
        # h = 1 per-fold block means (step = horizon), i.e. the one-sample t test
        res = stats.ttest_1samp(d, 0.0)
        better += int(res.pvalue < 0.05 and res.statistic < 0)
        worse += int(res.pvalue < 0.05 and res.statistic > 0)
    assert (c.dm_better, c.dm_worse) == (better, worse)
    assert c.dm_better > 0  # the edge is large enough for some series to show it
    # every series better: the exact two-sided signed-rank p is 2 / 2**8, its smallest value
    # for 8 pairs (the exact null distribution puts 1 / 2**n on each sign pattern; common practice)
    assert all(x < 0 for x in per_series)
    assert c.wilcoxon_p == pytest.approx(2 / 2**8)
    assert c.significant


def test_row_order_does_not_matter_but_fold_order_is_used() -> None:
    h = 3
    args = _tasks(6, 5, h, seed=2, edge=-0.2)
    a = compare_with_reference(*args, h)
    perm = np.random.default_rng(0).permutation(args[0].size)
    b = compare_with_reference(*(x[perm] for x in args), h)
    assert a == b


def test_worse_forecaster_is_never_significant() -> None:
    h = 3
    score, ref_score, loss, ref_loss, series, folds = _tasks(8, 6, h, seed=3, edge=0.4)
    c = compare_with_reference(score, ref_score, loss, ref_loss, series, folds, h)
    assert c.wilcoxon_p < 0.05  # the test rejects ...
    assert not c.significant  # ... but in the reference's favour
    assert c.dm_worse > 0 and c.dm_better == 0
    assert c.win_share < 0.5


def test_too_few_series_and_nan_tasks() -> None:
    h = 2
    score, ref_score, loss, ref_loss, series, folds = _tasks(1, 6, h, seed=5, edge=-1.0)
    c = compare_with_reference(score, ref_score, loss, ref_loss, series, folds, h)
    # one series: nothing for Wilcoxon to rank; the per-series DM test decides alone
    assert math.isnan(c.wilcoxon_p)
    assert c.significant == (c.dm_better == 1)
    assert c.win_share == 1.0
    score = score.copy()
    score[0] = np.nan  # a task without a score is left out of every count
    c2 = compare_with_reference(score, ref_score, loss, ref_loss, series, folds, h)
    assert c2.win_share == 1.0
    empty = compare_with_reference(score[:1], ref_score[:1], loss[:1], ref_loss[:1],
                                   series[:1], folds[:1], h)
    assert math.isnan(empty.win_share) and not empty.significant


def test_ties_are_not_wins_and_identical_forecasts_test_nothing() -> None:
    h = 2
    _, ref_score, _, ref_loss, series, folds = _tasks(7, 4, h, seed=6, edge=0.0)
    c = compare_with_reference(ref_score, ref_score, ref_loss, ref_loss, series, folds, h)
    assert c.win_share == 0.0
    assert math.isnan(c.wilcoxon_p)  # every difference is zero
    assert (c.dm_better, c.dm_worse) == (0, 0)
    assert not c.significant


def test_all_series_at_once_equals_one_series_at_a_time():
    # The vectorised path must be exactly the scalar published formula, series by series.
    from runner.scoring.significance import diebold_mariano_by_series

    rng = np.random.default_rng(0)
    series = np.repeat(np.arange(40), 7)
    folds = np.tile(np.arange(7), 40)
    perm = rng.permutation(len(series))
    series, folds = series[perm], folds[perm]
    d = rng.normal(0.2, 1, len(series))
    for h in (1, 2, 3):
        _, stat, p = diebold_mariano_by_series(d, series, folds, h)
        for i in range(40):
            sel = series == i
            order = np.argsort(folds[sel])
            s1, p1 = diebold_mariano(d[sel][order], h)
            np.testing.assert_allclose([s1, p1], [stat[i], p[i]], rtol=1e-10)


def test_few_series_need_a_significant_win_on_every_series():
    from runner.scoring.significance import compare_with_reference

    rng = np.random.default_rng(5)
    n_folds, h = 12, 3
    series = np.repeat(np.arange(2), n_folds)
    folds = np.tile(np.arange(n_folds), 2)
    ref_loss = rng.uniform(1.0, 2.0, (len(series), h))
    loss = ref_loss * 0.3  # far better on every fold of both series
    c = compare_with_reference(loss.mean(1), ref_loss.mean(1), loss, ref_loss, series, folds, h)
    # two series: Wilcoxon cannot reach 5% (its smallest two-sided p is 0.5)
    assert c.dm_better == 2 and c.wilcoxon_p == pytest.approx(0.5) and c.significant


def _wilcoxon_cases() -> list[np.ndarray]:
    """Samples for every branch of the test: exact (n <= 50, untied), ties or zeros with
    n <= 13 (a permutation test) and 14..50 (normal approximation), n > 50 (normal)."""
    rng = np.random.default_rng(11)
    cases = []
    for n in (2, 3, 5, 8, 13, 14, 20, 37, 50, 51, 80, 200):
        cases.append(rng.normal(0.2, 1.0, n))  # untied, no zeros
        tied = np.round(rng.normal(0.3, 1.0, n), 1)  # ties (and now and then a zero)
        tied[0] = 0.0  # a zero difference: dropped
        cases.append(tied)
        cases.append(np.abs(rng.normal(0, 1, n)) * -1)  # all one side: the smallest p
    cases.append(np.array([0.0, 0.0, 1.0]))  # one non-zero difference: nothing to test
    return cases


def test_wilcoxon_pvalue_is_scipys() -> None:
    """Reference: scipy.stats.wilcoxon with its defaults (zero_method "wilcox", no
    continuity correction, method "auto"), on samples reaching each of its branches. The same
    arithmetic in the same order, so the p-values agree to the last bit on one machine."""
    for d in _wilcoxon_cases():
        mine = wilcoxon_pvalue(d)
        if np.count_nonzero(d) < 2:
            assert math.isnan(mine)
            continue
        assert mine == stats.wilcoxon(d).pvalue, (len(d), d[:4])


def test_average_ranks_are_scipys() -> None:
    """Reference: scipy.stats.rankdata(method="average") and the tie counts it implies."""
    rng = np.random.default_rng(5)
    for x in (rng.normal(size=30), np.round(rng.normal(size=40), 1), np.array([2.0, 2.0])):
        ranks, has_ties, ties = average_ranks(x)
        assert np.array_equal(ranks, stats.rankdata(x))
        _, counts = np.unique(x, return_counts=True)
        assert has_ties == bool((counts > 1).any())
        assert sorted(ties[ties > 0]) == sorted(counts)


def test_dm_by_series_p_values_are_scipys_t() -> None:
    """Reference: scipy.stats.t.sf on the statistics, T - 1 degrees of freedom."""
    rng = np.random.default_rng(2)
    d = rng.normal(0.3, 1.0, 60)
    series = np.repeat(np.arange(10), 6)
    folds = np.tile(np.arange(6), 10)
    _, stat, p = diebold_mariano_by_series(d, series, folds, 2)
    assert np.array_equal(p, 2.0 * stats.t.sf(np.abs(stat), df=5), equal_nan=True)
