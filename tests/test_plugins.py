"""Plugin and parameter validation before a run
(runner.forecasters.validation.validate_forecasters), and per-task failures of plugins that
misbehave only when run."""

from __future__ import annotations

import itertools
import textwrap
from pathlib import Path

import numpy as np
import pytest

from runner.config import ForecasterSpec, parse_config
from runner.errors import ConfigError, PluginError
from runner.execution.tasks import ModelTask, SharedData, run_model_task
from runner.forecasters.validation import protocol_problem, validate_forecasters

EXAMPLES = Path(__file__).resolve().parent.parent / "examples" / "plugins"
CONFIGS = Path(__file__).resolve().parent.parent / "configs"
_counter = itertools.count()


def config(models, baselines=None):
    data = {
        "experiment": "plugin-check",
        "horizon": 3,
        "datasets": [{"name": "d", "path": "d.csv", "time": "t", "series": "s", "target": "v"}],
        "windows": {"train": 10},
        "models": models,
    }
    if baselines is not None:
        data["baselines"] = baselines
    return parse_config(data, "exp.yaml")


@pytest.fixture
def plugin_module(tmp_path, monkeypatch):
    """Write a throw-away plugin module and return its importable name."""
    monkeypatch.syspath_prepend(str(tmp_path))

    def write(source: str) -> str:
        name = f"cg_test_plugin_{next(_counter)}"
        (tmp_path / f"{name}.py").write_text(textwrap.dedent(source))
        return name

    return write


GOOD = """
    import numpy as np

    class LastValue:
        def __init__(self, shift: float = 0.0):
            if not isinstance(shift, (int, float)):
                raise ValueError(f"shift: expected a number, got {shift!r}")
            self.shift = shift

        def fit(self, y, *, season, covariates=None):
            self.last_ = float(y[-1]) + self.shift
            return self

        def predict(self, horizon, *, covariates=None, levels=()):
            return np.full(horizon, self.last_)

    class NoPredict:
        def fit(self, y, *, season, covariates=None):
            return self

    class NoSeasonKeyword(LastValue):
        def fit(self, y, covariates=None):
            return self

    class Exploding:
        def __init__(self):
            raise RuntimeError("licence server unreachable")

    def make_last_value(shift=0.0):
        return LastValue(shift)

    def make_nothing():
        return object()

    class WrongShape(LastValue):
        def predict(self, horizon, *, covariates=None, levels=()):
            return np.zeros((horizon, 2))

    class InfForecast(LastValue):
        def predict(self, horizon, *, covariates=None, levels=()):
            return np.full(horizon, np.inf)
"""


def test_a_valid_config_passes(plugin_module):
    mod = plugin_module(GOOD)
    cfg = config(
        [
            {"name": "a", "kind": "arima", "params": {"order": [0, 1, 1]}},
            {"name": "e", "kind": "ets", "grid": {"trend": ["add", None], "damped": [False]}},
            {"name": "t", "kind": "theta", "params": {"deseasonalize": False}},
            {"name": "aa", "kind": "arima_search", "params": {"p_up_to": 2}},
            {"name": "p", "kind": "plugin", "entry": f"{mod}:LastValue", "params": {"shift": 1}},
            {"name": "f", "kind": "plugin", "entry": f"{mod}:make_last_value"},
        ]
    )
    validate_forecasters(cfg, "exp.yaml")  # no error


def test_unimportable_module_is_a_plugin_error():
    cfg = config([{"name": "p", "kind": "plugin", "entry": "no_such_pkg_xyz.mod:Thing"}])
    with pytest.raises(PluginError) as exc:
        validate_forecasters(cfg, "exp.yaml")
    msg = str(exc.value)
    assert msg.startswith("exp.yaml: models[0].entry: ")
    assert "cannot import module 'no_such_pkg_xyz.mod'" in msg


def test_missing_attribute_is_a_plugin_error(plugin_module):
    mod = plugin_module(GOOD)
    cfg = config([{"name": "p", "kind": "plugin", "entry": f"{mod}:Missing"}])
    with pytest.raises(PluginError, match=r"models\[0\]\.entry: .* has no attribute 'Missing'"):
        validate_forecasters(cfg, "exp.yaml")


@pytest.mark.parametrize(
    "attr, message",
    [
        ("NoPredict", "has no predict method"),
        ("NoSeasonKeyword", "fit does not accept the keyword 'season'"),
        ("make_nothing", "has no fit method"),
        ("Exploding", "raised RuntimeError: licence server unreachable"),
    ],
)
def test_protocol_breaks_are_caught_before_the_run(plugin_module, attr, message):
    mod = plugin_module(GOOD)
    cfg = config(
        [
            {"name": "ok", "kind": "theta"},
            {"name": "p", "kind": "plugin", "entry": f"{mod}:{attr}"},
        ]
    )
    with pytest.raises(PluginError) as exc:
        validate_forecasters(cfg, "exp.yaml")
    assert str(exc.value).startswith("exp.yaml: models[1].entry: ")
    assert message in str(exc.value)
    assert "\n" not in str(exc.value)


