"""Null tables kept between runs (tasks/table_store.py, docs/architecture.md §2.4).

A kept table must be the table the code would simulate, bit for bit; a file written by other
code, a damaged file or a folder that cannot be written must only cost the saving, never a result.
"""

from __future__ import annotations

import dataclasses
import pathlib
import pickle

import numpy as np
import pytest

from fitaudit.core.calibration import (
    CalibrationCache,
    NullTable,
    StatisticTable,
    independence_table,
    production_table,
    settings_refit_table,
)
from fitaudit.core.cells import number_of_cells
from fitaudit.core.divergence import DEFAULT_ALPHAS, DEFAULT_BETAS
from fitaudit.core.noise import get_law
from fitaudit.core.settings import AuditSettings
from fitaudit.tasks import table_store
from fitaudit.tasks.table_store import TABLE_FOLDER, FolderTableStore, archive_tables

GRID = (DEFAULT_ALPHAS, DEFAULT_BETAS, "geometric", None)
SETTINGS = AuditSettings(replicates=99)


def _refit_t(cache: CalibrationCache, shape: float = 7.3) -> NullTable:
    """A student-t refit table at an estimated shape, with the default gate: the kind a batch
    builds on demand (every array field of a NullTable is set)."""
    law, n = get_law("student-t"), 120
    k = law.n_estimated(True)
    return settings_refit_table(
        SETTINGS, law, n, number_of_cells(n, k), True, SETTINGS.gate(n, k), shape=shape, cache=cache
    )


def _same(a, b) -> bool:
    fields = [f.name for f in dataclasses.fields(a)]
    return type(a) is type(b) and all(
        np.array_equal(getattr(a, f), getattr(b, f))
        if isinstance(getattr(a, f), np.ndarray)
        else getattr(a, f) == getattr(b, f)
        for f in fields
    )


def _tables(cache: CalibrationCache) -> list:
    return [
        production_table(56, 8, *GRID, 99, 3, cache),
        _refit_t(cache),
        independence_table(56, 10, 99, 3, cache),
    ]


def test_a_kept_table_is_the_simulated_table_bit_for_bit(tmp_path):
    plain = _tables(CalibrationCache())
    store = FolderTableStore(tmp_path / TABLE_FOLDER)
    first = CalibrationCache(store=store)
    built = _tables(first)
    assert (first.builds, first.reused) == (3, frozenset()) and len(list(store.folder.glob("*.npz"))) == 3
    second = CalibrationCache(store=store)
    kept = _tables(second)
    assert second.builds == 0 and second.reused == {t.key for t in kept}  # nothing simulated again
    for p, b, k in zip(plain, built, kept):
        assert _same(p, b) and _same(p, k)
    assert isinstance(kept[1], NullTable) and kept[1].has_gate and isinstance(kept[2], StatisticTable)


def test_a_merged_cache_brings_which_of_its_tables_were_reused(tmp_path):
    store = FolderTableStore(tmp_path)
    _refit_t(CalibrationCache(store=store))
    worker = CalibrationCache(store=store)  # as a worker process's copy that read a kept table
    kept = _refit_t(worker)
    built = production_table(56, 8, *GRID, 99, 3, worker)
    flow = CalibrationCache()
    flow.merge(worker)
    assert len(flow) == 2 and flow.reused == {kept.key} and built.key not in flow.reused


def test_a_table_of_another_key_is_never_taken(tmp_path):
    store = FolderTableStore(tmp_path)
    _refit_t(CalibrationCache(store=store), shape=7.3)
    other = CalibrationCache(store=store)
    _refit_t(other, shape=4.1)  # another shape key: simulated, not loaded
    assert (other.builds, other.reused) == (1, frozenset())


def test_tables_written_by_other_code_are_not_used(tmp_path, monkeypatch):
    store = FolderTableStore(tmp_path)
    reference = _refit_t(CalibrationCache(store=store))
    monkeypatch.setattr(table_store, "code_digest", lambda: "0" * 64)  # as if core had changed
    changed = CalibrationCache(store=store)
    assert _same(_refit_t(changed), reference) and (changed.builds, changed.reused) == (1, frozenset())
    # a file whose name matches but whose contents name other code is not used either
    path = store._path(reference.key)
    for f in store.folder.glob("*.npz"):
        if f != path:
            f.replace(path)  # the first run's file under the changed code's name
    assert store.load(reference.key) is None


def test_the_code_digest_changes_with_a_core_source_or_a_library_version(monkeypatch):
    digest = table_store.code_digest()
    assert table_store.code_digest() is digest  # computed once per process
    assert table_store.code_digest.__wrapped__() == digest  # the same sources give the same digest
    read = pathlib.Path.read_bytes
    edited = lambda path: read(path) + (b"#" if path.name == "calibration.py" else b"")  # noqa: E731
    monkeypatch.setattr(pathlib.Path, "read_bytes", edited)
    assert table_store.code_digest.__wrapped__() != digest  # a core source edited
    monkeypatch.undo()
    monkeypatch.setattr(np, "__version__", "0.0")
    assert table_store.code_digest.__wrapped__() != digest  # another numpy


@pytest.mark.parametrize("damage", [b"", b"not a zip file", b"PK\x03\x04 truncated"])
def test_a_damaged_file_is_simulated_again_and_replaced(tmp_path, damage):
    store = FolderTableStore(tmp_path)
    reference = _refit_t(CalibrationCache(store=store))
    path = store._path(reference.key)
    path.write_bytes(damage)
    again = CalibrationCache(store=store)
    assert _same(_refit_t(again), reference) and (again.builds, again.reused) == (1, frozenset())
    assert _same(store.load(reference.key), reference)  # the rebuilt table was written back


