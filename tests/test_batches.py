"""Staging (fitaudit.tasks.batches): stale extracts, dated exports and row filters.

A source whose last observation lags the as-of date by more than its ``max_staleness`` periods
gives its models an ``insufficient`` problem naming the last timestamp, the as-of date and the
fix, instead of a length problem; the periods are counted on the source's calendar (pandas'
business-day offset for ``B``).
"""

from __future__ import annotations

import datetime as dt
import os
import pathlib
import sys

import numpy as np
import pandas as pd
import pytest

sys.path.insert(0, __import__("os").path.dirname(__file__))
from fleet_fixtures import AS_OF, Fleet, ar1, days, long_table, write_parquet  # noqa: E402

from fitaudit.tasks import batches, batchfiles  # noqa: E402
from fitaudit.tasks.registry import load_registry  # noqa: E402


def _staged(tmp_path, series: dict, as_of: dt.date, **source_extra):
    fleet = Fleet(tmp_path)
    write_parquet(tmp_path / "data" / "x.parquet", long_table(series))
    fleet.source("x", "data/x.parquet", **source_extra)
    for k in series:
        fleet.model(f"m-{k}", "x", k)
    reg = load_registry(fleet.write())
    return batches.stage_inputs(reg, as_of, tmp_path / "work")


def _stage(tmp_path, series: dict, as_of: dt.date, **source_extra):
    staged = _staged(tmp_path, series, as_of, **source_extra)
    return {i.model_id: i for b in staged.batches for i in batchfiles.read_batch(b.path)}


def _stale(item) -> list[dict]:
    return [p for p in item.problems if p["kind"] == batches.STALE]


def test_a_week_stale_extract_names_the_staleness_not_the_history(tmp_path):
    rng = np.random.default_rng(5)
    items = _stage(tmp_path, {"a": {"date": days(), "y": ar1(rng)}}, AS_OF + dt.timedelta(days=7))
    (problem,) = items["m-a"].problems  # the staleness alone, no "extend the extract's history"
    assert problem["kind"] == batches.STALE and problem["severity"] == "insufficient"
    last = str(AS_OF)  # the fixture's last day of data
    as_of = str(AS_OF + dt.timedelta(days=7))
    assert f"last observation of series 'a' is {last}" in problem["message"]
    assert (
        f"7 period(s) of frequency 'D' before the as-of date {as_of}" in problem["message"]
    )  # 7 days  # common practice
    assert "Fix: refresh the extract" in problem["message"] and "max_staleness" in problem["message"]


@pytest.mark.parametrize("lag, stale", [(0, False), (1, False), (2, True)])
def test_default_allows_one_period(tmp_path, lag, stale):
    rng = np.random.default_rng(6)
    items = _stage(tmp_path, {"a": {"date": days(), "y": ar1(rng)}}, AS_OF + dt.timedelta(days=lag))
    assert bool(_stale(items["m-a"])) == stale


def test_max_staleness_is_the_sources_setting(tmp_path):
    rng = np.random.default_rng(7)
    items = _stage(tmp_path, {"a": {"date": days(), "y": ar1(rng)}}, AS_OF + dt.timedelta(days=7), max_staleness=7)
    assert _stale(items["m-a"]) == [] and items["m-a"].problems == ()


def test_business_days_count_no_weekend_as_late(tmp_path):
    # source: pandas.bdate_range (pandas 3.1.1): 240 business days ending on a Friday
    grid = pd.bdate_range(end="2026-08-28", periods=240)  # 2026-08-28 is a Friday  # common practice
    assert grid[-1].day_name() == "Friday"
    series = {"a": {"date": grid.to_numpy().astype("datetime64[us]"), "y": ar1(np.random.default_rng(8), n=240)}}
    monday = dt.date(2026, 8, 31)
    assert (
        _stale(_stage(tmp_path / "mon", series, monday, frequency="B")["m-a"]) == []
    )  # Sat, Sun skipped; Monday's row may lag
    (problem,) = _stale(_stage(tmp_path / "tue", series, monday + dt.timedelta(days=1), frequency="B")["m-a"])
    assert "is 2026-08-28, 2 period(s) of frequency 'B' before the as-of date 2026-09-01" in problem["message"]
    # a holiday on the Monday is not a period either
    assert (
        _stale(
            _stage(tmp_path / "hol", series, monday + dt.timedelta(days=1), frequency="B", holidays=["2026-08-31"])[
                "m-a"
            ]
        )
        == []
    )


