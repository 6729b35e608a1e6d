"""The per-series model tasks of a plan: one (dataset, series, forecaster, fold) each.

Vectorised forecasters (the benchmarks) are not tasks: they run over every fold of a dataset at
once, in the parent process. Derived candidates (combinations, selections) are not tasks either:
the scoring layer computes them from the other forecasters' forecasts. Recorded
candidates are read from their files (no task either). Panel forecasters (one fit per dataset
and origin) get their own tasks (:func:`runner.execution.panel_tasks.build_panel_tasks`); the
shared data built here carries what those index into.
"""

from __future__ import annotations

from runner.execution.panel_tasks import panel_layouts
from runner.execution.tasks import ModelTask, SharedData
from runner.forecasters.registry import is_derived, is_from_file, is_panel, is_vectorised
from runner.windows.plan import Plan


def build_model_tasks(plan: Plan) -> tuple[list[ModelTask], SharedData]:
    """The per-series model tasks of ``plan`` and the data they index."""
    tasks: list[ModelTask] = []
    for d, dp in enumerate(plan.datasets):
        for f in dp.forecasters:
            spec = plan.forecasters[f]
            if is_vectorised(spec) or is_derived(spec) or is_from_file(spec) or is_panel(spec):
                continue
            for t in range(dp.n_tasks):
                tasks.append(
                    ModelTask(
                        index=len(tasks), forecaster=f, dataset=d,
                        start=int(dp.starts[t]), end=int(dp.ends[t]),
                        test_start=int(dp.test_starts[t]), season=dp.panel.season,
                    )
                )
    shared = SharedData(
        values=[dp.panel.values for dp in plan.datasets],
        covariates=[dp.panel.covariates for dp in plan.datasets],
        forecasters=plan.forecasters,
        horizon=plan.config.horizon,
        levels=tuple(plan.config.intervals),
        panels=panel_layouts(plan),
    )
    return tasks, shared
