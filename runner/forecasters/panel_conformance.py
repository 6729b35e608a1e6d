"""Conformance checks for panel forecasters (models trained across series, ``kind: panel_plugin``).

The twin of :mod:`runner.forecasters.conformance` for the
:class:`~runner.forecasters.contract.PanelForecaster` protocol. Plugin authors run
:func:`check_panel_forecaster` on their own classes (``runner.testing`` re-exports it)::

    from runner.testing import check_panel_forecaster
    report = check_panel_forecaster(MyPanelModel, params={"lags": 3})
    print(report)                                # one line per check: pass / fail / skip
    check_panel_forecaster(MyPanelModel, raise_on_failure=True)

The checks (``PANEL_CHECKS``, in this order; each is a module-level ``check_<name>(subject)``
function, and ``only=(name,)`` runs one by itself). They fit on :func:`example_panel`: invented
seeded series of different lengths and scales, one ending before the origin, with a 0/1
covariate, a covariate constant within each series and a series attribute.

``protocol``                  fit and predict exist and take the panel protocol's keywords
``init_stores_params``        ``__init__`` declares each parameter by name and only stores it
``clone_equal_params``        rebuilding from the parameters gives equal parameters
``fit_returns_self``          ``fit`` returns the forecaster itself
``fit_keeps_params``          ``fit`` does not change the parameters
``fitted_attributes_underscore``  state set by ``fit`` is in names ending with ``_``
``predict_shape``             ``predict(h, series=...)`` gives ``(len(series), h)`` finite values
                              (h = 1 and h = 5)
``rows_match_series``         a series' forecasts do not depend on which other series are
                              requested, nor on their order (a subset and the reversed list give
                              the same rows)
``no_input_mutation``         ``fit`` and ``predict`` leave the history record, ``series`` and
                              the covariates untouched
``picklable_unfitted``        the unfitted forecaster survives pickling
``picklable_fitted``          the fitted one too, and forecasts the same afterwards
``deterministic``             two fresh fits on the same history forecast bit-identically
``refit_independent``         fitting again on another history forgets the first fit
``short_series``              a requested series with only 2 values costs at most its own row
                              (forecast or NaN); the other rows stay finite
``no_covariates``             a forecaster given covariates also works on a dataset without any
                              (skipped when the class says ``uses_covariates = False``)
``intervals_ordered``         when intervals are returned: finite, lower <= point <= upper, and
                              the 80% interval inside the 95% one
"""

from __future__ import annotations

import copy
import inspect
import pickle
from collections.abc import Callable
from dataclasses import dataclass, fields, replace
from typing import Any

import numpy as np

from runner.forecasters.conformance import (
    CheckReport,
    _check_name,
    _CheckFailed,
    _chosen,
    _differs,
    _params,
    _run_checks,
    _same,
    _Skip,
    check_clone_equal_params,
    check_init_stores_params,
    clone,
)
from runner.forecasters.contract import (
    PanelForecast,
    PanelHistory,
    as_panel_forecast,
    bad_rows,
    panel_protocol_problem,
)


