"""The painter: plots drawn in a process of their own are the very bytes drawn in the run's
process, and anything wrong with the painter falls back to drawing in the run's process.

The results folder is the synthetic one of tests/test_report.py (invented numbers, for these
tests only); the check is castgrid against itself (the same drawing code in two processes).
"""

from __future__ import annotations

import os
import signal
import sys
from pathlib import Path

import pytest
from test_report import make_results

from runner.report import painter as painter_module
from runner.report.page import build_report
from runner.report.plots import Drawn, Sketch

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"),
                                reason="the painter is a fork: Linux only")


def _files(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in [folder / "report.html",
                                              *sorted((folder / "plots").glob("*.png"))]}


@pytest.fixture()
def here(tmp_path: Path) -> dict[str, bytes]:
    """The report of the synthetic folder, drawn in this process."""
    folder = make_results(tmp_path / "here")
    build_report(folder)
    return _files(folder)


def _fresh(tmp_path: Path, name: str) -> Path:
    return make_results(tmp_path / name)  # the same seed: the same folder


def test_plots_drawn_aside_are_the_bytes_drawn_here(tmp_path: Path,
                                                     here: dict[str, bytes]) -> None:
    folder = _fresh(tmp_path, "aside")
    painter = painter_module._fork_painter()
    assert painter is not None
    try:
        build_report(folder, painter=painter)
        assert not painter.closed  # it drew them: no fallback happened
    finally:
        painter.close()
    aside = _files(folder)
    assert len(aside) >= 5  # report.html and at least four plots
    assert aside == here


def test_a_dead_painter_falls_back_to_drawing_here(tmp_path: Path,
                                                    here: dict[str, bytes]) -> None:
    folder = _fresh(tmp_path, "dead")
    painter = painter_module._fork_painter()
    assert painter is not None
    os.kill(painter.pid, signal.SIGKILL)
    os.waitpid(painter.pid, 0)
    try:
        build_report(folder, painter=painter)
    finally:
        painter.close()
    assert painter.closed
    assert _files(folder) == here


def _fails(data: dict) -> Drawn:
    raise ValueError(f"cannot draw {data['what']}")


def test_a_drawing_that_fails_aside_is_drawn_here_where_its_error_shows() -> None:
    painter = painter_module._fork_painter()
    assert painter is not None
    try:
        painter.submit(Sketch({"what": "this"}, _fails), "key")
        assert painter.collect() is None
        assert painter.closed
    finally:
        painter.close()
    with pytest.raises(ValueError, match="cannot draw this"):
        Sketch({"what": "this"}, _fails).draw()


def test_the_painter_is_reaped_however_the_block_ends(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(painter_module, "can_paint_aside", lambda: True)
    with pytest.raises(RuntimeError), painter_module.start_painter() as painter:
        assert painter is not None
        pid = painter.pid
        raise RuntimeError("the run failed")
    with pytest.raises(ChildProcessError):  # reaped: no such child any more
        os.waitpid(pid, os.WNOHANG)


def test_the_painter_yields_the_cores_to_the_run() -> None:
    painter = painter_module._fork_painter()
    assert painter is not None
    try:
        painter.collect()  # an answer: it is past its set-up
        mine = os.getpriority(os.PRIO_PROCESS, 0)
        assert os.getpriority(os.PRIO_PROCESS, painter.pid) == min(19, mine
                                                                  + painter_module.NICENESS)
    finally:
        painter.close()


def test_no_painter_on_one_core(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(painter_module, "usable_cores", lambda: 1)
    assert not painter_module.can_paint_aside()
    with painter_module.start_painter() as painter:
        assert painter is None


def test_a_run_drawn_aside_writes_the_same_files(tmp_path: Path,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    # the synthetic data of tests/test_chunks.py (invented, seeded): every file but those with
    # the run's time (history.jsonl, and rerun.json, which hashes it) is the same whether a
    # painter drew the plots or the run itself
    from test_chunks import _write

    import runner
    from runner import pipeline

    cfg = _write(tmp_path, 10_000)
    collected: list[bool] = []
    collect = painter_module.Painter.collect

    def spy(self):
        got = collect(self)
        collected.append(got is not None)
        return got

    monkeypatch.setattr(painter_module.Painter, "collect", spy)
    monkeypatch.setattr(painter_module, "can_paint_aside", lambda: True)
    files = []
    for threshold in (0, 10**12):  # every run paints aside; none does
        monkeypatch.setattr(pipeline, "PAINT_ASIDE_TASKS", threshold)
        out = tmp_path / f"out{threshold}"
        runner.run(cfg, out_dir=out)
        files.append({str(p.relative_to(out)): p.read_bytes() for p in sorted(out.rglob("*"))
                      if p.is_file() and p.name not in ("history.jsonl", "rerun.json")})
    assert collected == [True]  # one painter, used, and only in the first run
    assert sorted(files[0]) == sorted(files[1])
    assert any(name.startswith("plots/") for name in files[0])
    for name, data in files[0].items():
        assert files[1][name] == data, name