@pytest.mark.parametrize("meta", ["[1, 2]", '{"kind": "other"}', "not json"])
def test_a_file_with_foreign_contents_is_not_used(tmp_path, meta):
    store = FolderTableStore(tmp_path)
    reference = _refit_t(CalibrationCache(store=store))
    with open(store._path(reference.key), "wb") as f:
        np.savez(f, meta=np.array(meta), reference=reference.reference, r_max=reference.r_max)
    assert store.load(reference.key) is None


def test_a_folder_that_cannot_be_written_only_loses_the_saving(tmp_path):
    blocker = tmp_path / "file"
    blocker.write_text("a file where the folder should be")
    cache = CalibrationCache(store=FolderTableStore(blocker / TABLE_FOLDER))
    assert _same(_refit_t(cache), _refit_t(CalibrationCache())) and cache.builds == 1
    assert blocker.read_text() == "a file where the folder should be"


def test_a_file_holds_no_pickle(tmp_path):
    store = FolderTableStore(tmp_path)
    table = _refit_t(CalibrationCache(store=store))
    with np.load(store._path(table.key), allow_pickle=False) as data:  # raises if any array were pickled
        assert set(data.files) == {"meta", "reference", "r_max", "gate_reference", "gate_max"}
    assert not list(tmp_path.glob("*.tmp"))  # written under a temporary name, then renamed


def test_a_cache_with_its_store_reaches_worker_processes_by_pickle(tmp_path):
    cache = pickle.loads(pickle.dumps(CalibrationCache(store=FolderTableStore(tmp_path))))
    _refit_t(cache)
    assert cache.store == FolderTableStore(tmp_path) and len(list(tmp_path.glob("*.npz"))) == 1


def test_the_archive_store_follows_the_setting(tmp_path):
    assert archive_tables(tmp_path) == FolderTableStore(tmp_path / ".tables")
    assert archive_tables(tmp_path, reuse=False) is None


# -- claimed tables: the candidate lanes build each table once ---------------------------------


def _claimed(tmp_path) -> table_store.ClaimedTableStore:
    return table_store.ClaimedTableStore(FolderTableStore(tmp_path / "tables"), tmp_path / "claims")


def test_a_claimed_table_two_processes_need_at_once_is_built_once(tmp_path, monkeypatch):
    """Two caches (two lanes) need the same student-t table at once: the one that claims it builds
    it, the other waits for it and reads it; both hold the table a plain cache simulates."""
    import threading

    from fitaudit.core import calibration

    store = _claimed(tmp_path)
    started, release = threading.Event(), threading.Event()
    real = calibration.NullTable.from_replicates

    def slow_build(*args, **kwargs):  # the first build holds its claim until the second cache has asked
        started.set()
        assert release.wait(30)
        return real(*args, **kwargs)

    waiting = threading.Event()
    real_wait = table_store.ClaimedTableStore._wait

    def wait(self, name):
        waiting.set()
        return real_wait(self, name)

    monkeypatch.setattr(calibration.NullTable, "from_replicates", slow_build)
    monkeypatch.setattr(table_store.ClaimedTableStore, "_wait", wait)
    first, second = CalibrationCache(store=store), CalibrationCache(store=store)
    builder = threading.Thread(target=_refit_t, args=(first,))
    builder.start()
    assert started.wait(30)
    waiter_result = {}
    waiter = threading.Thread(target=lambda: waiter_result.update(table=_refit_t(second)))
    waiter.start()
    assert waiting.wait(30)  # the second cache found the table claimed and waits for it
    release.set()
    builder.join(30)
    waiter.join(30)
    monkeypatch.setattr(calibration.NullTable, "from_replicates", real)
    assert (first.builds, second.builds) == (1, 0)  # the second read the first's table
    assert _same(waiter_result["table"], _refit_t(CalibrationCache()))
    assert len(list((tmp_path / "claims").glob("*.done"))) == 1


def test_a_failed_build_releases_its_claim_and_a_gone_claimant_is_not_waited_for(tmp_path, monkeypatch):
    from fitaudit.core import calibration

    store = _claimed(tmp_path)
    real = calibration.NullTable.from_replicates

    def failing(*args, **kwargs):
        raise MemoryError("no room for the replicates")

    monkeypatch.setattr(calibration.NullTable, "from_replicates", failing)
    with pytest.raises(MemoryError):
        _refit_t(CalibrationCache(store=store))
    monkeypatch.setattr(calibration.NullTable, "from_replicates", real)
    sleeps = []

    def sleep(seconds):  # a wait would loop here: fail at once instead
        sleeps.append(seconds)
        raise AssertionError("waited for a claim that should not be waited for")

    monkeypatch.setattr(table_store.time, "sleep", sleep)
    cache = CalibrationCache(store=store)
    assert _same(_refit_t(cache), _refit_t(CalibrationCache())) and cache.builds == 1  # released: built here
    assert not sleeps

    # a claim left by a process of this host that is gone (its pid is no longer running)
    other = _claimed(tmp_path / "other")
    key = _refit_t(CalibrationCache()).key
    (tmp_path / "other" / "claims").mkdir(parents=True)
    gone = _finished_pid()
    (tmp_path / "other" / "claims" / other.store.name(key)).write_text(f"{table_store.socket.gethostname()} {gone}")
    cache = CalibrationCache(store=other)
    assert _same(_refit_t(cache), _refit_t(CalibrationCache())) and cache.builds == 1
    assert not sleeps  # not waited for


def _finished_pid() -> int:
    """The pid of a child process that has exited and been reaped."""
    import subprocess
    import sys

    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def test_a_claimed_store_reaches_worker_processes_by_pickle(tmp_path):
    store = _claimed(tmp_path)
    assert pickle.loads(pickle.dumps(store)) == store
