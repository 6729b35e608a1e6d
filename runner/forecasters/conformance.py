"""Conformance checks for forecasters: does an object honour castgrid's forecaster protocol?

Plugin authors run :func:`check_forecaster` on their own classes; castgrid's tests run it on
every built-in forecaster. Each check is small, named and reported on its own::

    from runner.testing import check_forecaster
    report = check_forecaster(MyForecaster, params={"alpha": 0.2})
    print(report)                               # one line per check: pass / fail / skip
    check_forecaster(MyForecaster, raise_on_failure=True)   # AssertionError naming failures

The checks (``CHECKS``, in this order; each is a module-level ``check_<name>(subject)``
function, and ``check_forecaster(obj, only=(name,))`` runs one by itself):

``protocol``                  fit and predict exist and take the protocol's keywords
``init_stores_params``        ``__init__`` declares each parameter by name (no ``*args`` or
                              ``**kwargs``) and only stores it under the same name
``clone_equal_params``        rebuilding from the parameters read off ``__init__`` gives an
                              object with equal parameters
``fit_returns_self``          ``fit`` returns the forecaster itself
``fit_keeps_params``          ``fit`` does not change the parameters
``fitted_attributes_underscore``  state set by ``fit`` is in names ending with ``_``
``predict_shape``             ``predict(h)`` gives ``h`` finite values (for h = 1 and h = 5)
``no_input_mutation``         ``fit`` and ``predict`` leave the training array untouched
``picklable_unfitted``        the unfitted forecaster survives pickling
``picklable_fitted``          the fitted one too, and forecasts the same afterwards
``deterministic``             two fresh fits on the same data forecast bit-identically
``refit_independent``         fitting again on other data forgets the first fit
``too_short_series``          an empty series raises ``ValueError`` with a message; series of
                              1 or 2 values either forecast or raise ``ValueError``
``intervals_ordered``         when intervals are returned: finite, lower <= point <= upper,
                              and the 80% interval inside the 95% one
``covariates``                forecasters that receive covariates fit and predict with them
                              (skipped when the class says ``uses_covariates = False``)
"""

from __future__ import annotations

import copy
import inspect
import pickle
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from runner.forecasters.contract import Forecast, as_forecast, protocol_problem


@dataclass(frozen=True)
class CheckResult:
    """The outcome of one named check: ``status`` is ``pass``, ``fail`` or ``skip``."""

    name: str
    status: str
    message: str = ""


@dataclass
class CheckReport:
    """Every check's result for one forecaster."""

    forecaster: str
    checks: list[CheckResult] = field(default_factory=list)

    @property
    def passed(self) -> bool:
        """True when no check failed."""
        return not self.failed

    @property
    def failed(self) -> list[str]:
        """Names of the failed checks, in check order."""
        return [r.name for r in self.checks if r.status == "fail"]

    def result(self, name: str) -> CheckResult:
        """The result of the check called ``name``."""
        for r in self.checks:
            if r.name == name:
                return r
        raise KeyError(name)

    def __str__(self) -> str:
        lines = [f"check_forecaster: {self.forecaster}"]
        for r in self.checks:
            tail = f": {r.message}" if r.message else ""
            lines.append(f"  {r.status.upper():4} {r.name}{tail}")
        return "\n".join(lines)


class _CheckFailed(Exception):
    """A check's own assertion (as opposed to the forecaster raising)."""


class _Skip(Exception):
    """The check does not apply to this forecaster."""


def get_params(obj: Any) -> dict[str, Any]:
    """The parameters of ``obj``, read off its class's ``__init__`` signature.

    Raises ``TypeError`` when ``__init__`` takes ``*args`` or ``**kwargs`` (its parameters
    cannot then be known) and ``AttributeError`` when a parameter is not stored under its name.
    """
    sig = inspect.signature(type(obj).__init__)
    out: dict[str, Any] = {}
    for name, p in list(sig.parameters.items())[1:]:
        if p.kind in (p.VAR_POSITIONAL, p.VAR_KEYWORD):
            raise TypeError(
                f"{type(obj).__name__}.__init__ takes {'*' if p.kind is p.VAR_POSITIONAL else '**'}"
                f"{name}; declare each parameter by name"
            )
        out[name] = getattr(obj, name)
    return out


def clone(obj: Any) -> Any:
    """A fresh, unfitted copy of ``obj``: its class built again from :func:`get_params`."""
    return type(obj)(**copy.deepcopy(get_params(obj)))


def _same(a: Any, b: Any) -> bool:
    try:
        if isinstance(a, np.ndarray) or isinstance(b, np.ndarray):
            return bool(np.array_equal(a, b))
        return bool(a == b) and type(a) is type(b)
    except Exception:
        return a is b


