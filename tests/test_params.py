"""The parameter store (fitaudit.tasks.params): immutable, hashed versions and promotion.

The hash is recomputed here with hashlib and json (the outside reference) over the record's
fields; everything else checks file-system behaviour.
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
import threading

import pytest

from fitaudit.tasks._io import write_once
from fitaudit.tasks.params import (
    ParameterStoreError,
    ParameterVersion,
    list_versions,
    production_version,
    promote,
    verify_params,
    write_version,
)

SPEC = {"family": "arima", "order": (1, 0, 1), "seasonal": (0, 1, 1, 7), "trend": "n"}
NOISE = {"law": "student-t", "shape": 5.0}
PARAMS = {"ar1": 0.62, "ma1": -0.4, "sma1": -0.81, "sigma2": 2.5}
LINEAGE = {"run_id": "2026-W49-abc", "extract_digest": "0" * 64, "fit_first": "2024-12-01", "fit_last": "2026-11-30"}


def _write(root, model_id="north-demand", **changes):
    kwargs = dict(spec=SPEC, noise=NOISE, params=PARAMS, status="candidate", created_by="svc-fitaudit", lineage=LINEAGE)
    kwargs.update(changes)
    return write_version(root, model_id, **kwargs)


def _reference_hash(record: dict) -> str:
    """SHA-256 of the sorted-key compact UTF-8 JSON of every field but sha256 (hashlib + json)."""
    content = {k: v for k, v in record.items() if k != "sha256"}
    text = json.dumps(content, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def test_write_and_list(tmp_path):
    first = _write(tmp_path, created_at="2026-12-01T06:00:00Z")
    second = _write(tmp_path, params={**PARAMS, "ar1": 0.6})
    assert (first.version, second.version) == (1, 2)
    path = tmp_path / "params" / "north-demand" / "1.json"
    stored = json.loads(path.read_text(encoding="utf-8"))
    assert stored["sha256"] == first.sha256 == _reference_hash(stored)  # source: hashlib + json
    assert stored["spec"]["order"] == [1, 0, 1] and stored["created_at"] == "2026-12-01T06:00:00Z"
    listed = list_versions(tmp_path, "north-demand")
    assert [v.version for v in listed] == [1, 2]
    assert listed[0] == first and listed[1] == second
    assert isinstance(listed[0], ParameterVersion)
    assert listed[1].params["ar1"] == 0.6
    assert listed[0].to_dict()["sha256"] == first.sha256


def test_params_are_stored_as_floats(tmp_path):
    record = _write(tmp_path, params={"ar1": 1, "sigma2": 2})
    assert record.params == {"ar1": 1.0, "sigma2": 2.0}
    assert all(isinstance(v, float) for v in list_versions(tmp_path, "north-demand")[0].params.values())


def test_production_and_promotion(tmp_path):
    assert production_version(tmp_path, "north-demand") is None
    _write(tmp_path)
    promoted = promote(tmp_path, "north-demand", 1, approved_by="R. Example, Head of Model Risk", note="passed review")
    assert (promoted.version, promoted.status, promoted.promotes) == (2, "promoted", 1)
    assert promoted.params == list_versions(tmp_path, "north-demand")[0].params
    assert promoted.created_by == "R. Example, Head of Model Risk" and promoted.note == "passed review"
    assert promoted.lineage["promoted_sha256"] == list_versions(tmp_path, "north-demand")[0].sha256
    assert production_version(tmp_path, "north-demand") == promoted

    refit = _write(tmp_path, params={**PARAMS, "ar1": 0.5})
    assert production_version(tmp_path, "north-demand") == promoted  # a candidate is not production
    newer = promote(
        tmp_path, "north-demand", refit.version, approved_by="A. Reviewer", note="refit cleared the failure"
    )
    assert production_version(tmp_path, "north-demand").params["ar1"] == 0.5
    rollback = promote(tmp_path, "north-demand", 1, approved_by="A. Reviewer", note="roll back")
    assert [v.version for v in list_versions(tmp_path, "north-demand")] == [1, 2, 3, 4, 5]
    assert production_version(tmp_path, "north-demand") == rollback and newer.version == 4


def test_promotion_refusals(tmp_path):
    _write(tmp_path)
    promote(tmp_path, "north-demand", 1, approved_by="A", note="ok")
    with pytest.raises(ParameterStoreError, match=r"version 1 is already the production version \(record 2\)"):
        promote(tmp_path, "north-demand", 1, approved_by="A", note="again")
    with pytest.raises(ParameterStoreError, match=r"version 2 is already the production version"):
        promote(tmp_path, "north-demand", 2, approved_by="A", note="again")
    with pytest.raises(ParameterStoreError, match=r"has no parameter version 9; stored versions: 1, 2"):
        promote(tmp_path, "north-demand", 9, approved_by="A", note="x")
    with pytest.raises(ParameterStoreError, match=r"needs a non-blank approved_by"):
        promote(tmp_path, "north-demand", 1, approved_by=" ", note="x")
    with pytest.raises(ParameterStoreError, match=r"needs a non-blank note"):
        promote(tmp_path, "north-demand", 1, approved_by="A", note="")


@pytest.mark.parametrize(
    "changes, message",
    [
        ({"status": "production"}, r"status 'production' is not one of 'candidate', 'promoted'"),
        ({"created_by": ""}, r"created_by is blank"),
        ({"params": {"ar1": float("nan")}}, r"parameter 'ar1' = nan is not a finite number"),
        ({"params": {"ar1": "x"}}, r"parameter 'ar1' = 'x' is not a finite number"),
        ({"params": {"ar1": float("inf")}}, r"parameter 'ar1' = inf is not a finite number"),
        ({"promotes": 0}, r"promotes=0 must be a version number"),
    ],
)
def test_write_refusals(tmp_path, changes, message):
    with pytest.raises(ParameterStoreError, match=message):
        _write(tmp_path, **changes)
    assert not (tmp_path / "params" / "north-demand").exists() or not any(
        (tmp_path / "params" / "north-demand").iterdir()
    )


@pytest.mark.parametrize("model_id", ["../escape", "/abs/path", "a/b", "", ".hidden", "x\n", "a\x00b", "<b>"])
def test_unsafe_ids_never_touch_the_file_system(tmp_path, model_id):
    with pytest.raises(ParameterStoreError, match=r"is not a safe name"):
        _write(tmp_path, model_id=model_id)
    with pytest.raises(ParameterStoreError, match=r"is not a safe name"):
        list_versions(tmp_path, model_id)
    assert list(tmp_path.iterdir()) == []


def test_existing_version_is_never_overwritten(tmp_path):
    _write(tmp_path)
    path = tmp_path / "params" / "north-demand" / "1.json"
    before = path.read_bytes()
    with pytest.raises(FileExistsError):
        write_once(path, b"{}")
    assert path.read_bytes() == before


def test_a_writer_that_loses_the_race_takes_the_next_number(tmp_path, monkeypatch):
    import fitaudit.tasks.params as params

    _write(tmp_path)
    first_bytes = (tmp_path / "params" / "north-demand" / "1.json").read_bytes()
    monkeypatch.setattr(params, "_version_numbers", lambda folder: [])  # a stale view: believes 1 is free
    record = _write(tmp_path, params={**PARAMS, "ar1": 0.1})
    assert record.version == 2
    assert (tmp_path / "params" / "north-demand" / "1.json").read_bytes() == first_bytes
    monkeypatch.undo()
    assert [v.params["ar1"] for v in list_versions(tmp_path, "north-demand")] == [0.62, 0.1]


_WRITER = """
import sys
from fitaudit.tasks.params import write_version
root, tag = sys.argv[1], int(sys.argv[2])
for i in range(6):
    write_version(root, "north-demand", spec={"family": "arima"}, noise={"law": "normal", "shape": None},
                  params={"ar1": tag + i / 100}, status="candidate", created_by="writer", lineage={})