def example_panel(
    n_series: int = 6, length: int = 40, season: int = 4, horizon: int = 5, seed: int = 0,
    covariates: bool = True,
) -> tuple[PanelHistory, np.ndarray, np.ndarray | None]:
    """An invented panel for the checks: ``(history, series, future covariates)``.

    Series ``i`` starts ``2 * i`` positions after the first and, but for the last one, ends at
    the origin (``length - 1``); the last series ends 3 positions before it and is not among
    ``series``. Values are positive: a level that differs by series (tens to hundreds), a trend,
    a season of ``season`` positions and seeded noise, plus 5 in positions where the 0/1
    covariate ``promo`` is 1. The covariate ``size`` is constant within each series (a static
    covariate); the attribute ``group`` names a region per series. ``future`` holds ``horizon``
    steps of both covariates for each of ``series``.
    """
    rng = np.random.default_rng(seed)
    origin = length - 1
    firsts = 2 * np.arange(n_series)
    lasts = np.full(n_series, origin)
    lasts[-1] = origin - 3
    end = origin + horizon
    t = np.arange(end + 1, dtype=float)
    level = 20.0 * (1.0 + np.arange(n_series)) ** 1.5
    promo = (rng.random((n_series, end + 1)) < 0.2).astype(float)
    full = (level[:, None] * (1.0 + 0.01 * t[None, :])
            + 0.1 * level[:, None] * np.sin(2 * np.pi * t / max(season, 1))[None, :]
            + rng.normal(0.0, 1.0, (n_series, end + 1)) + 5.0 * promo)
    size = np.arange(n_series, dtype=float) % 3
    vals, pos, cov, offsets = [], [], [], [0]
    for i in range(n_series):
        p = np.arange(firsts[i], lasts[i] + 1)
        vals.append(full[i, p])
        pos.append(p)
        cov.append(np.column_stack([promo[i, p], np.full(len(p), size[i])]))
        offsets.append(offsets[-1] + len(p))
    positions = np.concatenate(pos).astype(np.int64)
    offsets_a = np.asarray(offsets, dtype=np.int64)
    cov_a = np.concatenate(cov) if covariates else None
    names = ("promo", "size") if covariates else ()
    history = PanelHistory(
        values=np.concatenate(vals),
        offsets=offsets_a,
        keys=tuple(f"s{i:02d}" for i in range(n_series)),
        positions=positions,
        times=positions.copy(),
        covariates=cov_a,
        covariate_names=names,
        static={"size": size.copy()} if covariates else {},
        attributes={"group": np.array(["north", "south", "north", "east", "south", "east"]
                                      * (n_series // 6 + 1))[:n_series]},
        origin=origin,
        origin_time=np.int64(origin),
        season=season,
        frequency=None,
    )
    series = np.arange(n_series - 1, dtype=np.int64)
    future = None
    if covariates:
        steps = origin + 1 + np.arange(horizon)
        future = np.stack(
            [np.column_stack([promo[i, steps], np.full(horizon, size[i])]) for i in series]
        )
    return history, series, future


def _copy_history(h: PanelHistory) -> PanelHistory:
    return copy.deepcopy(h)


def _without_covariates(h: PanelHistory) -> PanelHistory:
    return replace(h, covariates=None, covariate_names=(), static={})


def _receives_covariates(obj: Any) -> bool:
    # A panel plugin without the attribute receives the dataset's covariates (see registry).
    return bool(getattr(type(obj), "uses_covariates", True))


@dataclass
class PanelSubject:
    """What every panel check looks at: how to build a fresh forecaster, and the data."""

    label: str
    fresh: Callable[[], Any]
    history: PanelHistory
    series: np.ndarray
    future: np.ndarray | None
    horizon: int
    #: the params passed to a class or factory (None when an instance was given)
    passed_values: dict[str, Any] | None

    def inputs(self, m: Any) -> tuple[PanelHistory, np.ndarray, np.ndarray | None]:
        """Fresh copies of the history, series and future covariates, as the runner would
        give them to ``m`` (without covariates when its class says ``uses_covariates =
        False``)."""
        if _receives_covariates(m):
            return _copy_history(self.history), self.series.copy(), _copy(self.future)
        return _without_covariates(_copy_history(self.history)), self.series.copy(), None

    def fit_predict(self, m: Any, levels: tuple[float, ...] = (),
                    series: np.ndarray | None = None, steps: int | None = None) -> Any:
        """Fit ``m`` on the example history and forecast ``steps`` (default ``horizon``)
        steps of ``series`` (default: every series that has the origin)."""
        history, all_series, future = self.inputs(m)
        out = m.fit(history)
        m = m if out is None else out
        return _predict(m, all_series if series is None else series, all_series, future,
                        self.horizon if steps is None else steps, levels)


def _copy(a: np.ndarray | None) -> np.ndarray | None:
    return None if a is None else a.copy()


def _predict(m: Any, series: np.ndarray, all_series: np.ndarray, future: np.ndarray | None,
             steps: int, levels: tuple[float, ...]) -> Any:
    """``m.predict`` for ``series`` (a subset of ``all_series``) with the matching rows of the
    future covariates."""
    kwargs: dict[str, Any] = {"series": np.asarray(series, dtype=np.int64), "levels": levels}
    if future is not None:
        row_of = {int(s): j for j, s in enumerate(all_series)}
        rows = np.array([row_of[int(s)] for s in series], dtype=np.int64)
        kwargs["covariates"] = future[rows, :steps].copy()
    return m.predict(steps, **kwargs)


def _arrays(out: Any, n: int, steps: int) -> dict[str, np.ndarray]:
    fc = as_panel_forecast(out, n, steps, ())
    arrays = {"point": fc.point}
    for level in sorted(fc.lower):
        arrays[f"lower{level:g}"] = np.asarray(fc.lower[level], dtype=float)
    for level in sorted(fc.upper):
        arrays[f"upper{level:g}"] = np.asarray(fc.upper[level], dtype=float)
    return arrays


#: The checks in the order they run; :data:`PANEL_CHECKS` (their names) is derived from it.
_CHECK_FUNCTIONS: list[Callable[[PanelSubject], None]] = []


def _panel_check(fn: Callable[[PanelSubject], None]) -> Callable[[PanelSubject], None]:
    _CHECK_FUNCTIONS.append(fn)
    return fn


@_panel_check
def check_protocol(c: PanelSubject) -> None:
    """Fit and predict exist and take the panel protocol's keywords."""
    problem = panel_protocol_problem(c.fresh())
    if problem:
        raise _CheckFailed(problem)


# The parameter checks read only ``fresh`` and ``passed_values``: the per-series ones apply.
_CHECK_FUNCTIONS.append(check_init_stores_params)  # type: ignore[arg-type]
_CHECK_FUNCTIONS.append(check_clone_equal_params)  # type: ignore[arg-type]


@_panel_check
def check_fit_returns_self(c: PanelSubject) -> None:
    """`fit` returns the forecaster itself."""
    m = c.fresh()
    out = m.fit(c.inputs(m)[0])
    if out is not m:
        raise _CheckFailed(f"fit returned {type(out).__name__}, expected the forecaster itself")


@_panel_check
def check_fit_keeps_params(c: PanelSubject) -> None:
    """`fit` does not change the parameters."""
    m = c.fresh()
    before = copy.deepcopy(_params(m))
    m.fit(c.inputs(m)[0])
    after = _params(m)
    bad = [k for k in before if not _same(before[k], after[k])]
    if bad:
        raise _CheckFailed(f"fit changed parameter {bad[0]!r}; keep fitted state in name_")


@_panel_check
def check_fitted_attributes_underscore(c: PanelSubject) -> None:
    """State set by `fit` is in names ending with `_`."""
    m = c.fresh()
    before = set(vars(m)) if hasattr(m, "__dict__") else set()
    m.fit(c.inputs(m)[0])
    new = set(vars(m)) - before if hasattr(m, "__dict__") else set()
    bad = sorted(k for k in new if not k.endswith("_") and not k.startswith("_"))
    if bad:
        raise _CheckFailed(f"fit set attributes {bad} whose names do not end with '_'")


@_panel_check
def check_predict_shape(c: PanelSubject) -> None:
    """`predict(h, series=...)` gives `(len(series), h)` finite values (h = 1 and h = 5)."""
    n = len(c.series)
    for steps in (1, c.horizon):
        out = c.fit_predict(c.fresh(), steps=steps)
        try:
            fc = as_panel_forecast(out, n, steps, ())
        except ValueError as exc:
            raise _CheckFailed(f"predict({steps}) for {n} series: {exc}") from None
        bad = np.flatnonzero(bad_rows(fc))
        if len(bad):
            raise _CheckFailed(
                f"predict({steps}): NaN or infinite forecasts for series "
                f"{c.history.keys[c.series[bad[0]]]!r}, which has "
                f"{int(np.diff(c.history.offsets)[c.series[bad[0]]])} values"
            )


@_panel_check
def check_rows_match_series(c: PanelSubject) -> None:
    """A series' forecasts do not depend on which other series are requested, nor on their
    order (a subset and the reversed list give the same rows)."""
    n, h = len(c.series), c.horizon
    full = _arrays(c.fit_predict(c.fresh()), n, h)
    for label, pick in (("reversed", np.arange(n)[::-1]), ("first two", np.arange(min(2, n))),
                        ("last alone", np.array([n - 1]))):
        out = _arrays(c.fit_predict(c.fresh(), series=c.series[pick]), len(pick), h)
        expected = {k: v[pick] for k, v in full.items()}
        problem = _differs(out, expected, exact=False)
        if problem:
            raise _CheckFailed(
                f"requesting the series {label} changed their forecasts: {problem}; row j "
                "must be series[j], forecast as if the other series were not asked for"
            )


def _snapshot(*things: Any) -> list[bytes]:
    out: list[bytes] = []
    for thing in things:
        if isinstance(thing, PanelHistory):
            for f in fields(thing):
                out.extend(_snapshot(getattr(thing, f.name)))
        elif isinstance(thing, dict):
            for k in sorted(thing):
                out.extend([k.encode(), *_snapshot(thing[k])])
        elif isinstance(thing, np.ndarray):
            out.append(thing.tobytes() + str(thing.shape).encode())
        else:
            out.append(repr(thing).encode())
    return out


@_panel_check
def check_no_input_mutation(c: PanelSubject) -> None:
    """`fit` and `predict` leave the history record, `series` and the covariates untouched."""
    m = c.fresh()
    history, series, future = c.inputs(m)
    before = _snapshot(history, series, future)
    m.fit(history)
    kwargs: dict[str, Any] = {"series": series}
    if future is not None:
        kwargs["covariates"] = future
    m.predict(c.horizon, **kwargs)
    if _snapshot(history, series, future) != before:
        raise _CheckFailed("fit or predict changed an array it was given (history, series or "
                           "covariates)")


@_panel_check
def check_picklable_unfitted(c: PanelSubject) -> None:
    """The unfitted forecaster survives pickling."""
    m = c.fresh()
    back = pickle.loads(pickle.dumps(m))
    a, b = _params(m), _params(back)
    bad = [k for k in a if not _same(a[k], b[k])]
    if bad:
        raise _CheckFailed(f"after pickling, parameter {bad[0]!r} differs")


@_panel_check
def check_picklable_fitted(c: PanelSubject) -> None:
    """The fitted one too, and forecasts the same afterwards."""
    m = c.fresh()
    history, series, future = c.inputs(m)
    m.fit(history)
    try:
        back = pickle.loads(pickle.dumps(m))
    except Exception as exc:
        raise _CheckFailed(
            f"the fitted forecaster cannot be pickled ({type(exc).__name__}: {exc})"
        ) from None
    n, h = len(series), c.horizon
    a = _arrays(_predict(m, series, series, future, h, ()), n, h)
    b = _arrays(_predict(back, series, series, future, h, ()), n, h)
    problem = _differs(a, b, exact=False)
    if problem:
        raise _CheckFailed(f"after pickling the fitted forecaster, {problem}")


@_panel_check
def check_deterministic(c: PanelSubject) -> None:
    """Two fresh fits on the same history forecast bit-identically."""
    n, h = len(c.series), c.horizon
    a = _arrays(c.fit_predict(c.fresh(), (80.0,)), n, h)
    b = _arrays(c.fit_predict(c.fresh(), (80.0,)), n, h)
    problem = _differs(a, b, exact=True)
    if problem:
        raise _CheckFailed(f"two fits on the same history: {problem}")


@_panel_check
def check_refit_independent(c: PanelSubject) -> None:
    """Fitting again on another history forgets the first fit."""
    m = c.fresh()
    other, _, _ = example_panel(n_series=4, length=30, season=c.history.season, seed=1,
                                covariates=c.history.covariates is not None)
    other = replace(other, values=other.values[::-1] * 3.0 + 50.0)
    m.fit(other if _receives_covariates(m) else _without_covariates(other))
    n, h = len(c.series), c.horizon
    again = _arrays(c.fit_predict(m), n, h)
    once = _arrays(c.fit_predict(c.fresh()), n, h)
    problem = _differs(again, once, exact=False)
    if problem:
        raise _CheckFailed(f"a second fit still depends on the first: {problem}")


@_panel_check
def check_short_series(c: PanelSubject) -> None:
    """A requested series with only 2 values costs at most its own row (forecast or NaN); the
    other rows stay finite."""
    h = c.history
    short = int(c.series[-1])  # keep its last 2 values (it still ends at the origin)
    lo, hi = int(h.offsets[short]), int(h.offsets[short + 1])
    keep = np.ones(len(h.values), dtype=bool)
    keep[lo : hi - 2] = False
    counts = np.diff(h.offsets)
    counts[short] = 2
    offsets = np.concatenate([[0], np.cumsum(counts)]).astype(np.int64)
    cov = None if h.covariates is None else h.covariates[keep]
    cut = replace(h, values=h.values[keep], positions=h.positions[keep],
                  times=h.times[keep], covariates=cov, offsets=offsets)
    subject = replace(c, history=cut)
    n = len(c.series)
    try:
        out = subject.fit_predict(c.fresh())
    except Exception as exc:
        raise _CheckFailed(
            f"a series of 2 values made the whole origin fail ({type(exc).__name__}: {exc}); "
            "return a NaN row for a series the model cannot forecast"
        ) from None
    try:
        fc = as_panel_forecast(out, n, c.horizon, ())
    except ValueError as exc:
        raise _CheckFailed(f"with a series of 2 values: {exc}") from None
    bad = np.flatnonzero(bad_rows(fc))
    others = [j for j in bad if c.series[j] != short]
    if others:
        raise _CheckFailed(
            f"a series of 2 values made the forecasts of series "
            f"{h.keys[c.series[others[0]]]!r} NaN or infinite"
        )


@_panel_check
def check_no_covariates(c: PanelSubject) -> None:
    """A forecaster given covariates also works on a dataset without any (skipped when the
    class says `uses_covariates = False`)."""
    m = c.fresh()
    if not _receives_covariates(m):
        raise _Skip("uses_covariates is False")
    if c.history.covariates is None:
        raise _Skip("the example history has no covariates")
    history = _without_covariates(_copy_history(c.history))
    out = m.fit(history)
    out = (m if out is None else out).predict(c.horizon, series=c.series.copy())
    try:
        fc = as_panel_forecast(out, len(c.series), c.horizon, ())
    except ValueError as exc:
        raise _CheckFailed(f"without covariates: {exc}") from None
    if bad_rows(fc).any():
        raise _CheckFailed("without covariates: NaN or infinite forecasts")


@_panel_check
def check_intervals_ordered(c: PanelSubject) -> None:
    """When intervals are returned: finite, lower <= point <= upper, and the 80% interval
    inside the 95% one."""
    out = c.fit_predict(c.fresh(), (80.0, 95.0))
    if not isinstance(out, PanelForecast) or not out.lower:
        raise _Skip("no intervals returned")
    fc = as_panel_forecast(out, len(c.series), c.horizon, (80.0, 95.0))
    point = fc.point
    tol = 1e-9 * max(1.0, float(np.max(np.abs(point))))
    for level in sorted(set(fc.lower) & set(fc.upper)):
        lo, hi = fc.lower[level], fc.upper[level]
        if not (np.all(np.isfinite(lo)) and np.all(np.isfinite(hi))):
            raise _CheckFailed(f"the {level:g}% bounds have NaN or infinite values")
        if np.any(lo > point + tol) or np.any(hi < point - tol):
            raise _CheckFailed(f"the {level:g}% interval does not contain the point forecast")
    if {80.0, 95.0} <= set(fc.lower) & set(fc.upper):
        if np.any(fc.lower[95.0] > fc.lower[80.0] + tol) or np.any(
            fc.upper[95.0] < fc.upper[80.0] - tol
        ):
            raise _CheckFailed("the 80% interval is not inside the 95% interval")


def _one_thread() -> Any:
    """Hold BLAS and OpenMP to one thread while the checks run, as castgrid's engines do for
    every fit: a model's threads on the small example data only wait on each other."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # optional: without it the libraries keep their own thread counts
        from contextlib import nullcontext

        return nullcontext()
    return threadpool_limits(1)


#: The names of the panel checks, in the order they run.
PANEL_CHECKS: tuple[str, ...] = tuple(_check_name(fn) for fn in _CHECK_FUNCTIONS)


class PanelCheckReport(CheckReport):
    """Every panel check's result for one forecaster."""

    def __str__(self) -> str:
        return str(super().__str__()).replace("check_forecaster:", "check_panel_forecaster:", 1)


def make_panel_subject(
    obj_or_factory: Any,
    *,
    params: dict[str, Any] | None = None,
    season: int = 4,
    horizon: int = 5,
    panel: tuple[PanelHistory, np.ndarray, np.ndarray | None] | None = None,
) -> PanelSubject:
    """The :class:`PanelSubject` of a panel forecaster instance, or of a class or factory and
    ``params``; ``panel`` is ``(history, series, future covariates)`` (default
    :func:`example_panel`)."""
    params = dict(params or {})
    history, series, future = panel if panel is not None else example_panel(
        season=season, horizon=horizon
    )
    if hasattr(obj_or_factory, "fit") and not inspect.isclass(obj_or_factory):
        template = obj_or_factory

        def fresh() -> Any:
            return clone(template)

        return PanelSubject(type(template).__name__, fresh, history, series, future, horizon,
                            None)
    factory: Callable[..., Any] = obj_or_factory

    def build() -> Any:
        return factory(**copy.deepcopy(params))

    label = getattr(factory, "__qualname__", repr(factory))
    return PanelSubject(label, build, history, series, future, horizon, params)


def check_panel_forecaster(
    obj_or_factory: Any,
    *,
    params: dict[str, Any] | None = None,
    season: int = 4,
    horizon: int = 5,
    panel: tuple[PanelHistory, np.ndarray, np.ndarray | None] | None = None,
    only: tuple[str, ...] | None = None,
    raise_on_failure: bool = False,
) -> CheckReport:
    """Run the panel conformance checks on a panel forecaster and report each by name.

    ``obj_or_factory`` is a forecaster instance, or a class or factory that builds one from
    ``params`` (keyword arguments). ``panel`` is ``(history, series, future covariates)`` to fit
    and forecast (default: :func:`example_panel` with ``season`` and ``horizon``; the future
    covariates need ``horizon`` steps). ``only`` runs just the named checks (names from
    :data:`PANEL_CHECKS`). With ``raise_on_failure`` an ``AssertionError`` lists the failed
    checks and why.
    """
    chosen = _chosen(_CHECK_FUNCTIONS, only)
    subject = make_panel_subject(obj_or_factory, params=params, season=season, horizon=horizon,
                                 panel=panel)
    with _one_thread():
        return _run_checks(PanelCheckReport(subject.label), chosen, subject,
                           "check_panel_forecaster", raise_on_failure)
