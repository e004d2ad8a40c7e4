"""Reading, validating and fingerprinting Parquet extracts (fitaudit.tasks.extracts).

Fixtures are written with pyarrow in tmp_path.  Reference values come from outside the code under
test: hashlib for hashes, os.path.getsize for sizes, zoneinfo for time-zone conversion, and
pandas.date_range for the calendar grids of the declared frequencies.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import re
import shutil
from zoneinfo import ZoneInfo

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import fitaudit.tasks.extracts as extracts
from fitaudit.tasks._io import canonical_json
from fitaudit.tasks.extracts import (
    ExtractError,
    SeriesData,
    SeriesProblem,
    fingerprint_source,
    read_series,
    series_problems,
)
from fitaudit.tasks.frequencies import ALIASES, FREQUENCIES, FREQUENCY_DAYS, SUBDAILY
from fitaudit.tasks.registry import SourceEntry

SOURCE = SourceEntry(
    name="demand",
    uri="demand.parquet",
    key="district",
    time="date",
    value="demand",
    exogenous=("temp_c",),
    frequency="D",
    partitioning=None,
    line=1,
)


def _days(start: str, n: int) -> np.ndarray:
    return (np.datetime64(start, "D") + np.arange(n)).astype("datetime64[ns]")


def _table(key, times, demand=None, temp=None, **extra) -> pa.Table:
    n = len(times)
    columns = {
        "district": [key] * n,
        "date": times,
        "demand": np.arange(n, dtype=float) + 100.0 if demand is None else demand,
        "temp_c": np.linspace(-5.0, 25.0, n) if temp is None else temp,
    }
    columns.update(extra)
    return pa.table(columns)


def _write(path, table: pa.Table) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    pq.write_table(table, path)


def _source(uri, **changes) -> SourceEntry:
    return SourceEntry.model_validate({**SOURCE.model_dump(), "uri": str(uri), **changes})


def _kinds(data: SeriesData) -> list[str]:
    return [p.kind for p in data.problems]


@pytest.fixture
def one_file(tmp_path):
    table = pa.concat_tables(
        [
            _table("north", _days("2024-01-01", 60)),
            _table("south", _days("2024-01-01", 60)),
            _table("east", _days("2024-01-01", 60)),
        ]
    )
    _write(tmp_path / "demand.parquet", table)
    return tmp_path


# ------------------------------------------------------------------------------------------
# layouts: a file, a folder, a hive-partitioned folder, a file:// URI
# ------------------------------------------------------------------------------------------
def test_single_file_reads_the_requested_series(one_file):
    out = read_series(_source("demand.parquet"), ["north", "south"], ["demand", "temp_c"], base_dir=one_file)
    assert list(out) == ["north", "south"]  # only the requested keys come back
    north = out["north"]
    assert north.problems == ()
    assert north.time.dtype == np.dtype("datetime64[ns]")
    np.testing.assert_array_equal(north.time, _days("2024-01-01", 60))
    np.testing.assert_array_equal(north.columns["demand"], np.arange(60, dtype=float) + 100.0)
    assert north.columns["temp_c"].dtype == np.float64
    assert north.to_dict() == {
        "source": "demand",
        "key": "north",
        "rows": 60,
        "first": "2024-01-01",
        "last": "2024-02-29",
        "columns": ["demand", "temp_c"],
        "problems": [],
    }


def test_folder_of_files(tmp_path):
    for key in ("north", "south", "east"):
        _write(tmp_path / "extract" / f"{key}.parquet", _table(key, _days("2024-01-01", 30)))
    (tmp_path / "extract" / "_SUCCESS").write_bytes(b"")  # marker files are ignored, as pyarrow does
    (tmp_path / "extract" / ".DS_Store").write_bytes(b"\x00junk")
    out = read_series(_source("extract"), ["east", "north"], ["demand"], base_dir=tmp_path)
    assert [d.time.size for d in out.values()] == [30, 30]
    assert all(d.problems == () for d in out.values())


def test_hive_partitioned_folder(tmp_path):
    for key in ("north", "south"):
        table = _table(key, _days("2024-01-01", 20)).drop(["district"])
        _write(tmp_path / "hive" / f"district={key}" / "part-0.parquet", table)
    source = _source("hive", partitioning="hive")
    out = read_series(source, ["south"], ["demand", "temp_c"], base_dir=tmp_path)
    assert list(out) == ["south"] and out["south"].time.size == 20 and out["south"].problems == ()
    fp = fingerprint_source(source, tmp_path)
    assert "district" in fp.columns and fp.rows == 40


def test_file_uri(one_file):
    uri = (one_file / "demand.parquet").as_uri()
    assert uri.startswith("file:///")
    out = read_series(_source(uri), ["east"], ["demand"])
    assert out["east"].time.size == 60 and out["east"].problems == ()
    assert fingerprint_source(_source(uri)).rows == 180


def test_relative_uri_resolves_against_base_dir(one_file, tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path.parent)
    assert read_series(_source("demand.parquet"), ["north"], ["demand"], base_dir=one_file)["north"].time.size == 60


class _Spy:
    """Wraps datasets made by the module to record the scans it asks for."""

    def __init__(self):
        self.scans = []
        self.real = extracts.reading._dataset

    def __call__(self, loc, paths):
        spy = self

        class Recording:
            def __init__(self, inner):
                self.inner = inner

            def to_table(self, **kwargs):
                spy.scans.append(kwargs)
                return self.inner.to_table(**kwargs)

        return Recording(self.real(loc, paths))


def test_filter_push_down_and_one_scan_for_all_series(one_file, monkeypatch):
    spy = _Spy()
    monkeypatch.setattr(extracts.reading, "_dataset", spy)
    out = read_series(
        _source("demand.parquet"),
        ["north", "east"],
        ["demand", "temp_c"],
        start="2024-01-10",
        end="2024-01-19",
        base_dir=one_file,
    )
    assert len(spy.scans) == 1  # one scan serves every series of the source
    scan = spy.scans[0]
    expression = str(scan["filter"])
    assert "is_in" in expression and "north" in expression and "east" in expression and "south" not in expression
    assert "date" in expression  # the time range is pushed down too
    assert set(scan["columns"]) >= {"district", "date", "demand", "temp_c"}
    assert "extra" not in scan["columns"]
    for data in out.values():
        np.testing.assert_array_equal(data.time, _days("2024-01-10", 10))  # inclusive bounds


def test_only_needed_columns_are_read(tmp_path, monkeypatch):
    _write(tmp_path / "demand.parquet", _table("north", _days("2024-01-01", 10), note=["x"] * 10, flag=[True] * 10))
    spy = _Spy()
    monkeypatch.setattr(extracts.reading, "_dataset", spy)
    out = read_series(_source("demand.parquet"), ["north"], ["demand"], base_dir=tmp_path)
    assert set(spy.scans[0]["columns"]) - {"__fragment_index", "__batch_index"} == {"district", "date", "demand"}
    assert out["north"].problems == ()  # extra columns are not an error


def test_integer_key_column_matches_text_keys(tmp_path):
    table = pa.table(
        {
            "district": [101] * 5 + [202] * 5,
            "date": np.concatenate([_days("2024-01-01", 5)] * 2),
            "demand": np.arange(10.0),
            "temp_c": np.zeros(10),
        }
    )
    _write(tmp_path / "demand.parquet", table)
    out = read_series(_source("demand.parquet"), ["202"], ["demand"], base_dir=tmp_path)
    np.testing.assert_array_equal(out["202"].columns["demand"], np.arange(5.0, 10.0))


def test_interleaved_rows_and_null_keys(tmp_path):
    times = np.repeat(_days("2024-01-01", 10), 3)
    keys = ["north", "south", None] * 10
    table = pa.table({"district": keys, "date": times, "demand": np.arange(30.0), "temp_c": np.zeros(30)})
    _write(tmp_path / "demand.parquet", table)
    out = read_series(_source("demand.parquet"), ["south", "north"], ["demand"], base_dir=tmp_path)
    np.testing.assert_array_equal(out["north"].columns["demand"], np.arange(0.0, 30.0, 3))
    np.testing.assert_array_equal(out["south"].columns["demand"], np.arange(1.0, 30.0, 3))
    assert out["north"].problems == () and out["south"].problems == ()


def test_keys_stored_as_a_dictionary_in_one_file_and_as_text_in_another(tmp_path):
    """Rows are grouped by key codes (Arrow's dictionary encoding): a dictionary-typed key column, a
    plain one and interleaved rows must give each series its own rows in stored order."""
    times = np.repeat(_days("2024-01-01", 6), 2)
    first = pa.table(
        {
            "district": pa.array(["north", "south"] * 6).dictionary_encode(),
            "date": times,
            "demand": np.arange(12.0),
            "temp_c": np.zeros(12),
        }
    )
    later = pa.table(
        {"district": ["south", "north"] * 6, "date": times + np.timedelta64(6, "D"), "demand": 100 + np.arange(12.0)}
    )
    later = later.append_column("temp_c", pa.array(np.zeros(12)))
    _write(tmp_path / "d" / "a.parquet", first)
    _write(tmp_path / "d" / "b.parquet", later)
    out = read_series(_source("d"), ["north", "south"], ["demand"], base_dir=tmp_path)
    np.testing.assert_array_equal(
        out["north"].columns["demand"], np.r_[np.arange(0.0, 12, 2), np.arange(101.0, 112, 2)]
    )
    np.testing.assert_array_equal(
        out["south"].columns["demand"], np.r_[np.arange(1.0, 12, 2), np.arange(100.0, 112, 2)]
    )


def test_hive_partition_with_numeric_values(tmp_path):
    for key in (101, 202):
        _write(
            tmp_path / "hive" / f"district={key}" / "part-0.parquet",
            _table(key, _days("2024-01-01", 5)).drop(["district"]),
        )
    out = read_series(_source("hive", partitioning="hive"), [202, "101"], ["demand"], base_dir=tmp_path)
    assert list(out) == ["202", "101"] and all(d.time.size == 5 and d.problems == () for d in out.values())


def test_bad_bounds_are_refused(one_file):
    from fitaudit.core.exceptions import InputError

    with pytest.raises(InputError, match=r"start='last week' is not an ISO 8601 date"):
        read_series(_source("demand.parquet"), ["north"], ["demand"], start="last week", base_dir=one_file)
    with pytest.raises(InputError, match=r"frequency 'daily' is not one of '15min'"):
        series_problems("north", _days("2024-01-01", 3), {}, "daily", source="demand")


def test_time_range_on_a_date_column(tmp_path):
    dates = pa.array(_days("2024-01-01", 30).astype("datetime64[D]"), pa.date32())  # no push-down for dates
    _write(tmp_path / "demand.parquet", _table("north", dates))
    out = read_series(
        _source("demand.parquet"), ["north"], ["demand"], start="2024-01-05", end="2024-01-08T12:00", base_dir=tmp_path
    )
    np.testing.assert_array_equal(out["north"].time, _days("2024-01-05", 4))


def test_aware_bounds_are_converted_to_utc(one_file):
    start = dt.datetime(2024, 1, 10, 1, 0, tzinfo=ZoneInfo("Europe/Berlin"))  # 00:00 UTC
    out = read_series(_source("demand.parquet"), ["north"], ["demand"], start=start, base_dir=one_file)
    assert out["north"].time[0] == np.datetime64("2024-01-10")


# ------------------------------------------------------------------------------------------
# time zones and disagreeing files
# ------------------------------------------------------------------------------------------
def test_aware_timestamps_become_utc_naive(tmp_path):
    berlin = ZoneInfo("Europe/Berlin")
    local = [dt.datetime(2024, 3, 31, h, tzinfo=berlin) for h in (0, 1, 3, 4)]  # 02:00 does not exist that day
    times = pa.array(local, type=pa.timestamp("us", tz="Europe/Berlin"))
    _write(tmp_path / "demand.parquet", _table("north", times))
    out = read_series(_source("demand.parquet", frequency="H"), ["north"], ["demand"], base_dir=tmp_path)
    # source: zoneinfo (IANA tz database) conversion of each local time to UTC
    expected = np.array([t.astimezone(dt.UTC).replace(tzinfo=None) for t in local], dtype="datetime64[ns]")
    np.testing.assert_array_equal(out["north"].time, expected)
    assert out["north"].problems == ()  # hourly in UTC across the clock change: no gap


def test_mixed_aware_and_naive_files_are_reported_not_crashed(tmp_path):
    aware = pa.array(_days("2024-01-01", 5), type=pa.timestamp("ns")).cast(pa.timestamp("ns", tz="UTC"))
    _write(tmp_path / "x" / "a.parquet", _table("north", aware))
    _write(
        tmp_path / "x" / "b.parquet",
        pa.concat_tables([_table("north", _days("2024-01-06", 5)), _table("south", _days("2024-01-01", 10))]),
    )
    out = read_series(_source("x"), ["north", "south"], ["demand"], base_dir=tmp_path)
    north = out["north"]
    assert north.time.size == 10
    problem = next(p for p in north.problems if p.kind == "mixed-timezones")
    assert problem.severity == "error"
    assert re.search(
        r"time-zone-aware timestamps \('a\.parquet'\) and from files with naive timestamps \('b\.parquet'\)",
        problem.message,
    )
    assert out["south"].problems == ()  # a series read from naive files only is fine


def test_different_time_types_across_files_are_unified(tmp_path):
    _write(
        tmp_path / "x" / "a.parquet",
        _table("north", pa.array(_days("2024-01-01", 3).astype("datetime64[D]"), pa.date32())),
    )
    _write(tmp_path / "x" / "b.parquet", _table("north", pa.array(_days("2024-01-04", 3).astype("datetime64[us]"))))
    _write(tmp_path / "x" / "c.parquet", _table("north", _days("2024-01-07", 3)))
    out = read_series(_source("x"), ["north"], ["demand"], base_dir=tmp_path)
    np.testing.assert_array_equal(out["north"].time, _days("2024-01-01", 9))
    assert out["north"].problems == ()


def test_text_time_column_in_one_file(tmp_path):
    _write(tmp_path / "x" / "a.parquet", _table("north", _days("2024-01-01", 3)))
    _write(tmp_path / "x" / "b.parquet", _table("north", [str(d)[:10] for d in _days("2024-01-04", 3)]))
    out = read_series(_source("x"), ["north"], ["demand"], base_dir=tmp_path)
    problem = next(p for p in out["north"].problems if p.kind == "column-type")
    assert re.search(
        r"time column 'date' has type string; expected a timestamp or date column.* in file 'b\.parquet'",
        problem.message,
    )


# ------------------------------------------------------------------------------------------
# bad files
# ------------------------------------------------------------------------------------------
def test_missing_path(tmp_path):
    with pytest.raises(
        ExtractError,
        match=r"source 'demand' \(uri 'nowhere\.parquet', resolved to '.*nowhere\.parquet'\): "
        r"does not exist\. Fix: correct sources\.demand\.uri in the registry",
    ):
        read_series(_source("nowhere.parquet"), ["north"], ["demand"], base_dir=tmp_path)
    with pytest.raises(ExtractError, match="does not exist"):
        fingerprint_source(_source("nowhere.parquet"), tmp_path)


def test_empty_folder(tmp_path):
    (tmp_path / "x").mkdir()
    with pytest.raises(ExtractError, match=r"the folder holds no data files"):
        read_series(_source("x"), ["north"], ["demand"], base_dir=tmp_path)


def test_empty_file(tmp_path):
    (tmp_path / "demand.parquet").write_bytes(b"")
    with pytest.raises(
        ExtractError, match=r"no file can be read \(demand\.parquet: empty file \(0 bytes\)\)\. Fix: rewrite"
    ):
        read_series(_source("demand.parquet"), ["north"], ["demand"], base_dir=tmp_path)


def test_corrupt_bytes(tmp_path):
    (tmp_path / "demand.parquet").write_bytes(b"PAR1" + bytes(range(256)) * 4)
    with pytest.raises(ExtractError, match=r"demand\.parquet: not readable as Parquet \(.*magic bytes.*\)"):
        read_series(_source("demand.parquet"), ["north"], ["demand"], base_dir=tmp_path)


def test_one_unreadable_file_among_good_ones(tmp_path):
    for key in ("north", "south"):
        _write(tmp_path / "x" / f"{key}.parquet", _table(key, _days("2024-01-01", 15)))
    (tmp_path / "x" / "west.parquet").write_bytes(b"this is not parquet")
    out = read_series(_source("x"), ["north", "west"], ["demand"], base_dir=tmp_path)
    assert out["north"].problems == () and out["north"].time.size == 15  # the others go on
    (problem,) = out["west"].problems
    assert problem.kind == "missing-series" and problem.severity == "error"
    assert re.search(
        r"series 'west': is not in source 'demand' \(x\); keys present: 'north', 'south'; these files could "
        r"not be read and may hold it: west\.parquet: not readable as Parquet",
        problem.message,
    )
    fp = fingerprint_source(_source("x"), tmp_path)
    assert fp.unreadable == (str(tmp_path / "x" / "west.parquet"),)
    assert fp.rows == 30 and len(fp.files) == 3


def test_file_corrupt_after_a_valid_footer(tmp_path):
    rng = np.random.default_rng(7)
    for key in ("north", "south"):
        n = 60
        _write(
            tmp_path / "x" / f"{key}.parquet",
            _table(key, _days("2024-01-01", n), demand=rng.normal(size=n), temp=rng.normal(size=n)),
        )
    path = tmp_path / "x" / "south.parquet"
    data = bytearray(path.read_bytes())
    start = pq.read_metadata(path).row_group(0).column(2).data_page_offset
    data[start + 5 : start + 120] = b"\xab" * 115  # the page header and values, not the footer
    path.write_bytes(bytes(data))
    out = read_series(_source("x"), ["north", "south"], ["demand"], base_dir=tmp_path)
    assert out["north"].problems == () and out["north"].time.size == 60
    assert re.search(r"south\.parquet: failed while reading", out["south"].problems[0].message)


def test_missing_key_column_everywhere(one_file):
    with pytest.raises(
        ExtractError,
        match=r"the key column 'region' is in none of the files \(available columns: 'district', "
        r"'date', 'demand', 'temp_c'\)\. Fix: set sources\.demand\.key",
    ):
        read_series(_source("demand.parquet", key="region"), ["north"], ["demand"], base_dir=one_file)


def test_missing_value_column(one_file):
    out = read_series(_source("demand.parquet"), ["north"], ["load"], base_dir=one_file)
    (problem,) = out["north"].problems
    assert problem.kind == "missing-column" and problem.column == "load"
    assert re.search(
        r"column 'load' is in none of the files; available columns: 'district', 'date', 'demand', 'temp_c'",
        problem.message,
    )
    assert out["north"].problems_for(["demand"]) == ()  # a model not using the column is unaffected


def test_column_missing_in_one_file(tmp_path):
    _write(tmp_path / "x" / "a.parquet", _table("north", _days("2024-01-01", 5)))
    _write(tmp_path / "x" / "b.parquet", _table("north", _days("2024-01-06", 5)).drop(["temp_c"]))
    out = read_series(_source("x"), ["north"], ["demand", "temp_c"], base_dir=tmp_path)
    (problem,) = out["north"].problems
    assert (problem.kind, problem.column) == ("missing-column", "temp_c")
    assert re.search(
        r"column 'temp_c' is missing in file 'b\.parquet'; available columns: 'district', 'date', 'demand'",
        problem.message,
    )
    np.testing.assert_array_equal(
        out["north"].columns["demand"], np.concatenate([np.arange(5.0), np.arange(5.0)]) + 100
    )


@pytest.mark.parametrize("values, type_name", [(["a", "b", "c"], "string"), ([True, False, True], "bool")])
def test_non_numeric_value_column(tmp_path, values, type_name):
    _write(tmp_path / "demand.parquet", _table("north", _days("2024-01-01", 3), demand=values))
    out = read_series(_source("demand.parquet"), ["north"], ["demand"], base_dir=tmp_path)
    (problem,) = out["north"].problems
    assert (problem.kind, problem.severity, problem.column) == ("column-type", "error", "demand")
    assert re.search(rf"column 'demand' has type {type_name}; expected a numeric column", problem.message)


def test_series_not_in_source(one_file):
    out = read_series(_source("demand.parquet"), ["westt"], ["demand"], base_dir=one_file)
    (problem,) = out["westt"].problems
    assert problem.kind == "missing-series"
    assert "keys present: 'east', 'north', 'south'" in problem.message
    assert "correct the model's 'series' in the registry" in problem.message
    assert out["westt"].time.size == 0


def test_series_outside_the_time_range(one_file):
    out = read_series(_source("demand.parquet"), ["north"], ["demand"], end="2023-06-30", base_dir=one_file)
    assert re.search(
        r"has no rows between the first row and 2023-06-30\. Fix: check the as-of date",
        out["north"].problems[0].message,
    )


def test_row_without_timestamp(tmp_path):
    times = pa.array(list(_days("2024-01-01", 3).astype("datetime64[us]").tolist()) + [None], pa.timestamp("us"))
    _write(tmp_path / "demand.parquet", _table("north", times))
    out = read_series(_source("demand.parquet"), ["north"], ["demand"], base_dir=tmp_path)
    assert _kinds(out["north"]) == ["null-time"]
    assert "1 row(s) have no timestamp" in out["north"].problems[0].message
    assert out["north"].time.size == 3


# ------------------------------------------------------------------------------------------
# per-series validation
# ------------------------------------------------------------------------------------------
def _read_one(tmp_path, table, frequency="D", columns=("demand", "temp_c")):
    _write(tmp_path / "demand.parquet", table)
    return read_series(_source("demand.parquet", frequency=frequency), ["north"], list(columns), base_dir=tmp_path)[
        "north"
    ]


def test_duplicate_timestamps(tmp_path):
    times = _days("2024-01-01", 10)
    times = np.insert(times, 4, times[3])
    data = _read_one(tmp_path, _table("north", times))
    (problem,) = data.problems
    assert problem.kind == "duplicate-time"
    assert re.search(
        r"1 timestamp\(s\) appear more than once: 2024-01-04 \(rows 3, 4\)\. Fix: keep one row", problem.message
    )


def test_rows_out_of_time_order(tmp_path):
    times = _days("2024-01-01", 10)
    times[[5, 6]] = times[[6, 5]]
    data = _read_one(tmp_path, _table("north", times))
    (problem,) = data.problems
    assert problem.kind == "unsorted"
    assert re.search(
        r"1 row\(s\) out of time order: row 6 \(2024-01-06\) follows row 5 \(2024-01-07\)\. Fix: sort", problem.message
    )


def test_gaps_are_counted_and_named(tmp_path):
    times = np.delete(_days("2024-01-01", 40), [4, 5, 20])
    data = _read_one(tmp_path, _table("north", times))
    (problem,) = data.problems
    assert problem.kind == "gap"
    assert re.search(
        r"3 timestamp\(s\) missing against frequency 'D' \(daily\), first: 2024-01-05, 2024-01-06, 2024-01-21\.",
        problem.message,
    )


def test_off_grid_timestamps(tmp_path):
    times = _days("2024-01-01", 10)
    times[3] += np.timedelta64(12, "h")
    data = _read_one(tmp_path, _table("north", times))
    kinds = _kinds(data)
    assert "off-grid" in kinds
    assert "2024-01-04T12:00:00" in data.problems[kinds.index("off-grid")].message


def test_nan_inf_and_null_values(tmp_path):
    demand = pa.array([1.0, np.nan, 3.0, np.inf, None, 6.0])
    data = _read_one(tmp_path, _table("north", _days("2024-01-01", 6), demand=demand))
    (problem,) = data.problems
    assert (problem.kind, problem.column) == ("non-finite", "demand")
    assert re.search(
        r"column 'demand' has 2 missing or NaN and 1 infinite value\(s\) at 2024-01-02, 2024-01-04, 2024-01-05 "
        r"\(rows 1, 3, 4\)\. Fix: impute or remove",
        problem.message,
    )


def test_missing_exogenous_values(tmp_path):
    temp = np.linspace(0, 1, 8)
    temp[6] = np.nan
    data = _read_one(tmp_path, _table("north", _days("2024-01-01", 8), temp=temp))
    (problem,) = data.problems
    assert (problem.kind, problem.column) == ("missing-exogenous", "temp_c")
    assert "exogenous column 'temp_c' has 1 missing or NaN value(s) at 2024-01-07 (rows 6)" in problem.message
    assert data.problems_for(["demand"]) == ()


def test_huge_finite_values_pass(tmp_path):
    demand = np.full(5, 1e300)
    data = _read_one(tmp_path, _table("north", _days("2024-01-01", 5), demand=demand))
    assert data.problems == ()
    assert data.columns["demand"][0] == 1e300


def test_too_short():
    time = _days("2024-01-01", 20)
    problems = series_problems("north", time, {"demand": np.zeros(20)}, "D", source="demand", min_length=758)
    (problem,) = problems
    assert (problem.kind, problem.severity) == ("too-short", "insufficient")
    assert "20 observation(s), but at least 758 are needed" in problem.message
    data = SeriesData("demand", "north", time, {"demand": np.zeros(20)})
    assert data.length_problem(758) == problem and data.length_problem(20) is None


# The reference grid of each code: pandas' own offset (pandas 3.1.1 in the venv these checks were
# written with; the spellings are those of pandas >= 2.2).  "W" is every 7 days on any weekday, so its
# reference is "7D"; every other code is pandas' alias of the same name.
_PANDAS_FREQ = {code: ("7D" if code == "W" else code) for code in FREQUENCIES}


@pytest.mark.parametrize("frequency", list(FREQUENCIES))
def test_grid_of_every_frequency_against_pandas(frequency, rng):
    # source: pandas.date_range (pandas 3.1.1) builds the reference calendar grid of each frequency
    grid = pd.date_range("2019-12-30", periods=48, freq=_PANDAS_FREQ[frequency]).to_numpy()
    assert series_problems("k", grid, {}, frequency, source="s") == []
    dropped = np.sort(rng.choice(np.arange(1, 47), size=4, replace=False))
    (gap,) = series_problems("k", np.delete(grid, dropped), {}, frequency, source="s")
    assert gap.kind == "gap"
    assert f"{dropped.size} timestamp(s) missing against frequency {frequency!r}" in gap.message
    for stamp in grid[dropped]:
        ts = pd.Timestamp(stamp)
        assert (ts.strftime("%Y-%m-%d") if ts == ts.normalize() else ts.isoformat()) in gap.message


@pytest.mark.parametrize("frequency", list(FREQUENCIES))
def test_frequency_days_bound_every_period(frequency):
    # source: pandas.date_range (pandas 3.1.1) gives the calendar periods of each frequency (leap years included)
    grid = pd.date_range("1999-12-01", "2031-01-31", freq=_PANDAS_FREQ[frequency])[:20_000]
    gaps = (grid[1:] - grid[:-1]) / pd.Timedelta(days=1)
    longest = gaps.max()
    if frequency == "B":
        # a business day's period is 1 or 3 days; the bound is per observation over a run: 7 days per
        # 5 observations, with room for holidays (10 a year: 1.4 * 260 / 250 = 1.456)  # common practice
        assert longest == 3 and 7 / 5 * 260 / 250 < FREQUENCY_DAYS[frequency] < 3
    else:
        assert FREQUENCY_DAYS[frequency] == longest  # the bound is tight: the longest month is 31 days, quarter 92
    assert (frequency in SUBDAILY) == (longest < 1)


@pytest.mark.parametrize(
    "old, new", [("H", "h"), ("M", "ME"), ("Q", "QE"), ("A", "YE"), ("AS", "YS"), ("15T", "15min")]
)
def test_old_pandas_spellings_are_aliases(old, new):
    # source: pandas 2.2 release notes deprecate H, T, M, Q, A in favour of h, min, ME, QE, YE
    assert ALIASES[old] == new
    grid = pd.date_range("2019-12-30", periods=30, freq=_PANDAS_FREQ[new]).to_numpy()
    assert series_problems("k", grid, {}, old, source="s") == []
    (gap,) = series_problems("k", np.delete(grid, [5]), {}, old, source="s")
    assert gap.kind == "gap" and f"frequency {new!r}" in gap.message


def test_business_days_skip_weekends_and_holidays():
    # source: pandas.bdate_range (pandas 3.1.1) with the same holidays
    holidays = ("2024-12-25", "2024-12-26", "2025-01-01")
    grid = pd.bdate_range("2024-12-02", "2025-01-31", freq="C", holidays=list(holidays)).to_numpy()
    assert not np.isin(pd.to_datetime(list(holidays)).to_numpy(), grid).any()
    assert series_problems("k", grid, {}, "B", source="s", holidays=holidays) == []
    # without the holidays declared, the three holidays are gaps (and only they)
    (gap,) = series_problems("k", grid, {}, "B", source="s")
    assert gap.kind == "gap" and "3 timestamp(s) missing" in gap.message
    assert all(day in gap.message for day in holidays)
    # a weekend day is off the business-day grid
    weekend = np.sort(np.append(grid, np.datetime64("2024-12-07", "ns")))  # a Saturday  # common practice
    (off,) = series_problems("k", weekend, {}, "B", source="s", holidays=holidays)
    assert off.kind == "off-grid" and "2024-12-07" in off.message
    # a weekday-only series declared daily reports every weekend as a gap
    (daily_gap,) = series_problems("k", grid[:10], {}, "D", source="s")
    assert daily_gap.kind == "gap"


@pytest.mark.parametrize(
    "frequency, bad",
    [
        ("MS", "2020-03-15"),
        ("ME", "2020-03-01"),
        ("QS", "2020-02-01"),
        ("QE", "2020-05-31"),
        ("W", "2020-01-08T06:00"),
        ("W-MON", "2020-01-08"),
        ("YS", "2021-06-01"),
        ("YE", "2021-01-01"),
        ("B", "2020-01-04"),
    ],
)
def test_calendar_anchor_is_checked(frequency, bad):
    grid = pd.date_range("2019-12-30", periods=12, freq=_PANDAS_FREQ[frequency]).to_numpy()
    times = np.sort(np.append(grid, np.datetime64(bad, "ns")))
    kinds = [p.kind for p in series_problems("k", times, {}, frequency, source="s")]
    assert "off-grid" in kinds


def test_problem_records_serialise():
    problem = SeriesProblem("north", "gap", "error", "text", None)
    assert json.loads(canonical_json(problem.to_dict())) == {
        "key": "north",
        "kind": "gap",
        "severity": "error",
        "message": "text",
        "column": None,
    }


# ------------------------------------------------------------------------------------------
# fingerprint
# ------------------------------------------------------------------------------------------
def test_fingerprint_sizes_and_hashes(tmp_path):
    for key in ("north", "south"):
        _write(tmp_path / "x" / f"{key}.parquet", _table(key, _days("2024-01-01", 31)))
    fp = fingerprint_source(_source("x"), tmp_path)
    assert [os.path.basename(f.path) for f in fp.files] == ["north.parquet", "south.parquet"]
    for f in fp.files:
        assert f.size == os.path.getsize(f.path)  # source: os.path.getsize
        with open(f.path, "rb") as fh:
            assert f.sha256 == hashlib.sha256(fh.read()).hexdigest()  # source: hashlib
    assert fp.rows == 62
    assert (fp.time_min, fp.time_max) == ("2024-01-01T00:00:00", "2024-01-31T00:00:00")
    assert fp.columns == ("district", "date", "demand", "temp_c")
    assert fp.unreadable == ()
    json.loads(canonical_json(fp.to_dict()))

    moved = tmp_path / "elsewhere" / "copy"
    shutil.copytree(tmp_path / "x", moved)
    assert fingerprint_source(_source(moved), tmp_path).digest == fp.digest  # content, not location
    _write(moved / "south.parquet", _table("south", _days("2024-01-01", 30)))
    assert fingerprint_source(_source(moved), tmp_path).digest != fp.digest


# ------------------------------------------------------------------------------------------
# fingerprint cache: a file's digest computed once per version (path, size, modification time)
# ------------------------------------------------------------------------------------------
def _age(path, seconds: float = 3600.0) -> None:
    """Set a file's modification time ``seconds`` into the past (past the racy window)."""
    st = os.stat(path)
    os.utime(path, ns=(st.st_atime_ns, st.st_mtime_ns - int(seconds * 1e9)))


def test_fingerprint_cache_reuses_digests_of_unchanged_files(tmp_path, monkeypatch):
    for key in ("north", "south"):
        _write(tmp_path / "x" / f"{key}.parquet", _table(key, _days("2024-01-01", 31)))
        _age(tmp_path / "x" / f"{key}.parquet")
    cache_file = tmp_path / "archive" / ".fingerprints" / "cache.json"
    cache = extracts.FingerprintCache(cache_file)
    first = fingerprint_source(_source("x"), tmp_path, cache=cache)
    assert (cache.hits, cache.misses) == (0, 2)
    cache.save()
    assert cache_file.is_file()

    hashed = []
    real = extracts.fingerprints._hash_file
    monkeypatch.setattr(extracts.fingerprints, "_hash_file", lambda loc, path: hashed.append(path) or real(loc, path))
    again = extracts.FingerprintCache(cache_file)  # a later run: read back from the archive
    second = fingerprint_source(_source("x"), tmp_path, cache=again)
    assert hashed == [] and (again.hits, again.misses) == (2, 0)
    assert second.to_dict() == first.to_dict()
    for f in second.files:
        with open(f.path, "rb") as fh:
            assert f.sha256 == hashlib.sha256(fh.read()).hexdigest()  # source: hashlib

    # a new version of one file (other bytes, other modification time) is hashed again
    _write(tmp_path / "x" / "south.parquet", _table("south", _days("2024-01-01", 30)))
    _age(tmp_path / "x" / "south.parquet", 60.0)
    third = fingerprint_source(_source("x"), tmp_path, cache=again)
    assert [os.path.basename(p) for p in hashed] == ["south.parquet"]
    assert third.digest != first.digest
    with open(tmp_path / "x" / "south.parquet", "rb") as fh:
        assert third.files[1].sha256 == hashlib.sha256(fh.read()).hexdigest()  # source: hashlib


def test_a_file_modified_just_now_is_not_cached(tmp_path):
    _write(tmp_path / "x" / "north.parquet", _table("north", _days("2024-01-01", 31)))  # mtime: now
    cache = extracts.FingerprintCache(tmp_path / "cache.json")
    fingerprint_source(_source("x"), tmp_path, cache=cache)
    fingerprint_source(_source("x"), tmp_path, cache=cache)
    assert (cache.hits, cache.misses) == (0, 2)  # within RACY_SECONDS of hashing: never trusted


def test_an_unreadable_cache_is_an_empty_one(tmp_path):
    _write(tmp_path / "x" / "north.parquet", _table("north", _days("2024-01-01", 31)))
    _age(tmp_path / "x" / "north.parquet")
    (tmp_path / "cache.json").write_text("{not json")
    cache = extracts.FingerprintCache(tmp_path / "cache.json")
    fp = fingerprint_source(_source("x"), tmp_path, cache=cache)
    assert (
        cache.misses == 1
        and fp.files[0].sha256 == hashlib.sha256((tmp_path / "x" / "north.parquet").read_bytes()).hexdigest()
    )


def test_a_cached_file_keeps_its_time_range_so_its_time_column_is_not_read_again(tmp_path, monkeypatch):
    _write(tmp_path / "x" / "north.parquet", _table("north", _days("2024-01-01", 31)))
    _write(tmp_path / "x" / "south.parquet", _table("south", _days("2024-02-01", 10)))
    for name in ("north", "south"):
        _age(tmp_path / "x" / f"{name}.parquet")
    first = fingerprint_source(_source("x"), tmp_path, cache=(cache := extracts.FingerprintCache(tmp_path / "c.json")))
    cache.save()
    assert (first.time_min, first.time_max) == ("2024-01-01T00:00:00", "2024-02-10T00:00:00")  # the data written
    scans = []
    real = extracts.fingerprints._dataset
    monkeypatch.setattr(extracts.fingerprints, "_dataset", lambda loc, paths: scans.append(paths) or real(loc, paths))
    again = fingerprint_source(_source("x"), tmp_path, cache=extracts.FingerprintCache(tmp_path / "c.json"))
    assert scans == [] and again.to_dict() == first.to_dict()  # the manifest's record is the same
    # without a cache the time column is read as before
    assert fingerprint_source(_source("x"), tmp_path).to_dict() == first.to_dict() and len(scans) == 2