"""


def test_concurrent_processes_get_distinct_versions(tmp_path):
    writers = [subprocess.Popen([sys.executable, "-c", _WRITER, str(tmp_path), str(tag)]) for tag in (1, 2, 3)]
    assert [w.wait(timeout=120) for w in writers] == [0, 0, 0]
    stored = list_versions(tmp_path, "north-demand")
    assert [v.version for v in stored] == list(range(1, 19))
    assert sorted(v.params["ar1"] for v in stored) == sorted(t + i / 100 for t in (1, 2, 3) for i in range(6))
    assert verify_params(tmp_path) == []


def test_concurrent_threads_get_distinct_versions(tmp_path):
    errors = []

    def writer(tag):
        try:
            for i in range(10):
                _write(tmp_path, params={"ar1": tag + i / 100})
        except Exception as exc:  # noqa: BLE001 - collected and asserted below
            errors.append(exc)

    threads = [threading.Thread(target=writer, args=(tag,)) for tag in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert [v.version for v in list_versions(tmp_path, "north-demand")] == list(range(1, 41))


def test_tampering_is_detected(tmp_path):
    _write(tmp_path)
    _write(tmp_path)
    path = tmp_path / "params" / "north-demand" / "1.json"
    text = path.read_text(encoding="utf-8")
    path.write_text(text.replace('"ar1": 0.62', '"ar1": 0.63'), encoding="utf-8")
    with pytest.raises(
        ParameterStoreError, match=r"1\.json: content does not match its SHA-256 .*the file was altered"
    ):
        list_versions(tmp_path, "north-demand")
    problems = verify_params(tmp_path)
    assert len(problems) == 1 and "1.json: content does not match its SHA-256" in problems[0]


def test_renamed_file_is_detected(tmp_path):
    _write(tmp_path)
    folder = tmp_path / "params" / "north-demand"
    os.rename(folder / "1.json", folder / "2.json")
    with pytest.raises(
        ParameterStoreError, match=r"2\.json: records model 'north-demand' version 1 but is stored as .*version 2"
    ):
        list_versions(tmp_path, "north-demand")


def test_verify_reports_names_gaps_and_garbage(tmp_path):
    for _ in range(3):
        _write(tmp_path)
    folder = tmp_path / "params" / "north-demand"
    (folder / "2.json").unlink()
    (folder / "notes.txt").write_text("hello")
    (folder / ".3.json.4242.tmp").write_text("left by an interrupted writer")  # ignored
    (tmp_path / "params" / "bad name").mkdir()
    _write(tmp_path, model_id="south-demand")
    (tmp_path / "params" / "south-demand" / "1.json").write_text("{not json")
    problems = verify_params(tmp_path)
    assert any(
        p.endswith("bad name: not a model folder (expected a folder named by a safe model id)") for p in problems
    )
    assert any("notes.txt: unexpected name" in p for p in problems)
    assert any("version(s) 2 missing from the numbering" in p for p in problems)
    assert any("south-demand/1.json: cannot be read as JSON" in p for p in problems)
    assert len(problems) == 4


def test_verify_empty_archive(tmp_path):
    assert verify_params(tmp_path) == []
