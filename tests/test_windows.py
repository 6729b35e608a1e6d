"""Rolling-origin folds (runner.windows.folds) against scikit-learn TimeSeriesSplit and the fold
rule, for origins counted from the start of the time axis (the default) and from each series'
end (``align: end``)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.model_selection import TimeSeriesSplit

from runner.windows.folds import Scheme, anchored_origins, fold_bounds


def _sklearn_folds(n, splits, test_size, gap, max_train=None):
    tss = TimeSeriesSplit(n_splits=splits, test_size=test_size, gap=gap, max_train_size=max_train)
    return [(tr[0], tr[-1] + 1, te[0], te[-1] + 1) for tr, te in tss.split(np.zeros(n))]


@pytest.mark.parametrize(
    "n,splits,horizon,gap", [(100, 5, 10, 0), (120, 4, 12, 0), (97, 3, 7, 2), (60, 6, 3, 1)]
)
def test_expanding_matches_sklearn_time_series_split(n, splits, horizon, gap):
    # Source: scikit-learn TimeSeriesSplit (test blocks of test_size stepping back from the end,
    # training = everything before the test block minus gap) equals castgrid's expanding scheme
    # with align end, step = horizon and folds = n_splits.
    ours = fold_bounds(n, Scheme("expanding", train=1, horizon=horizon, step=horizon, gap=gap,
                                 folds=splits))
    assert [tuple(map(int, row)) for row in ours] == _sklearn_folds(n, splits, horizon, gap)


@pytest.mark.parametrize(
    "n,splits,horizon,gap", [(100, 5, 10, 0), (120, 4, 12, 0), (97, 3, 7, 2), (60, 6, 3, 1)]
)
@pytest.mark.parametrize("kind", ["expanding", "sliding"])
def test_origins_from_the_start_match_sklearn_time_series_split(n, splits, horizon, gap, kind):
    # Source: scikit-learn TimeSeriesSplit. Its first training block ends `splits` test blocks
    # (and the gap) before the end; with train set to that length, castgrid's default origins
    # (the first where `train` observations fit, then every horizon) give the same folds, and
    # for sliding windows max_train_size = train.
    train = n - splits * horizon - gap
    scheme = Scheme(kind, train=train, horizon=horizon, step=horizon, gap=gap, align="start")
    ours = fold_bounds(n, scheme)
    max_train = train if kind == "sliding" else None
    assert [tuple(map(int, row)) for row in ours] == _sklearn_folds(n, splits, horizon, gap,
                                                                     max_train)
    assert list(anchored_origins(n, scheme)) == list(ours[:, 1] - 1)


@pytest.mark.parametrize("n,splits,horizon,train,gap", [(100, 5, 10, 30, 0), (90, 4, 6, 24, 3)])
def test_sliding_matches_sklearn_max_train_size(n, splits, horizon, train, gap):
    # Source: scikit-learn TimeSeriesSplit with max_train_size = a sliding training window.
    ours = fold_bounds(n, Scheme("sliding", train=train, horizon=horizon, step=horizon, gap=gap,
                                 folds=splits))
    assert [tuple(map(int, row)) for row in ours] == _sklearn_folds(
        n, splits, horizon, gap, max_train=train
    )


@pytest.mark.parametrize("align", ["start", "end"])
def test_spec_fold_count_example(align):
    # Common practice (and the SPEC's worked example): 100 observations, sliding, train 50%,
    # horizon 10, step 10 -> 5 folds; the first 50 observations are never a test block.
    from runner.config import WindowsConfig

    w = WindowsConfig(scheme="sliding", train="50%", step=10)
    folds = fold_bounds(100, Scheme("sliding", w.train_length(100), 10, 10, align=align))
    assert len(folds) == 5
    assert folds[:, 2].min() == 50
    assert (folds[:, 1] - folds[:, 0] == 50).all()
    assert folds[-1, 3] == 100


def test_align_start_steps_forward_from_train():
    folds = fold_bounds(50, Scheme("expanding", train=20, horizon=5, step=7, align="start"))
    assert list(folds[:, 1]) == [20, 27, 34, 41]
    assert (folds[:, 3] <= 50).all()


def test_origins_from_the_start_never_move_when_observations_are_appended():
    scheme = Scheme("sliding", train=12, horizon=4, step=3, gap=1, align="start")
    before = anchored_origins(40, scheme)
    for extra in range(1, 12):
        after = anchored_origins(40 + extra, scheme)
        assert list(after[: len(before)]) == list(before)
        # a new origin only once its whole test block (gap + horizon) fits
        assert all(o + 1 + 4 <= 40 + extra - 1 for o in after)


def test_folds_keeps_latest_and_too_short_gives_none():
    folds = fold_bounds(100, Scheme("expanding", train=10, horizon=10, step=10, folds=2))
    assert list(folds[:, 1]) == [80, 90]
    assert fold_bounds(19, Scheme("expanding", train=10, horizon=10, step=10)).shape == (0, 4)
    assert fold_bounds(20, Scheme("expanding", train=10, horizon=10, step=10)).shape == (1, 4)


def test_no_test_block_overlaps_its_training_slice():
    rng = np.random.default_rng(0)
    for _ in range(200):
        draw = rng.integers([5, 1, 1, 1, 0], [200, 60, 20, 15, 4])
        n, train, h, step, gap = (int(v) for v in draw)
        kind = ["expanding", "sliding"][int(rng.integers(2))]
        align = ["start", "end"][int(rng.integers(2))]
        for row in fold_bounds(n, Scheme(kind, train, h, step, gap, align=align)):
            s, e, ts, te = row
            assert e - s >= train and e + gap == ts and te - ts == h and te <= n