def _params(obj: Any) -> dict[str, Any]:
    # get_params when the class declares its parameters; else its public attributes, so that one
    # broken constructor fails init_stores_params rather than every check that reads params.
    try:
        return get_params(obj)
    except (TypeError, AttributeError):
        return {k: v for k, v in vars(obj).items() if not k.startswith("_")}


def example_series(n: int = 48, season: int = 4, seed: int = 0) -> np.ndarray:
    """An invented positive series with trend, season and noise (seeded), for the checks."""
    rng = np.random.default_rng(seed)
    t = np.arange(n, dtype=float)
    return 20.0 + 0.3 * t + 2.0 * np.sin(2 * np.pi * t / season) + rng.normal(0, 0.5, n)


def _arrays(out: Any, horizon: int) -> dict[str, np.ndarray]:
    fc = as_forecast(out, horizon, ())
    arrays = {"point": np.asarray(fc.point, dtype=float)}
    for level in sorted(fc.lower):
        arrays[f"lower{level:g}"] = np.asarray(fc.lower[level], dtype=float)
    for level in sorted(fc.upper):
        arrays[f"upper{level:g}"] = np.asarray(fc.upper[level], dtype=float)
    return arrays


def _differs(a: dict[str, np.ndarray], b: dict[str, np.ndarray], exact: bool) -> str | None:
    if a.keys() != b.keys():
        return f"returned different parts ({sorted(a)} vs {sorted(b)})"
    for key in a:
        x, y = a[key], b[key]
        same = np.array_equal(x, y) if exact else np.allclose(x, y, rtol=1e-9, atol=1e-12)
        if not same:
            diff = float(np.nanmax(np.abs(x - y))) if x.shape == y.shape else float("nan")
            return f"{key} differs (largest difference {diff:.3g})"
    return None


def _receives_covariates(obj: Any) -> bool:
    # Built-ins say so; a plugin without the attribute always receives them (see registry).
    return bool(getattr(type(obj), "uses_covariates", True))


@dataclass
class Subject:
    """What every check looks at: how to build a fresh forecaster, and the data to fit."""

    label: str
    fresh: Callable[[], Any]
    y: np.ndarray
    season: int
    horizon: int
    #: the params passed to a class or factory (None when an instance was given)
    passed_values: dict[str, Any] | None

    def fit_predict(self, m: Any, data: np.ndarray, levels: tuple[float, ...] = ()) -> Any:
        """Fit ``m`` on ``data`` and forecast ``horizon`` steps."""
        out = m.fit(data, season=self.season)
        return (m if out is None else out).predict(self.horizon, levels=levels)


#: The checks in the order they run; each is a module-level function taking a :class:`Subject`
#: and raising to fail. :data:`CHECKS` (their names) is derived from this list.
_CHECK_FUNCTIONS: list[Callable[[Subject], None]] = []


def _conformance_check(fn: Callable[[Subject], None]) -> Callable[[Subject], None]:
    _CHECK_FUNCTIONS.append(fn)
    return fn


def _check_name(fn: Callable[..., None]) -> str:
    return fn.__name__.removeprefix("check_")


@_conformance_check
def check_protocol(c: Subject) -> None:
    """Fit and predict exist and take the protocol's keywords."""
    problem = protocol_problem(c.fresh())
    if problem:
        raise _CheckFailed(problem)


@_conformance_check
def check_init_stores_params(c: Subject) -> None:
    """`__init__` declares each parameter by name (no `*args` or `**kwargs`) and only stores it
    under the same name."""
    obj = c.fresh()
    sig = inspect.signature(type(obj).__init__)
    names = []
    for name, p in list(sig.parameters.items())[1:]:
        if p.kind in (p.VAR_POSITIONAL, p.VAR_KEYWORD):
            star = "*" if p.kind is p.VAR_POSITIONAL else "**"
            raise _CheckFailed(f"__init__ takes {star}{name}; declare each parameter by name")
        names.append(name)
        if not hasattr(obj, name):
            raise _CheckFailed(f"parameter {name!r} is not stored as attribute {name!r}")
        if c.passed_values is not None:
            expected = c.passed_values.get(name, p.default)
            if expected is not inspect.Parameter.empty and not _same(
                getattr(obj, name), expected
            ):
                raise _CheckFailed(
                    f"parameter {name!r} was given {expected!r} but stored "
                    f"{getattr(obj, name)!r}; __init__ must store it unchanged"
                )
    state = vars(obj) if hasattr(obj, "__dict__") else {}
    fitted = sorted(k for k in state if k.endswith("_") and not k.startswith("__"))
    if fitted:
        raise _CheckFailed(f"__init__ sets fitted attributes {fitted}; only fit should")
    extra = sorted(k for k in state if not k.startswith("_") and k not in names)
    if extra:
        raise _CheckFailed(f"__init__ sets attributes that are not parameters: {extra}")