@pytest.mark.parametrize(
    "model, message",
    [
        (
            {"name": "a", "kind": "arima", "params": {"order": [1, 1]}},
            "exp.yaml: models[0].params.order: expected 3 non-negative integers, got [1, 1]",
        ),
        (
            {"name": "a", "kind": "arima", "params": {"odrer": [1, 1, 1]}},
            "exp.yaml: models[0].params.odrer: unknown parameter of arima a (expected order, "
            "seasonal_order, trend, maxiter)",
        ),
        (
            {"name": "e", "kind": "ets", "grid": {"trend": ["add", "additive"]}},
            'exp.yaml: models[0].grid.trend: expected one of null, add, mul, got "additive"',
        ),
        (
            {"name": "e", "kind": "ets", "params": {"damped": True}},
            "exp.yaml: models[0].params.damped: true needs a trend (add or mul)",
        ),
        (
            {"name": "t", "kind": "theta", "grid": {"theta": [2, 0.5]}},
            "exp.yaml: models[0].grid.theta: expected a number >= 1, got 0.5",
        ),
    ],
)
def test_bad_params_are_config_errors_naming_the_field(model, message):
    cfg = config([model])
    with pytest.raises(ConfigError) as exc:
        validate_forecasters(cfg, "exp.yaml")
    assert str(exc.value) == message


def test_bad_plugin_params_name_the_field(plugin_module):
    mod = plugin_module(GOOD)
    cfg = config(
        [
            {"name": "ok", "kind": "arima"},
            {"name": "p", "kind": "plugin", "entry": f"{mod}:LastValue", "params": {"shift": "x"}},
        ]
    )
    with pytest.raises(ConfigError) as exc:
        validate_forecasters(cfg, "exp.yaml")
    assert str(exc.value) == "exp.yaml: models[1].params.shift: expected a number, got 'x'"
    cfg = config(
        [{"name": "p", "kind": "plugin", "entry": f"{mod}:LastValue", "params": {"scale": 2}}]
    )
    with pytest.raises(ConfigError, match=r"models\[0\]\.params\.scale: unknown parameter"):
        validate_forecasters(cfg, "exp.yaml")


def test_bad_baseline_params_name_the_baseline():
    cfg = config([], baselines=["naive", {"moving_average": {"size": 0}}])
    with pytest.raises(ConfigError) as exc:
        validate_forecasters(cfg, "exp.yaml")
    assert str(exc.value).startswith("exp.yaml: baselines[1].moving_average.size: ")


def test_protocol_problem_reads_signatures_without_calling():
    class Lenient:
        def fit(self, *args, **kwargs):
            raise AssertionError("must not be called")

        def predict(self, *args, **kwargs):
            raise AssertionError("must not be called")

    class NoHorizon:
        def fit(self, y, *, season, covariates=None):
            return self

        def predict(self, *, covariates=None, levels=()):
            return None

    assert protocol_problem(Lenient()) is None
    assert "predict takes no positional argument for horizon" in protocol_problem(NoHorizon())


# ------------------------------------------------------------------ failures seen only when run


def _run_plugin(entry: str):
    spec = ForecasterSpec(name="p[x]", kind="plugin", role="candidate", params={}, entry=entry)
    values = np.log(np.arange(2.0, 40.0))
    shared = SharedData(
        values=[values], covariates=[None], forecasters=[spec], horizon=3, levels=()
    )
    task = ModelTask(index=7, forecaster=0, dataset=0, start=0, end=30, test_start=30, season=1)
    return run_model_task(task, shared)


@pytest.mark.parametrize(
    "attr, reason, message",
    [
        ("WrongShape", "invalid-output", "predict returned shape (3, 2), expected (3,)"),
        ("InfForecast", "invalid-output", "NaN or infinite"),
    ],
)
def test_bad_output_is_a_recorded_task_failure(plugin_module, attr, reason, message):
    mod = plugin_module(GOOD)
    out = _run_plugin(f"{mod}:{attr}")
    assert out.index == 7 and not out.ok
    assert out.reason == reason
    assert message in out.message


# ------------------------------------------------------------------ the shipped example


def test_the_example_plugin_passes_the_conformance_checks(monkeypatch):
    monkeypatch.syspath_prepend(str(EXAMPLES))
    from median_slope import MedianSlope

    from runner.testing import check_forecaster

    check_forecaster(MedianSlope, params={"window": 6}, raise_on_failure=True)


def test_the_example_config_validates(monkeypatch):
    from runner.config import load_config

    monkeypatch.syspath_prepend(str(EXAMPLES))
    path = CONFIGS / "plugin-example.yaml"
    validate_forecasters(load_config(path), path)