def _stage_run(tmp_path, series: dict, as_of: dt.date, policy_days=None, **source_extra):
    fleet = Fleet(tmp_path)
    write_parquet(tmp_path / "data" / "x.parquet", long_table(series))
    fleet.source("x", "data/x.parquet", **source_extra)
    if policy_days is not None:
        fleet.policy["max_staleness_days"] = policy_days
    for k in series:
        fleet.model(f"m-{k}", "x", k)
    reg = load_registry(fleet.write())
    staged = batches.stage_inputs(reg, as_of, tmp_path / "work")
    return staged, {i.model_id: i for b in staged.batches for i in batchfiles.read_batch(b.path)}


@pytest.mark.parametrize("lag, policy_days, stale", [(7, 7, False), (8, 7, True), (2, 7, False), (2, None, True)])
def test_the_policy_sets_a_staleness_in_days_for_every_source(tmp_path, lag, policy_days, stale):
    # 7 days of a daily calendar are 7 periods  # common practice
    rng = np.random.default_rng(10)
    staged, items = _stage_run(
        tmp_path, {"a": {"date": days(), "y": ar1(rng)}}, AS_OF + dt.timedelta(days=lag), policy_days
    )
    assert bool(_stale(items["m-a"])) == stale
    assert bool(staged.stale_sources) == stale


def test_the_policys_days_never_shorten_a_calendar_period(tmp_path):
    # a month-end source audited 20 days after its last month end: one period late, within the
    # default of one period even though the policy allows only 7 days
    # source: pandas.date_range(freq="ME") (pandas 3.1.1)  # common practice
    grid = pd.date_range(end="2026-10-31", periods=120, freq="ME")
    series = {"a": {"date": grid.to_numpy().astype("datetime64[us]"), "y": ar1(np.random.default_rng(12), n=120)}}
    staged, items = _stage_run(tmp_path, series, dt.date(2026, 11, 20), policy_days=7, frequency="ME")
    assert _stale(items["m-a"]) == [] and staged.stale_sources == {}


def test_a_sources_own_max_staleness_overrides_the_policy(tmp_path):
    rng = np.random.default_rng(13)
    staged, items = _stage_run(
        tmp_path, {"a": {"date": days(), "y": ar1(rng)}}, AS_OF + dt.timedelta(days=5), policy_days=30, max_staleness=2
    )
    (problem,) = _stale(items["m-a"])
    assert "at most 2 allowed" in problem["message"] and "max_staleness_days" in problem["message"]


def test_stale_sources_are_listed_once_with_their_models(tmp_path):
    rng = np.random.default_rng(14)
    series = {k: {"date": days(), "y": ar1(rng)} for k in ("a", "b", "c")}
    as_of = AS_OF + dt.timedelta(days=7)
    staged, items = _stage_run(tmp_path, series, as_of)
    assert list(staged.stale_sources) == ["x"]
    listed = staged.stale_sources["x"]
    assert listed["models"] == ["m-a", "m-b", "m-c"] and listed["as_of"] == as_of.isoformat()
    assert listed["last"].startswith(str(AS_OF)) and listed["allowed"] == 1 and listed["frequency"] == "D"
    assert staged.to_dict()["stale_sources"] == {"x": listed}


def test_holidays_from_a_holiday_file_are_no_periods(tmp_path):
    # source: pandas.bdate_range (pandas 3.1.1): 240 business days ending on Friday 2026-08-28
    grid = pd.bdate_range(end="2026-08-28", periods=240)  # common practice
    series = {"a": {"date": grid.to_numpy().astype("datetime64[us]"), "y": ar1(np.random.default_rng(15), n=240)}}
    (tmp_path / "hol").mkdir()
    (tmp_path / "hol" / "holidays.txt").write_text(
        "# bank holidays of our fictional calendar\n2026-08-31, late-summer holiday\n\n2026-12-25 Christmas\n",
        encoding="utf-8",
    )
    tuesday = dt.date(2026, 9, 1)
    _, items = _stage_run(tmp_path / "hol", series, tuesday, frequency="B", holiday_file="holidays.txt")
    assert _stale(items["m-a"]) == []  # Saturday, Sunday and the Monday holiday are skipped