@_conformance_check
def check_clone_equal_params(c: Subject) -> None:
    """Rebuilding from the parameters read off `__init__` gives an object with equal parameters."""
    obj = c.fresh()
    other = clone(obj)
    if other is obj or type(other) is not type(obj):
        raise _CheckFailed("clone did not build a new object of the same class")
    a, b = get_params(obj), get_params(other)
    bad = [k for k in a if not _same(a[k], b[k])]
    if bad:
        raise _CheckFailed(f"rebuilt from its parameters, {bad[0]!r} differs")


@_conformance_check
def check_fit_returns_self(c: Subject) -> None:
    """`fit` returns the forecaster itself."""
    m = c.fresh()
    out = m.fit(c.y.copy(), season=c.season)
    if out is not m:
        raise _CheckFailed(f"fit returned {type(out).__name__}, expected the forecaster itself")


@_conformance_check
def check_fit_keeps_params(c: Subject) -> None:
    """`fit` does not change the parameters."""
    m = c.fresh()
    before = copy.deepcopy(_params(m))
    m.fit(c.y.copy(), season=c.season)
    after = _params(m)
    bad = [k for k in before if not _same(before[k], after[k])]
    if bad:
        raise _CheckFailed(f"fit changed parameter {bad[0]!r}; keep fitted state in name_")


@_conformance_check
def check_fitted_attributes_underscore(c: Subject) -> None:
    """State set by `fit` is in names ending with `_`."""
    m = c.fresh()
    before = set(vars(m)) if hasattr(m, "__dict__") else set()
    m.fit(c.y.copy(), season=c.season)
    new = set(vars(m)) - before if hasattr(m, "__dict__") else set()
    bad = sorted(k for k in new if not k.endswith("_") and not k.startswith("_"))
    if bad:
        raise _CheckFailed(f"fit set attributes {bad} whose names do not end with '_'")


@_conformance_check
def check_predict_shape(c: Subject) -> None:
    """`predict(h)` gives `h` finite values (for h = 1 and h = 5)."""
    for steps in (1, c.horizon):
        m = c.fresh()
        m.fit(c.y.copy(), season=c.season)
        out = m.predict(steps)
        try:
            as_forecast(out, steps, ())
        except ValueError as exc:
            raise _CheckFailed(f"predict({steps}): {exc}") from None


@_conformance_check
def check_no_input_mutation(c: Subject) -> None:
    """`fit` and `predict` leave the training array untouched."""
    data = c.y.copy()
    m = c.fresh()
    m.fit(data, season=c.season)
    m.predict(c.horizon)
    if not np.array_equal(data, c.y):
        raise _CheckFailed("fit or predict changed the training array passed in")


@_conformance_check
def check_picklable_unfitted(c: Subject) -> None:
    """The unfitted forecaster survives pickling."""
    m = c.fresh()
    back = pickle.loads(pickle.dumps(m))
    a, b = _params(m), _params(back)
    bad = [k for k in a if not _same(a[k], b[k])]
    if bad:
        raise _CheckFailed(f"after pickling, parameter {bad[0]!r} differs")


@_conformance_check
def check_picklable_fitted(c: Subject) -> None:
    """The fitted one too, and forecasts the same afterwards."""
    m = c.fresh()
    m.fit(c.y.copy(), season=c.season)
    back = pickle.loads(pickle.dumps(m))
    h = c.horizon
    problem = _differs(_arrays(m.predict(h), h), _arrays(back.predict(h), h), exact=False)
    if problem:
        raise _CheckFailed(f"after pickling the fitted forecaster, {problem}")


@_conformance_check
def check_deterministic(c: Subject) -> None:
    """Two fresh fits on the same data forecast bit-identically."""
    a = _arrays(c.fit_predict(c.fresh(), c.y.copy(), (80.0,)), c.horizon)
    b = _arrays(c.fit_predict(c.fresh(), c.y.copy(), (80.0,)), c.horizon)
    problem = _differs(a, b, exact=True)
    if problem:
        raise _CheckFailed(f"two fits on the same data: {problem}")


