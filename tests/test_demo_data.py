"""The invented demo data (data/make_demo.py) and what the demo is meant to show with it.

The data are invented (the "Tallow & Rye" bakery); what is checked against the outside is the
kiosks' design: a seasonal random walk, for which the seasonal naive forecast is the best
forecast there is (Hyndman & Athanasopoulos, *Forecasting: Principles and Practice*, 3rd ed.,
section 5.2: seasonal naive is the forecast of a seasonal random walk), so on the kiosks'
segment no candidate may beat the reference, seasonal naive. That is the demo's segment where
the best candidate does not win.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import yaml

import runner

REPO = Path(__file__).resolve().parents[1]
DATA = REPO / "data" / "demo_shops.csv"


def test_the_generator_rewrites_the_committed_file_byte_for_byte():
    done = subprocess.run([sys.executable, str(REPO / "data" / "make_demo.py"), "--check"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stdout + done.stderr


def test_every_outlet_has_one_format():
    data = pd.read_csv(DATA)
    formats = data.groupby("shop")["format"].agg(["nunique", "first"])
    assert (formats["nunique"] == 1).all()
    assert formats["first"].value_counts().to_dict() == {"bakery": 24, "cafe": 6, "kiosk": 6,
                                                         "stall": 6}
    stalls = data[data["format"] == "stall"]
    assert (stalls["units"] == 0).mean() > 0.5  # months without trade: intermittent demand
    assert (data.loc[data["format"] != "stall", "units"] > 0).all()


def test_kiosks_are_a_seasonal_random_walk():
    """Year-on-year log changes of a kiosk are independent shocks: no autocorrelation at any
    lag up to two years, by the Ljung-Box test (statsmodels), and a mean near 0."""
    from statsmodels.stats.diagnostic import acorr_ljungbox

    data = pd.read_csv(DATA)
    for shop, g in data[data["format"] == "kiosk"].groupby("shop"):
        logs = np.log(g["units"].to_numpy(dtype=float))
        yoy = logs[12:] - logs[:-12]
        assert abs(yoy.mean()) < 3 * yoy.std(ddof=1) / np.sqrt(len(yoy)), shop
        p = acorr_ljungbox(yoy, lags=[6, 12, 24])["lb_pvalue"].to_numpy()
        assert (p > 0.01).all(), (shop, p)


def _kiosk_run(tmp_path: Path, formats: list[str], models: list[str] | None) -> pd.DataFrame:
    """The demo config on the outlets of ``formats`` only, with the named candidates (None:
    all of the demo's); the rows of the segment leaderboard by format."""
    data = pd.read_csv(DATA, dtype=str)
    data[data["format"].isin(formats)].to_csv(tmp_path / "k.csv", index=False)
    cfg = yaml.safe_load((REPO / "configs" / "demo.yaml").read_text())
    cfg["datasets"][0]["path"] = "k.csv"
    cfg["windows"]["first_origin"] = str(cfg["windows"]["first_origin"])
    if models is not None:
        cfg["models"] = [m for m in cfg["models"] if m["name"] in models]
    cfg["execution"] = {"jobs": 1, "cache": False}
    (tmp_path / "k.yaml").write_text(yaml.safe_dump(cfg, sort_keys=False))
    result = runner.run(tmp_path / "k.yaml", write=False)
    seg = result.segments
    return seg[seg["attribute"] == "format"]


def test_on_the_kiosks_the_demos_best_candidate_does_not_beat_seasonal_naive(tmp_path: Path):
    # arima-airline ranks first on the whole demo (results/demo/leaderboard.csv)
    seg = _kiosk_run(tmp_path, ["kiosk"], ["arima-airline"])
    kiosk = seg[seg["segment"] == "kiosk"].set_index("forecaster")
    assert kiosk.loc["seasonal_naive", "rank"] == 1
    assert kiosk.loc["arima-airline", "mase_rel"] > 1
    assert not kiosk.loc["arima-airline", "beats_reference"]


@pytest.mark.slow
def test_on_the_kiosks_and_stalls_no_candidate_of_the_demo_beats_seasonal_naive(tmp_path):
    seg = _kiosk_run(tmp_path, ["kiosk", "stall"], None)
    candidates = seg[seg["role"] == "candidate"]
    assert set(candidates["forecaster"]) == {"ets[trend=add,seasonal=add]",
                                             "ets[trend=null,seasonal=add]", "theta",
                                             "arima-airline"}
    assert not candidates["beats_reference"].any()
    kiosk = candidates[candidates["segment"] == "kiosk"]
    assert (kiosk["mase_rel"] > 1).all()
