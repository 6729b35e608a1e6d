"""Plots whose data did not change are copied from the previous report, not drawn again.

The results folders are the synthetic ones of test_report.py (invented numbers), and one small
run of castgrid on invented series; the PNG text chunks are read back with pillow, an
independent PNG decoder.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from test_report import FORECASTERS, make_results

import runner
from runner.report import page
from runner.report.plots import Sketch
from runner.report.reuse import KEY_FIELD, NOTES_FIELD, png_text


@pytest.fixture
def draws(monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """The titles of the plots drawn (each call of Sketch.draw), in order. Runs draw in this
    process here (no painter process), where the calls can be counted."""
    from runner.report import painter

    monkeypatch.setattr(painter, "can_paint_aside", lambda: False)
    seen: list[str] = []
    original = Sketch.draw

    def counted(self: Sketch) -> object:
        drawn = original(self)
        seen.append(drawn.figure.axes[0].get_title() or drawn.figure.axes[0].get_title("left"))
        return drawn

    monkeypatch.setattr(Sketch, "draw", counted)
    return seen


def test_rebuilding_an_unchanged_report_draws_nothing(tmp_path: Path, draws: list[str]) -> None:
    out = make_results(tmp_path / "r")
    page.build_report(out)
    assert len(draws) == 5  # horizon, folds, forecasts, skill, history
    first = {p.name: p.read_bytes() for p in (out / "plots").glob("*.png")}
    html = (out / "report.html").read_text()
    draws.clear()
    page.build_report(out)
    assert draws == []
    assert {p.name: p.read_bytes() for p in (out / "plots").glob("*.png")} == first
    assert (out / "report.html").read_text() == html  # notes came back with the PNGs


def test_a_changed_input_redraws_that_plot_only(tmp_path: Path, draws: list[str]) -> None:
    out = make_results(tmp_path / "r")
    page.build_report(out)
    draws.clear()
    horizon = pd.read_csv(out / "horizon.csv")
    horizon.loc[horizon["forecaster"] == "naive", "mase"] *= 1.5
    horizon.to_csv(out / "horizon.csv", index=False)
    page.build_report(out)
    assert draws == ["mase by forecast step"]


def test_png_carries_its_key_and_notes(tmp_path: Path) -> None:
    from PIL import Image  # reads PNG text chunks independently of castgrid

    wild = {**FORECASTERS, "wild": ("mean", "baseline", 45.0)}
    out = make_results(tmp_path / "r", forecasters=wild)
    page.build_report(out)
    png = out / "plots" / "shops-skill.png"
    with Image.open(png) as im:
        text = dict(im.text)
    assert text == png_text(png.read_bytes())
    assert len(text[KEY_FIELD]) == 64
    assert any("wild: skill" in n for n in json.loads(text[NOTES_FIELD]))


def test_a_second_identical_run_draws_no_plot(tmp_path: Path, draws: list[str]) -> None:
    rng = np.random.default_rng(3)
    rows = [{"s": f"s{i}", "t": t, "y": float(50 + 10 * np.sin(t / 2) + rng.normal())}
            for i in range(4) for t in range(40)]
    pd.DataFrame(rows).to_csv(tmp_path / "d.csv", index=False)
    cfg = tmp_path / "c.yaml"
    cfg.write_text("experiment: reuse\nhorizon: 4\nseason: 4\ndatasets:\n"
                   "  - {name: d, path: d.csv, series: s, time: t, target: y}\n"
                   "windows: {scheme: expanding, train: 20, step: 4, folds: 3}\n"
                   "execution: {jobs: 1, cache: false}\n")
    runner.run(cfg, out_dir=tmp_path / "out")
    assert len(draws) == 4  # no history plot yet: one run
    draws.clear()
    runner.run(cfg, out_dir=tmp_path / "out")
    assert draws == []  # the repeated run leaves the history plot as it was too
    assert sorted(p.name for p in (tmp_path / "out" / "plots").iterdir()) == [
        "d-folds.png", "d-forecasts.png", "d-horizon.png", "d-skill.png"]