def test_a_source_stale_beyond_the_span_read_names_its_own_last_timestamp(tmp_path):
    rng = np.random.default_rng(9)
    items = _stage(tmp_path, {"a": {"date": days(), "y": ar1(rng)}}, AS_OF + dt.timedelta(days=2000))
    (problem,) = _stale(items["m-a"])
    assert f"last observation of the source is {AS_OF}" in problem["message"]


# ------------------------------------------------------------------------------------------
# dated exports: an as-of template in the uri, a declarative row filter


def _dated_fleet(tmp_path, uri: str, **source_extra):
    """Two dated export folders, each holding series a and b up to its own date."""
    rng = np.random.default_rng(11)
    full = {
        k: {"date": days(), "y": ar1(rng), "region": np.array(["north" if k == "a" else "south"] * 240, dtype=object)}
        for k in ("a", "b")
    }
    for lag in (0, 1):
        day = AS_OF - dt.timedelta(days=lag)
        n = 240 - lag
        cut = {k: {c: v[:n] for c, v in cols.items()} for k, cols in full.items()}
        write_parquet(tmp_path / "exports" / day.strftime("%Y%m%d") / "sales.parquet", long_table(cut))
    fleet = Fleet(tmp_path)
    fleet.source("x", uri, **source_extra)
    for k in ("a", "b"):
        fleet.model(f"m-{k}", "x", k)
    return load_registry(fleet.write())


def test_a_dated_uri_reads_the_as_of_folder_and_the_manifest_names_it(tmp_path):
    reg = _dated_fleet(tmp_path, "exports/{as_of:%Y%m%d}/sales.parquet")
    for as_of, rows in ((AS_OF, 240), (AS_OF - dt.timedelta(days=1), 239)):
        staged = batches.stage_inputs(reg, as_of, tmp_path / f"work-{as_of}")
        fp = staged.fingerprints["x"]
        assert fp["uri"] == f"exports/{as_of:%Y%m%d}/sales.parquet"  # the resolved uri
        assert fp["uri_template"] == "exports/{as_of:%Y%m%d}/sales.parquet"
        assert [pathlib.Path(f["path"]).parent.name for f in fp["files"]] == [f"{as_of:%Y%m%d}"]
        assert fp["rows"] == 2 * rows
        items = {i.model_id: i for b in staged.batches for i in batchfiles.read_batch(b.path)}
        assert items["m-a"].problems == () and str(items["m-a"].time[-1])[:10] == str(as_of)
    # no folder for the date: every model of the source gets an error naming the resolved uri
    late = AS_OF + dt.timedelta(days=1)
    staged = batches.stage_inputs(reg, late, tmp_path / "work-late")
    items = {i.model_id: i for b in staged.batches for i in batchfiles.read_batch(b.path)}
    (problem,) = items["m-b"].problems
    assert problem["severity"] == "error"
    assert f"uri 'exports/{late:%Y%m%d}/sales.parquet'" in problem["message"] and "does not exist" in problem["message"]


def test_a_plain_uri_records_no_template(tmp_path):
    reg = _dated_fleet(tmp_path, f"exports/{AS_OF:%Y%m%d}/sales.parquet")
    fp = batches.stage_inputs(reg, AS_OF, tmp_path / "work").fingerprints["x"]
    assert "uri_template" not in fp and fp["uri"] == f"exports/{AS_OF:%Y%m%d}/sales.parquet"


def test_a_row_filter_keeps_only_its_rows(tmp_path):
    reg = _dated_fleet(tmp_path, "exports/{as_of:%Y%m%d}/sales.parquet", filter=[["region", "in", ["north"]]])
    items = {
        i.model_id: i
        for b in batches.stage_inputs(reg, AS_OF, tmp_path / "work").batches
        for i in batchfiles.read_batch(b.path)
    }
    assert items["m-a"].problems == () and items["m-a"].y.size == 200
    assert items["m-b"].y.size == 0  # the filter dropped series b: reported as absent, not audited
    assert items["m-b"].problems and all(p["severity"] in ("error", "insufficient") for p in items["m-b"].problems)


