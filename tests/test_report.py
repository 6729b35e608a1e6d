"""The report page: every plot drawn and referenced, valid PNGs, and a clean load in chromium.

The results folder is synthetic, written in tmp_path by following the results-folder contract
file by file (invented numbers, for these tests only).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from runner.errors import DataError
from runner.output.history import append_history
from runner.report.page import build_report
from runner.scoring.significance import compare_with_reference

H = 6
FOLDS = 4
SERIES = ["north", "south", "east"]
#: forecaster -> (kind, role, noise scale); seasonal_naive is the reference
FORECASTERS = {
    "naive": ("naive", "baseline", 1.6),
    "seasonal_naive": ("seasonal_naive", "baseline", 1.2),
    "mean": ("mean", "baseline", 2.0),
    "arima-111": ("arima", "candidate", 0.7),
    "ets": ("ets", "candidate", 0.95),
}
REFERENCE = "seasonal_naive"


def _fmt(x: float) -> str:
    return "" if not np.isfinite(x) else format(float(x), ".6g")


def make_results(out: Path, seed: int = 0, runs: int = 3,
                 forecasters: dict[str, tuple[str, str, float]] | None = None) -> Path:
    """Write a complete results folder per the contract: invented monthly data, 3 series.

    ``forecasters`` (name -> kind, role, noise scale) replaces :data:`FORECASTERS`; it must
    keep the reference.
    """
    forecasters = FORECASTERS if forecasters is None else forecasters
    rng = np.random.default_rng(seed)
    out.mkdir(parents=True, exist_ok=True)
    start = pd.Timestamp("2021-01-01")
    fc_rows, score_rows = [], []
    for s_i, series in enumerate(SERIES):
        level = 100 + 40 * s_i
        n_obs = 24 + FOLDS * H
        t = np.arange(n_obs)
        actual = level + 10 * np.sin(2 * np.pi * t / 12) + rng.normal(0, 2, n_obs)
        scale = 3.0 + s_i
        for fold in range(FOLDS):
            origin = 24 + fold * H - 1
            times = [start + pd.DateOffset(months=int(origin + k)) for k in range(1, H + 1)]
            y = actual[origin + 1: origin + 1 + H]
            for name, (_, _, noise) in forecasters.items():
                err = rng.normal(0, noise * scale, H) * np.sqrt(np.arange(1, H + 1))
                f = y + err
                for k in range(H):
                    fc_rows.append({
                        "dataset": "shops", "series": series, "forecaster": name, "fold": fold,
                        "step": k + 1, "time": times[k].strftime("%Y-%m-%d"),
                        "actual": y[k], "forecast": f[k],
                        "interval_80_low": f[k] - 1.28 * noise * scale,
                        "interval_80_high": f[k] + 1.28 * noise * scale,
                    })
                score_rows.append({
                    "dataset": "shops", "series": series, "forecaster": name, "fold": fold,
                    "origin": (start + pd.DateOffset(months=int(origin))).strftime("%Y-%m-%d"),
                    "mae": float(np.mean(np.abs(err))),
                    "mase": float(np.mean(np.abs(err)) / scale),
                    "_loss": np.abs(err) / scale,
                })
    forecasts = pd.DataFrame(fc_rows)
    scores = pd.DataFrame(score_rows)

    horizon = (forecasts.assign(
        mae=lambda d: (d["actual"] - d["forecast"]).abs())
        .groupby(["dataset", "forecaster", "step"], sort=False)["mae"].mean().reset_index())
    loss = forecasts.merge(scores[["series", "forecaster", "fold", "mase", "mae"]],
                           on=["series", "forecaster", "fold"])
    loss["mase"] = (loss["actual"] - loss["forecast"]).abs() / (loss["mae"] / loss["mase"])
    horizon["mase"] = loss.groupby(["forecaster", "step"], sort=False)["mase"].mean().to_numpy()

    ref = scores[scores["forecaster"] == REFERENCE].reset_index(drop=True)
    rows = []
    for name, (kind, role, _) in forecasters.items():
        mine = scores[scores["forecaster"] == name].reset_index(drop=True)
        row = {"dataset": "shops", "forecaster": name, "kind": kind, "role": role,
               "series": len(SERIES), "folds": FOLDS, "tasks": len(mine), "failed": 0}
        for m in ("mae", "mase"):
            row[f"{m}_mean"] = mine[m].mean()
            row[f"{m}_sd"] = mine.groupby("fold")[m].mean().std(ddof=1)
        row["mase_rel"] = row["mase_mean"] / ref["mase"].mean()
        if name == REFERENCE:
            row.update(win_share=np.nan, dm_better=np.nan, dm_worse=np.nan, wilcoxon_p=np.nan,
                       beats_reference=False)
        else:
            cmp = compare_with_reference(
                mine["mase"].to_numpy(), ref["mase"].to_numpy(), np.stack(mine["_loss"]),
                np.stack(ref["_loss"]), pd.factorize(mine["series"])[0],
                mine["fold"].to_numpy(), H)
            row.update(win_share=cmp.win_share, dm_better=cmp.dm_better,
                       dm_worse=cmp.dm_worse, wilcoxon_p=cmp.wilcoxon_p,
                       beats_reference=cmp.significant)
        rows.append(row)
    board = pd.DataFrame(rows).sort_values(["mase_mean", "forecaster"]).reset_index(drop=True)
    board.insert(1, "rank", np.arange(1, len(board) + 1))
    text = board.copy()
    for col in text.columns:
        if col == "beats_reference":
            text[col] = text[col].map(lambda b: "true" if b else "false")
        elif text[col].dtype.kind == "f":
            text[col] = text[col].map(_fmt)
    text.to_csv(out / "leaderboard.csv", index=False)
    (out / "leaderboard.md").write_text("| synthetic |\n|---|\n")
    scores.drop(columns="_loss").to_parquet(out / "scores.parquet", index=False)
    horizon.to_csv(out / "horizon.csv", index=False)
    forecasts.to_parquet(out / "forecasts.parquet", index=False)
    pd.DataFrame([{"dataset": "shops", "series": "east", "forecaster": "ets", "fold": 9,
                   "reason": "fit_error", "message": "invented failure"}]
                 ).to_csv(out / "failures.csv", index=False)
    manifest = {
        "experiment": "shop-demand",
        "config": {"experiment": "shop-demand", "horizon": H,
                   "description": "Invented monthly demand of three shops (test data)."},
        "config_hash": "ab12cd34" * 8,
        "data": {"shops": {"path": "data/shops.csv", "fingerprint": "f0" * 32,
                           "series": 3, "observations": 144}},
        "versions": {"castgrid": "0.1.0"},
        "tasks": {"total": 60, "computed": 60, "cached": 0, "failed": 0, "skipped_series": 0},
        "rank_by": "mase", "metrics": ["mae", "mase"], "reference": {"shops": REFERENCE},
        "forecasters": [{"name": n, "kind": k, "role": r, "identity": n}
                        for n, (k, r, _) in forecasters.items()],
    }
    (out / "manifest.json").write_text(json.dumps(manifest, indent=2))
    for i in range(runs):
        drift = board.assign(mase_mean=board["mase_mean"] * (1 + 0.05 * (runs - 1 - i)))
        append_history(out, manifest, drift, now=pd.Timestamp(f"2025-0{i + 1}-05T08:30:00Z"))
    return out


PLOT_KINDS = ("horizon", "folds", "forecasts", "skill", "history")


def test_report_references_every_plot_and_pngs_are_valid(tmp_path: Path) -> None:
    from PIL import Image  # pillow: an independent PNG decoder (matplotlib depends on it)

    out = make_results(tmp_path / "shop-demand")
    page = build_report(out)
    assert page == out / "report.html"
    text = page.read_text()
    files = sorted(p.name for p in (out / "plots").glob("*.png"))
    assert files == sorted(f"shops-{k}.png" for k in PLOT_KINDS)
    for name in files:
        assert f'data-file="plots/{name}"' in text
        assert f'href="plots/{name}"' in text
        with Image.open(out / "plots" / name) as im:
            im.verify()
            assert im.format == "PNG"
        with Image.open(out / "plots" / name) as im:
            assert im.size[0] > 400 and im.size[1] > 150
    embedded = re.findall(r'src="data:image/png;base64,([^"]+)"', text)
    assert len(embedded) == len(PLOT_KINDS)
    # the leaderboard table lists each forecaster; the failures section shows the failure
    for name in FORECASTERS:
        assert f">{name}<" in text
    assert "fit_error" in text
    assert "not drawn" not in text


def test_report_without_optional_files_says_what_is_missing(tmp_path: Path) -> None:
    out = make_results(tmp_path / "r", runs=1)
    (out / "horizon.csv").unlink()
    (out / "history.jsonl").unlink()
    (out / "plots").mkdir()
    (out / "plots" / "shops-horizon.png").write_bytes(b"stale")
    text = build_report(out).read_text()
    assert "horizon.csv is not in the results folder" in text
    assert "history.jsonl is not in the results folder" in text
    assert not (out / "plots" / "shops-horizon.png").exists()  # stale plot removed
    assert (out / "plots" / "shops-skill.png").exists()


def test_report_is_self_contained(tmp_path: Path) -> None:
    text = build_report(make_results(tmp_path / "r")).read_text()
    links = re.findall(r'(?:src|href)="([^"]*)"', text)
    assert links and all(u.startswith(("data:image/png;base64,", "plots/")) for u in links)
    lowered = text.lower()
    for outside in ("<link", "<script", "@import", "url(", "http://", "https://", "@font-face"):
        assert outside not in lowered, outside


def test_report_history_of_one_run_is_a_note(tmp_path: Path) -> None:
    out = make_results(tmp_path / "r", runs=1)
    text = build_report(out).read_text()
    assert "history.jsonl has 1 run(s) with scores for this dataset by mase" in text
    assert not (out / "plots" / "shops-history.png").exists()


def test_report_names_what_is_off_the_scale(tmp_path: Path) -> None:
    wild = {**FORECASTERS, "wild": ("mean", "baseline", 45.0)}
    text = build_report(make_results(tmp_path / "r", forecasters=wild)).read_text()
    notes = re.findall(r'<span class="offscale">([^<]*)</span>', text)
    wild_notes = [n for n in notes if "wild: " in n and "(off the scale)" in n]
    assert len(wild_notes) == 4  # horizon, folds, skill and history plots
    assert re.search(r"wild: skill -\d+\.\d% \(off the scale\)", text)


def test_report_needs_a_fold_or_origin_column(tmp_path: Path) -> None:
    out = make_results(tmp_path / "r", runs=1)
    scores = pd.read_parquet(out / "scores.parquet").drop(columns=["fold", "origin"])
    scores.to_parquet(out / "scores.parquet", index=False)
    with pytest.raises(DataError, match=r"scores\.parquet: column 'fold' is missing"):
        build_report(out)


def test_report_errors_name_the_missing_file(tmp_path: Path) -> None:
    out = make_results(tmp_path / "r", runs=1)
    (out / "manifest.json").unlink()
    with pytest.raises(DataError, match=r"manifest\.json: file not found"):
        build_report(out)
    assert not (out / "report.html").exists()  # nothing half-written


def test_report_on_damaged_history_names_file_and_line(tmp_path: Path) -> None:
    out = make_results(tmp_path / "r", runs=2)
    with (out / "history.jsonl").open("a") as fh:
        fh.write("{not json\n")
    with pytest.raises(DataError, match=r"history\.jsonl: line 3: not valid JSON"):
        build_report(out)


def test_cli_report_exit_codes(tmp_path: Path) -> None:
    from runner.cli import main

    out = make_results(tmp_path / "r", runs=1)
    assert main(["report", str(out)]) == 0
    assert main(["report", str(tmp_path / "nope")]) == 2


CHROMIUM = Path("/usr/bin/chromium")
_CHROMIUM_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                   "--no-first-run", "--disable-background-networking",
                   "--disable-component-update", "--disable-sync"]
# Appended to a copy of the page, never to the product: after load, count images the browser
# could not decode, so a broken image shows up in the dumped DOM.
_PROBE = """<script>
window.addEventListener('load', function () {
  var imgs = Array.prototype.slice.call(document.images);
  var broken = imgs.filter(function (i) { return !i.complete || i.naturalWidth === 0; });
  document.body.setAttribute('data-images', String(imgs.length));
  document.body.setAttribute('data-broken', String(broken.length));
});
</script>"""


@pytest.mark.skipif(not CHROMIUM.exists(), reason="needs Debian's chromium (/usr/bin/chromium)")
def test_report_renders_in_headless_chromium(tmp_path: Path) -> None:
    out = make_results(tmp_path / "r")
    page = build_report(out)
    probe = out / "probe.html"
    probe.write_text(page.read_text().replace("</body>", _PROBE + "</body>"))
    flags = _CHROMIUM_FLAGS + [f"--user-data-dir={tmp_path / 'profile'}"]

    done = subprocess.run(
        [str(CHROMIUM), *flags, "--enable-logging=stderr", "--v=0",
         "--virtual-time-budget=5000", "--dump-dom", probe.as_uri()],
        capture_output=True, text=True, timeout=120,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    dom = done.stdout
    assert f'data-images="{len(PLOT_KINDS)}"' in dom, dom[:500]
    assert 'data-broken="0"' in dom
    for kind in PLOT_KINDS:
        assert f'data-file="plots/shops-{kind}.png"' in dom
    console = [line for line in done.stderr.splitlines() if "CONSOLE" in line]
    assert not [c for c in console if "rror" in c], console
    assert "Failed to load resource" not in done.stderr

    shot = tmp_path / "shot.png"
    done = subprocess.run(
        [str(CHROMIUM), *flags, "--hide-scrollbars", "--window-size=1400,4400",
         f"--screenshot={shot}", page.as_uri()],
        capture_output=True, text=True, timeout=120,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    from PIL import Image

    with Image.open(shot) as im:
        assert im.size == (1400, 4400)
        # a blank page would be one colour; the rendered report has many
        assert len(im.convert("RGB").getcolors(maxcolors=1 << 20) or []) > 50
    keep = os.environ.get("CASTGRID_KEEP_SCREENSHOT")
    if keep:  # a developer asked to keep the picture to look at it
        shutil.copy(shot, keep)


# After load, for each scrolling box: does the page itself stay within the window, is the box
# narrower than its table, and once scrolled to the end is the last column fully in view while
# the first column is still at the box's left edge? Written to the body as JSON.
_LAYOUT_PROBE = """<script>
window.addEventListener('load', function () {
  var out = {page: document.documentElement.scrollWidth - window.innerWidth, boxes: []};
  document.querySelectorAll('.scroll').forEach(function (box) {
    var row = box.querySelector('tr');
    var first = row.firstElementChild, last = row.lastElementChild;
    var before = first.getBoundingClientRect().left - box.getBoundingClientRect().left;
    box.scrollLeft = box.scrollWidth;
    var b = box.getBoundingClientRect();
    out.boxes.push({label: box.getAttribute('aria-label'), wide: box.scrollWidth > box.clientWidth,
      lastRight: last.getBoundingClientRect().right - b.right,
      firstLeft: first.getBoundingClientRect().left - b.left, firstBefore: before,
      sticky: getComputedStyle(first).position});
  });
  document.body.setAttribute('data-layout', JSON.stringify(out));
});
</script>"""


@pytest.mark.skipif(not CHROMIUM.exists(), reason="needs Debian's chromium (/usr/bin/chromium)")
def test_tables_scroll_instead_of_being_cut_in_a_narrow_window(tmp_path: Path) -> None:
    import html as html_lib

    from runner.report.tables import segment_skill_html

    out = make_results(tmp_path / "r", runs=1)
    page = build_report(out)
    # a wide synthetic skill-per-segment table (24 segments), as a later change will add
    segments = pd.DataFrame(np.linspace(-80, 60, 5 * 24).reshape(5, 24), index=list(FORECASTERS),
                            columns=[f"segment {i}" for i in range(24)])
    extra = f'<div class="card">{segment_skill_html(segments)}</div>'
    probe = out / "layout.html"
    probe.write_text(page.read_text().replace("</main>", extra + "</main>")
                     .replace("</body>", _LAYOUT_PROBE + "</body>"))
    done = subprocess.run(
        [str(CHROMIUM), *_CHROMIUM_FLAGS, f"--user-data-dir={tmp_path / 'profile'}",
         "--window-size=700,1200", "--virtual-time-budget=5000", "--dump-dom", probe.as_uri()],
        capture_output=True, text=True, timeout=120,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    found = re.search(r'data-layout="([^"]*)"', done.stdout)
    assert found, done.stdout[:500]
    layout = json.loads(html_lib.unescape(found.group(1)))
    assert layout["page"] <= 0  # the page never scrolls sideways: only the tables do
    labels = [b["label"] for b in layout["boxes"]]
    assert labels == ["leaderboard of shops", "every metric of shops", "failed tasks",
                      "skill per segment"]
    wide = [b for b in layout["boxes"] if b["wide"]]
    assert {b["label"] for b in wide} >= {"leaderboard of shops", "skill per segment"}
    for b in layout["boxes"]:
        assert b["lastRight"] <= 1, b  # the last column can be scrolled fully into view
        assert b["sticky"] == "sticky"
        assert abs(b["firstLeft"] - b["firstBefore"]) <= 1, b  # first column stays put