@_conformance_check
def check_refit_independent(c: Subject) -> None:
    """Fitting again on other data forgets the first fit."""
    other = example_series(n=c.y.shape[0], season=c.season, seed=1)[::-1] * 1.5
    m = c.fresh()
    m.fit(other, season=c.season)
    again = _arrays(c.fit_predict(m, c.y.copy()), c.horizon)
    once = _arrays(c.fit_predict(c.fresh(), c.y.copy()), c.horizon)
    problem = _differs(again, once, exact=False)
    if problem:
        raise _CheckFailed(f"a second fit still depends on the first: {problem}")


@_conformance_check
def check_too_short_series(c: Subject) -> None:
    """An empty series raises `ValueError` with a message; series of 1 or 2 values either
    forecast or raise `ValueError`."""
    try:
        c.fresh().fit(np.empty(0), season=c.season)
    except ValueError as exc:
        if not str(exc).strip():
            raise _CheckFailed("an empty series raised ValueError without a message") from None
    except Exception as exc:
        raise _CheckFailed(
            f"an empty series raised {type(exc).__name__} ({exc}); expected ValueError "
            "with a message"
        ) from None
    else:
        raise _CheckFailed("an empty series was accepted; expected a ValueError")
    for n in (1, 2):
        try:
            out = c.fit_predict(c.fresh(), c.y[:n].copy())
        except ValueError as exc:
            if not str(exc).strip():
                raise _CheckFailed(f"{n} value(s): ValueError without a message") from None
            continue
        except Exception as exc:
            raise _CheckFailed(
                f"{n} value(s) raised {type(exc).__name__} ({exc}); expected a forecast or "
                "a ValueError saying the series is too short"
            ) from None
        try:
            as_forecast(out, c.horizon, ())
        except ValueError as exc:
            raise _CheckFailed(f"{n} value(s): {exc}; expected a ValueError instead") from None


@_conformance_check
def check_intervals_ordered(c: Subject) -> None:
    """When intervals are returned: finite, lower <= point <= upper, and the 80% interval
    inside the 95% one."""
    out = c.fit_predict(c.fresh(), c.y.copy(), (80.0, 95.0))
    if not isinstance(out, Forecast) or not out.lower:
        raise _Skip("no intervals returned")
    fc = as_forecast(out, c.horizon, (80.0, 95.0))
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


@_conformance_check
def check_covariates(c: Subject) -> None:
    """Forecasters that receive covariates fit and predict with them (skipped when the class
    says `uses_covariates = False`)."""
    m = c.fresh()
    if not _receives_covariates(m):
        raise _Skip("uses_covariates is False")
    n = c.y.shape[0]
    rng = np.random.default_rng(2)
    x = rng.normal(size=(n + c.horizon, 1))
    data = c.y + 1.5 * x[:n, 0]
    x_train, x_test = x[:n].copy(), x[n:].copy()
    out = m.fit(data, season=c.season, covariates=x_train)
    out = (m if out is None else out).predict(c.horizon, covariates=x_test)
    try:
        as_forecast(out, c.horizon, ())
    except ValueError as exc:
        raise _CheckFailed(f"with covariates: {exc}") from None
    if not (np.array_equal(x_train, x[:n]) and np.array_equal(x_test, x[n:])):
        raise _CheckFailed("fit or predict changed the covariate arrays passed in")


#: The names of the checks, in the order they run.
CHECKS: tuple[str, ...] = tuple(_check_name(fn) for fn in _CHECK_FUNCTIONS)


def _run_one(report: CheckReport, fn: Callable[[Any], None], subject: Any) -> None:
    name = _check_name(fn)
    try:
        fn(subject)
    except _Skip as exc:
        report.checks.append(CheckResult(name, "skip", str(exc)))
    except _CheckFailed as exc:
        report.checks.append(CheckResult(name, "fail", str(exc)))
    except Exception as exc:
        report.checks.append(CheckResult(name, "fail", f"raised {type(exc).__name__}: {exc}"))
    else:
        report.checks.append(CheckResult(name, "pass"))


def make_subject(
    obj_or_factory: Any,
    *,
    params: dict[str, Any] | None = None,
    season: int = 4,
    horizon: int = 5,
    y: np.ndarray | None = None,
) -> Subject:
    """The :class:`Subject` of a forecaster instance, or of a class or factory and ``params``."""
    params = dict(params or {})
    if hasattr(obj_or_factory, "fit") and not inspect.isclass(obj_or_factory):
        template = obj_or_factory

        def fresh() -> Any:
            return clone(template)

        return Subject(type(template).__name__, fresh, _training(y, season), season, horizon, None)
    factory: Callable[..., Any] = obj_or_factory

    def build() -> Any:
        return factory(**copy.deepcopy(params))

    label = getattr(factory, "__qualname__", repr(factory))
    return Subject(label, build, _training(y, season), season, horizon, params)