@pytest.mark.parametrize(
    "term, needle",
    [
        (["colour", "=", "red"], "the filter column 'colour' is in none of the files"),
        (["y", ">=", "high"], "the filter term [y, >=, 'high'] does not apply to column 'y' of type double"),
    ],
)
def test_a_broken_row_filter_is_a_per_source_error(tmp_path, term, needle):
    reg = _dated_fleet(tmp_path, "exports/{as_of:%Y%m%d}/sales.parquet", filter=[term])
    staged = batches.stage_inputs(reg, AS_OF, tmp_path / "work")
    assert needle in staged.source_errors["x"] and "Fix: " in staged.source_errors["x"]
    items = {i.model_id: i for b in staged.batches for i in batchfiles.read_batch(b.path)}
    assert all(any(needle in p["message"] for p in items[m].problems) for m in ("m-a", "m-b"))


def test_staging_keeps_the_fingerprint_cache_in_the_archive(tmp_path, monkeypatch):
    from fitaudit.tasks import extracts

    reg = _dated_fleet(tmp_path, f"exports/{AS_OF:%Y%m%d}/sales.parquet")
    data = tmp_path / "exports" / f"{AS_OF:%Y%m%d}" / "sales.parquet"
    st = data.stat()
    os.utime(data, ns=(st.st_atime_ns, st.st_mtime_ns - 3_600_000_000_000))  # an hour old: past the racy window
    archive = tmp_path / "archive"
    first = batches.stage_inputs(reg, AS_OF, tmp_path / "w1", archive_root=archive)
    assert (archive / batches.FINGERPRINT_CACHE).is_file()
    hashed = []
    real = extracts.fingerprints._hash_file
    monkeypatch.setattr(extracts.fingerprints, "_hash_file", lambda loc, path: hashed.append(path) or real(loc, path))
    second = batches.stage_inputs(
        reg, AS_OF, tmp_path / "w2", archive_root=archive, model_ids=["m-a"]
    )  # a one-model refit
    assert hashed == []  # the digest came from the cache
    assert second.fingerprints["x"] == first.fingerprints["x"]  # the manifest's record is the same


def test_reading_some_models_of_a_batch_gives_their_full_items_in_batch_order(tmp_path):
    """``read_batch(path, model_ids)`` (the candidate search reads a few models per batch) equals
    the full read filtered: same entries, arrays and metadata, in the batch's order."""
    rng = np.random.default_rng(8)
    (batch,) = _staged(tmp_path, {k: {"date": days(), "y": ar1(rng)} for k in "abcd"}, AS_OF).batches
    full = batchfiles.read_batch(batch.path)
    some = batchfiles.read_batch(batch.path, ["m-d", "m-b"])
    assert [i.model_id for i in some] == ["m-b", "m-d"]
    by_id = {i.model_id: i for i in full}
    for item in some:
        ref = by_id[item.model_id]
        assert item.entry == ref.entry and item.lineage == ref.lineage and item.problems == ref.problems
        np.testing.assert_array_equal(item.y, ref.y)
        np.testing.assert_array_equal(item.time, ref.time)
    assert [m["entry"].id for m in batchfiles.batch_metadata(batch.path, {"m-c"})] == ["m-c"]
    assert batchfiles.read_batch(batch.path, []) == []


def test_batch_arrays_are_packed_per_dtype_and_come_back_equal(tmp_path):
    from fitaudit.tasks.batchfiles import _pack, _unpack

    rng = np.random.default_rng(3)
    arrays = {
        "0/y": rng.normal(size=730),
        "0/t": np.arange("2024-12-01", "2026-12-01", dtype="datetime64[D]").astype("datetime64[ns]")[:730],
        "0/x/0": rng.normal(size=730),
        "1/y": np.array([np.nan, np.inf, -0.0]),  # values kept bit for bit
        "1/t": np.array([], dtype="datetime64[ns]"),
        "1/f/0": rng.normal(size=(4, 3)),  # a 2-D array keeps its shape
        "2/y": np.array(5.0),  # and a 0-D one
    }
    path = tmp_path / "batch.npz"
    np.savez(path, **_pack(arrays))
    with np.load(path, allow_pickle=False) as loaded:
        assert len(loaded.files) == 4 + 2  # the index and one buffer per dtype (float64, datetime64[ns])
        back = _unpack(loaded)
    assert list(back) == list(arrays)
    for name, a in arrays.items():
        # source: the arrays written (np.savez of each on its own was the previous format)
        assert back[name].dtype == a.dtype and back[name].shape == a.shape, name
        assert back[name].tobytes() == a.tobytes(), name
