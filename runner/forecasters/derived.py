"""Derived candidates: forecasts computed from other forecasters' forecasts of the same run.

Two kinds, listed under ``models:`` like any candidate:

- ``combination`` (:class:`Combination`): the mean or median of listed forecasters' forecasts;
- ``best_so_far`` (:class:`BestSoFar`): per series and fold, the listed forecaster that scored
  best on that series at earlier folds only.

Neither fits anything: no model task is built for them, they have no ``fit`` / ``predict`` and
are not conformance-checked. :mod:`runner.scoring.derived` computes them once every forecast of
a dataset is known, so adding one to a config whose forecasts are cached computes no forecast.
This module declares them (parameters and ``version``, which the manifest's forecaster identity
reads) and checks how a config uses them (:func:`derived_problem`).

Order: a combination combines forecasters that forecast (baselines, models, plugins); a
``best_so_far`` chooses among those and combinations. Combinations are therefore computed first
(:data:`COMPUTE_ORDER`), and no derived candidate ever depends on one computed after it.
"""

from __future__ import annotations

from typing import Any

from runner.config import ForecasterSpec
from runner.forecasters.registry import is_derived

#: How a combination pools its components' forecasts, step by step.
HOW = ("mean", "median")
#: The order derived kinds are computed in: each may use the kinds before it.
COMPUTE_ORDER = ("combination", "best_so_far")
#: Which derived kinds each derived kind may name as a component.
MAY_USE = {"combination": (), "best_so_far": ("combination",)}


class Combination:
    """The mean or the median, step by step, of listed forecasters' point forecasts.

    Bates & Granger (1969), "The combination of forecasts", Operational Research Quarterly
    20(4): a combination of forecasts can be more accurate than each of them. In the M4
    competition, combinations of simple methods ranked near the top (Makridakis, Spiliotis &
    Assimakopoulos 2020, "The M4 Competition: 100,000 time series and 61 forecasting methods",
    IJF 36(1)). Equal weights, as in those combinations: no weight is estimated, so nothing is
    fitted and nothing can leak from the test block.

    Parameters
    ----------
    of:
        Names of at least two forecasters of the run (baselines or candidates, after grid
        expansion, such as ``ets[trend=add]``), none of them derived.
    how:
        ``mean`` or ``median`` of the components' forecasts at each step.

    A task (series, fold) where any component failed is a failed task of the combination
    (reason ``component-failed``, naming the component). The combination has no prediction
    interval: an interval for the mean of forecasts needs the joint distribution of the
    components' errors (they are correlated, so averaging the bounds gives no stated
    coverage), and the median of forecasts has none either.
    """

    version = "1"
    uses_covariates = False

    def __init__(self, of: list[str], how: str = "mean") -> None:
        self.of = of
        self.how = how


class BestSoFar:
    """Per series and fold, the forecast of the listed forecaster that did best on that series at
    earlier folds only: an honest estimate of what choosing a model per series earns.

    At a fold (origin), the history of a series is its earlier folds whose whole test block lies
    before this origin (with ``step >= horizon`` and no ``gap``, every earlier fold). A listed
    forecaster that failed on any fold of that history is not eligible. Among the eligible ones,
    castgrid takes the lowest mean of the run's rank metric (in its direction: ``abs`` metrics
    by absolute value) over the history folds where every eligible forecaster has a defined
    score; a tie goes to the forecaster listed first in ``among``. With no history, no eligible
    forecaster or no such fold, it uses ``fallback``. The choice never looks at the fold being
    scored, so the score is what the rule would have earned when the choices were made, without
    the optimism of choosing on the folds it is judged on.

    Parameters
    ----------
    among:
        Names of at least two forecasters of the run to choose from (baselines, candidates
        after grid expansion, or combinations).
    fallback:
        The forecaster used where there is nothing to choose from (a name as in ``among``, not
        necessarily one of them); default the dataset's reference baseline.

    Where the chosen forecaster failed at the fold scored, the task fails (reason
    ``component-failed``). No prediction interval: the intervals of different forecasters,
    switched from series to series on past scores, have no stated joint coverage, so castgrid
    reports none rather than an interval it cannot vouch for.
    """

    version = "1"
    uses_covariates = False

    def __init__(self, among: list[str], fallback: str | None = None) -> None:
        self.among = among
        self.fallback = fallback


#: The parameter of each derived kind that lists its components.
COMPONENTS_PARAM = {"combination": "of", "best_so_far": "among"}


def components(spec: ForecasterSpec) -> list[str]:
    """The forecasters a derived candidate is computed from (its fallback not included)."""
    return list(spec.params[COMPONENTS_PARAM[spec.kind]])


def _name_problem(
    name: Any, kind: str, by_name: dict[str, ForecasterSpec], derived: set[str]
) -> str | None:
    if not isinstance(name, str):
        return f"expected a forecaster name, got {name!r}"
    spec = by_name.get(name)
    allowed = MAY_USE[kind]
    if spec is None:
        usable = [n for n, s in by_name.items() if n not in derived or s.kind in allowed]
        return (f"{name!r} is not a forecaster of this run; expected one of "
                f"{', '.join(usable)}")
    if name in derived and spec.kind not in allowed:
        can = "forecasters that forecast" + (
            f" or a {' or '.join(allowed)}" if allowed else "")
        return f"{name!r} is itself a {spec.kind}; a {kind} uses {can}"
    return None


def _names_problem(value: Any, kind: str, by_name: dict[str, ForecasterSpec],
                   derived: set[str]) -> str | None:
    if not isinstance(value, list):
        return f"expected a list of at least two forecaster names, got {value!r}"
    if len(value) < 2:
        return f"expected at least two forecaster names, got {value!r}"
    for name in value:
        problem = _name_problem(name, kind, by_name, derived)
        if problem is not None:
            return problem
    twice = sorted({n for n in value if value.count(n) > 1})
    if twice:
        return f"{twice[0]!r} is listed twice"
    return None


def derived_problem(spec: ForecasterSpec, specs: list[ForecasterSpec]) -> tuple[str, str] | None:
    """``(param, message)`` when the derived candidate ``spec`` cannot be computed from the
    forecasters ``specs`` of the run; None when it can.

    Checks that every component named is a forecaster of the run (after grid expansion) of a
    kind it may use, listed once, and that the other parameters have allowed values. Unknown
    parameters are rejected before, from the class signature.
    """
    by_name = {s.name: s for s in specs}
    derived = {s.name for s in specs if is_derived(s)}
    param = COMPONENTS_PARAM[spec.kind]
    if param not in spec.params:
        return param, "required: a list of at least two forecaster names of this run"
    problem = _names_problem(spec.params[param], spec.kind, by_name, derived)
    if problem is not None:
        return param, problem
    if spec.kind == "combination":
        how = spec.params.get("how", "mean")
        if how not in HOW:
            return "how", f"expected {' or '.join(HOW)}, got {how!r}"
    else:
        fallback = spec.params.get("fallback")
        if fallback is not None:
            problem = _name_problem(fallback, spec.kind, by_name, derived)
            if problem is not None:
                return "fallback", problem
    return None