def _training(y: np.ndarray | None, season: int) -> np.ndarray:
    return example_series(season=season) if y is None else np.asarray(y, dtype=float)


def check_forecaster(
    obj_or_factory: Any,
    *,
    params: dict[str, Any] | None = None,
    season: int = 4,
    horizon: int = 5,
    y: np.ndarray | None = None,
    only: tuple[str, ...] | None = None,
    raise_on_failure: bool = False,
) -> CheckReport:
    """Run the conformance checks on a forecaster and report each by name.

    ``obj_or_factory`` is a forecaster instance, or a class or factory that builds one from
    ``params`` (keyword arguments). ``y`` is the training series (default: an invented seeded
    series of 48 positive values with season ``season``). ``only`` runs just the named checks
    (names from :data:`CHECKS`). With ``raise_on_failure`` an ``AssertionError`` lists the
    failed checks and why.

    >>> from runner.forecasters.models.theta import Theta
    >>> check_forecaster(Theta, params={"deseasonalize": False}).passed
    True
    """
    chosen = _chosen(_CHECK_FUNCTIONS, only)
    subject = make_subject(obj_or_factory, params=params, season=season, horizon=horizon, y=y)
    return _run_checks(CheckReport(subject.label), chosen, subject, "check_forecaster",
                       raise_on_failure)


def _chosen(functions: Sequence[Callable[..., None]], only: tuple[str, ...] | None
            ) -> list[Callable[..., None]]:
    """The check functions that ``only`` names (all when None); an unknown name is an error."""
    names = tuple(_check_name(fn) for fn in functions)
    unknown = sorted(set(only or ()) - set(names))
    if unknown:
        raise ValueError(f"only: unknown check {unknown[0]!r}; expected some of {names}")
    return [fn for fn in functions if only is None or _check_name(fn) in only]


def _run_checks(report: CheckReport, chosen: list[Callable[..., None]], subject: Any,
                title: str, raise_on_failure: bool) -> CheckReport:
    """Build the subject's forecaster, run ``chosen`` on it into ``report`` (every check fails
    when the forecaster cannot be built) and, with ``raise_on_failure``, raise an
    ``AssertionError`` naming ``title`` and every failed check."""
    try:
        subject.fresh()
    except Exception as exc:
        msg = f"building the forecaster raised {type(exc).__name__}: {exc}"
        report.checks = [CheckResult(_check_name(fn), "fail", msg) for fn in chosen]
    else:
        for fn in chosen:
            _run_one(report, fn, subject)
    if raise_on_failure and report.failed:
        details = "; ".join(f"{r.name} ({r.message})" for r in report.checks if r.status == "fail")
        raise AssertionError(
            f"{title}({subject.label}): failed checks: {', '.join(report.failed)} "
            f"-- {details}"
        )
    return report


class RecordingForecaster:
    """A ready fake for tests: forecasts the last training value and records what it was given.

    After ``fit`` and ``predict``, ``info_`` holds the training values (``seen_y``), the training
    covariates (``seen_covariates``) and the forecast-period covariates (``seen_future``) as
    lists, so a test can run it through :func:`runner.execution.tasks.run_model_task` (entry
    ``runner.forecasters.conformance:RecordingForecaster``) and read from the outcome exactly what
    a forecaster saw. ``uses_covariates`` is True so it receives the dataset's covariates.
    """

    version = "1"
    uses_covariates = True

    def __init__(self, offset: float = 0.0) -> None:
        self.offset = offset

    def fit(
        self, y: np.ndarray, *, season: int, covariates: np.ndarray | None = None
    ) -> RecordingForecaster:
        """Remember ``y`` and ``covariates``; the forecast is the last value plus ``offset``."""
        y = np.asarray(y, dtype=float)
        if y.shape[0] == 0:
            raise ValueError("RecordingForecaster: the training series is empty")
        self.last_ = float(y[-1])
        self.info_: dict[str, Any] = {
            "seen_y": y.tolist(),
            "seen_season": int(season),
            "seen_covariates": None if covariates is None else np.asarray(covariates).tolist(),
        }
        return self

    def predict(
        self,
        horizon: int,
        *,
        covariates: np.ndarray | None = None,
        levels: tuple[float, ...] = (),
    ) -> np.ndarray:
        """``horizon`` copies of the last value plus ``offset``; records ``covariates``."""
        self.info_["seen_future"] = None if covariates is None else np.asarray(covariates).tolist()
        return np.full(horizon, self.last_ + float(self.offset))
