"""The tamper-evident archive: publication, hash chain, verification, sign-off, retention, path safety.

Expected hashes are recomputed here with :mod:`hashlib` (SHA-256, FIPS 180-4) and :mod:`json`
directly, not with the archive's helpers, so the archive's own hashing is checked against an
outside implementation.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import pathlib
import re
import shutil
import threading

import pytest

from fitaudit.core.exceptions import InputError
from fitaudit.tasks import archive
from fitaudit.tasks import params as param_store
from fitaudit.tasks.archive import ArchiveError

SHA256_ABC = (
    "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"  # source: FIPS 180-2 Appendix B.1 ("abc")
)


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _canonical(obj) -> bytes:
    """Canonical JSON as docs/architecture.md §3.9 defines it: sorted keys, compact separators, UTF-8."""
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


def _publish(root, run_id: str, as_of: dt.date, extra: dict[str, bytes] | None = None):
    with archive.open_run(root, run_id, as_of.year) as run:
        run.write_text("index.html", f"<html><title>{run_id}</title></html>")
        run.write_text("models/m1.html", "<p>model 1</p>")
        run.write_text("models/m2.html", "<p>model 2</p>")
        run.write_json("results.json", {"schema_version": 1, "models": {"m1": {"verdict": "pass", "t_max": 1.5}}})
        run.write_bytes("results.parquet", b"PAR1" + run_id.encode() + b"PAR1")
        for name, data in (extra or {}).items():
            run.write_bytes(name, data)
        return run.finish({"operator": "svc-audit", "tool_version": "0.1.0", "counts": {"registered": 2, "pass": 2}})


def _write_params(root: pathlib.Path, model: str, values: dict) -> tuple[str, str]:
    """A candidate version and its promotion, through the parameter store; returns the promotion's path and hash."""
    param_store.write_version(
        root,
        model,
        spec={"family": "arima", "order": [1, 0, 0]},
        noise={"law": "normal"},
        params=values,
        status="candidate",
        created_by="svc-audit",
        lineage={"run_id": "r1"},
    )
    promoted = param_store.promote(root, model, 1, approved_by="Head of model risk", note="validated")
    return f"params/{model}/{promoted.version}.json", promoted.sha256


def _rewrite_params(root: pathlib.Path, rel: str, **changes) -> None:
    """Edit a parameter file and recompute its sha256 field, as a careful forger would."""
    record = json.loads((root / rel).read_bytes())
    record.update(changes)
    record.pop("sha256")
    record["sha256"] = _sha(_canonical(record))
    (root / rel).write_text(
        json.dumps(record, sort_keys=True, ensure_ascii=False, indent=2, separators=(",", ": ")) + "\n"
    )


@pytest.fixture
def populated(tmp_path):
    """Three runs over two years, a promotion, a sign-off and a purge of the oldest run."""
    root = tmp_path / "archive"
    runs = {
        "old": _publish(root, "20251229-T220000Z-aaaa", dt.date(2025, 12, 29)),
        "mid": _publish(root, "20260105-T220000Z-bbbb", dt.date(2026, 1, 5)),
        "new": _publish(root, "20260112-T220000Z-cccc", dt.date(2026, 1, 12)),
    }
    rel, digest = _write_params(root, "arima-sales", {"phi": 0.5, "sigma": 1.25})
    archive.append_chain(
        root, "promotion", {"path": rel, "sha256": digest, "model_id": "arima-sales", "version": 2, "promotes": 1}
    )
    archive.record_signoff(root, runs["mid"].run_id, name="A. Reviewer", role="model validator", note="checked")
    archive.purge_runs(root, before=dt.date(2026, 1, 1), reason="retention: one year", approved_by="Records officer")
    return root, runs


def _chain_lines(root) -> list[bytes]:
    return (root / "chain.jsonl").read_bytes().splitlines(keepends=True)


def _set_chain_lines(root, lines: list[bytes]) -> None:
    (root / "chain.jsonl").write_bytes(b"".join(lines))


def _flip_byte(path: pathlib.Path, index: int = 5) -> None:
    data = bytearray(path.read_bytes())
    data[index] ^= 0x01
    path.write_bytes(bytes(data))


# ------------------------------------------------------------------------------------------
# an untouched archive


def test_untouched_archive_verifies_clean(populated):
    root, _ = populated
    assert archive.verify_archive(root) == []
    assert archive.verify_archive(root, include_notes=True) == []
    assert archive.recover(root) == []


def test_chain_entries_recompute_with_hashlib(populated):
    root, runs = populated
    entries = [json.loads(line) for line in _chain_lines(root)]
    assert [e["kind"] for e in entries] == ["run", "run", "run", "promotion", "signoff", "purge"]
    prev = "0" * 64  # genesis value (docs/architecture.md §3.4)
    for seq, entry in enumerate(entries, start=1):
        body = {k: v for k, v in entry.items() if k != "hash"}
        assert entry["hash"] == _sha(_canonical(body))
        assert entry["prev"] == prev and entry["seq"] == seq
        prev = entry["hash"]
    assert (
        entries[1]["payload"]["manifest_sha256"]
        == _sha((runs["mid"].path / "manifest.json").read_bytes())
        == runs["mid"].manifest_sha256
    )
    assert archive.read_chain(root) == entries
    promoted = json.loads((root / entries[3]["payload"]["path"]).read_bytes())
    assert (
        entries[3]["payload"]["sha256"]
        == promoted["sha256"]
        == _sha(_canonical({k: v for k, v in promoted.items() if k != "sha256"}))
    )


def test_manifest_lists_every_file_with_hashlib_digests(tmp_path):
    root = tmp_path / "archive"
    published = _publish(root, "20260105-T220000Z-dddd", dt.date(2026, 1, 5), extra={"abc.txt": b"abc"})
    manifest = json.loads((published.path / "manifest.json").read_bytes())
    assert manifest["files"]["abc.txt"] == {"sha256": SHA256_ABC, "size": 3}
    on_disk = {p.relative_to(published.path).as_posix() for p in published.path.rglob("*") if p.is_file()}
    assert set(manifest["files"]) == on_disk - {"manifest.json"}
    for rel, info in manifest["files"].items():
        data = (published.path / rel).read_bytes()
        assert info == {"sha256": _sha(data), "size": len(data)}
    assert manifest["run_id"] == published.run_id and manifest["as_of"] == "2026-01-05"
    assert manifest["schema_version"] == archive.MANIFEST_SCHEMA_VERSION and manifest["operator"] == "svc-audit"
    assert published.path == root / "runs" / "2026" / published.run_id
    assert json.loads((published.path / "results.json").read_bytes())["models"]["m1"]["t_max"] == 1.5


def test_list_runs_reports_counts_signoffs_and_purges(populated):
    root, runs = populated
    listing = archive.list_runs(root)
    assert [r["run_id"] for r in listing] == [runs[k].run_id for k in ("old", "mid", "new")]
    assert [r["purged"] for r in listing] == [True, False, False]
    assert listing[0]["counts"] is None and listing[1]["counts"] == {"registered": 2, "pass": 2}
    assert [s["name"] for s in listing[1]["signoffs"]] == ["A. Reviewer"]
    assert listing[1]["signoffs"][0]["report_sha256"] == _sha((runs["mid"].path / "index.html").read_bytes())
    assert listing[2]["as_of"] == "2026-01-12" and listing[2]["path"] == f"runs/2026/{runs['new'].run_id}"


def test_purge_logs_one_entry_and_removes_the_folders(populated):
    root, runs = populated
    purge = archive.read_chain(root)[-1]
    assert purge["kind"] == "purge"
    assert purge["payload"]["runs"] == [
        {
            "run_id": runs["old"].run_id,
            "path": f"runs/2025/{runs['old'].run_id}",
            "manifest_sha256": runs["old"].manifest_sha256,
        }
    ]
    assert purge["payload"]["approved_by"] == "Records officer" and purge["payload"]["before"] == "2026-01-01"
    assert not runs["old"].path.exists() and runs["mid"].path.exists()
    assert archive.purge_runs(root, before=dt.date(2026, 1, 1), reason="again", approved_by="x") is None
    assert len(archive.read_chain(root)) == 6


# ------------------------------------------------------------------------------------------
# tampering: every case must be reported, naming the file or chain line


def _new_run_then_drop_last_line(root, runs):
    _publish(root, "20260119-T220000Z-eeee", dt.date(2026, 1, 19))
    _set_chain_lines(root, _chain_lines(root)[:-1])


TAMPERING = {
    "byte changed in index.html": (
        lambda root, runs: _flip_byte(runs["mid"].path / "index.html"),
        "changed",
        "{mid}/index.html",
    ),
    "byte changed in nested page": (
        lambda root, runs: _flip_byte(runs["new"].path / "models" / "m2.html"),
        "changed",
        "{new}/models/m2.html",
    ),
    "byte changed in results.parquet": (
        lambda root, runs: _flip_byte(runs["new"].path / "results.parquet", 0),
        "changed",
        "{new}/results.parquet",
    ),
    "byte changed in manifest.json": (
        lambda root, runs: _flip_byte(runs["new"].path / "manifest.json", 30),
        "changed",
        "{new}/manifest.json",
    ),
    "file deleted": (
        lambda root, runs: (runs["mid"].path / "models" / "m1.html").unlink(),
        "missing",
        "{mid}/models/m1.html",
    ),
    "manifest deleted": (
        lambda root, runs: (runs["mid"].path / "manifest.json").unlink(),
        "missing",
        "{mid}/manifest.json",
    ),
    "file added": (
        lambda root, runs: (runs["new"].path / "extra.html").write_text("<p>x</p>"),
        "added",
        "{new}/extra.html",
    ),
    "hidden file added": (
        lambda root, runs: (runs["new"].path / "models" / ".x").write_text("x"),
        "added",
        "{new}/models/.x",
    ),
    "folder added": (lambda root, runs: (runs["new"].path / "notes").mkdir(), "added", "{new}/notes"),
    "symlink added": (
        lambda root, runs: (runs["new"].path / "link.html").symlink_to(runs["new"].path / "index.html"),
        "added",
        "{new}/link.html",
    ),
    "whole run folder deleted": (lambda root, runs: shutil.rmtree(runs["mid"].path), "missing", "{mid}"),
    "run folder added": (
        lambda root, runs: shutil.copytree(runs["new"].path, runs["new"].path.with_name("20260113-T000000Z-ffff")),
        "unrecorded",
        "20260113-T000000Z-ffff",
    ),
    "purged run restored": (
        lambda root, runs: shutil.copytree(runs["mid"].path, runs["old"].path),
        "unrecorded",
        "{old}",
    ),
    "chain line edited": (
        lambda root, runs: _set_chain_lines(
            root,
            [line.replace(b'"time":"2', b'"time":"1') if i == 1 else line for i, line in enumerate(_chain_lines(root))],
        ),
        "chain",
        "chain.jsonl line 2",
    ),
    "chain lines reordered": (
        lambda root, runs: _set_chain_lines(root, [_chain_lines(root)[i] for i in (0, 2, 1, 3, 4, 5)]),
        "chain",
        "chain.jsonl line 2",
    ),
    "chain line dropped": (
        lambda root, runs: _set_chain_lines(root, [line for i, line in enumerate(_chain_lines(root)) if i != 1]),
        "chain",
        "chain.jsonl line 2",
    ),
    "chain line duplicated": (
        lambda root, runs: _set_chain_lines(root, _chain_lines(root)[:3] + _chain_lines(root)[2:]),
        "chain",
        "chain.jsonl line 4",
    ),
    "last chain line removed": (_new_run_then_drop_last_line, "unrecorded", "runs/2026/20260119-T220000Z-eeee"),
    "chain cut mid-line": (
        lambda root, runs: (root / "chain.jsonl").write_bytes((root / "chain.jsonl").read_bytes()[:-40]),
        "chain",
        "chain.jsonl line 6",
    ),
    "params value edited": (
        lambda root, runs: (root / "params/arima-sales/1.json").write_text(
            (root / "params/arima-sales/1.json").read_text().replace("0.5", "0.6")
        ),
        "params",
        "params/arima-sales/1.json",
    ),
    "params whitespace edited": (
        lambda root, runs: (root / "params/arima-sales/2.json").write_text(
            (root / "params/arima-sales/2.json").read_text().replace("\n", " \n", 1)
        ),
        "params",
        "params/arima-sales/2.json",
    ),
    "promoted params rewritten with a fresh hash": (
        lambda root, runs: _rewrite_params(root, "params/arima-sales/2.json", note="never approved"),
        "params",
        "chain.jsonl line 4",
    ),
    "promoted params file deleted": (
        lambda root, runs: (root / "params/arima-sales/2.json").unlink(),
        "params",
        "chain.jsonl line 4",
    ),
    "earlier params version deleted": (
        lambda root, runs: (root / "params/arima-sales/1.json").unlink(),
        "params",
        "params/arima-sales",
    ),
    "chain deleted": (lambda root, runs: (root / "chain.jsonl").unlink(), "missing", "chain.jsonl"),
}


@pytest.mark.parametrize("case", list(TAMPERING))
def test_tampering_is_detected_and_named(populated, case):
    root, runs = populated
    tamper, kind, where = TAMPERING[case]
    where = where.format(**{key: run.run_id for key, run in runs.items()})
    tamper(root, runs)
    problems = archive.verify_archive(root)
    assert problems, f"{case}: not detected"
    assert any(p.kind == kind and p.where.endswith(where) and p.message for p in problems), (
        case,
        [str(p) for p in problems],
    )
    assert all(not p.is_note for p in problems)


def test_dropping_a_trailing_signoff_needs_a_recorded_head(populated):
    """A hash chain alone cannot show that its last entry was cut off; a head kept elsewhere can."""
    root, runs = populated
    head = archive.record_signoff(root, runs["new"].run_id, name="B. Chair", role="committee chair")["hash"]
    assert archive.verify_archive(root, expected_head=head) == []
    _set_chain_lines(root, _chain_lines(root)[:-1])
    assert archive.verify_archive(root) == []  # the documented limit of a bare hash chain
    problems = archive.verify_archive(root, expected_head=head)
    assert [(p.kind, p.where) for p in problems] == [("chain", "chain.jsonl")]
    assert "expected head" in problems[0].message


def test_read_chain_and_changes_refuse_a_damaged_chain(populated):
    root, _ = populated
    lines = _chain_lines(root)
    _set_chain_lines(root, [lines[1], lines[0]] + lines[2:])
    with pytest.raises(ArchiveError, match="chain.jsonl line 1"):
        archive.read_chain(root)
    with pytest.raises(ArchiveError, match="damaged"):
        archive.open_run(root, "20260126-T220000Z-abcd", 2026)
    with pytest.raises(ArchiveError, match="damaged"):
        archive.record_signoff(root, "20260112-T220000Z-cccc", name="x", role="y")


CHAIN_TAMPERING = [case for case, (_, kind, _) in TAMPERING.items() if kind == "chain"]


@pytest.mark.parametrize("case", CHAIN_TAMPERING)
def test_remembered_chain_check_equals_a_full_check(populated, case):
    """The process remembers the chain lines it checked (tasks/archive/chain.py _CHECKED) and parses
    only lines added after them; a change to a remembered line must still be found, and every
    result must equal a check from scratch."""
    from fitaudit.tasks.archive.chain import _load_chain

    root, runs = populated
    assert archive.read_chain(root)  # fills the memo
    TAMPERING[case][0](root, runs)
    remembered, fresh = _load_chain(root), _load_chain(root, fresh=True)
    assert (remembered.problems or remembered.torn) and remembered == fresh
    with pytest.raises(ArchiveError, match="chain"):
        archive.read_chain(root)


def test_remembered_chain_check_follows_appends_and_acknowledged_damage(populated):
    from fitaudit.tasks.archive.chain import _load_chain

    root, runs = populated
    archive.read_chain(root)
    _publish(root, "20260119-T220000Z-dddd", dt.date(2026, 1, 19))  # appended after the remembered lines
    assert _load_chain(root) == _load_chain(root, fresh=True)
    lines = _chain_lines(root)
    _set_chain_lines(root, lines[:2] + [b'{"not": "an entry"}\n'] + lines[2:])  # damage, then acknowledge it
    archive.acknowledge_damage(root, by="Records officer", note="line inserted by a faulty copy script")
    archive.record_signoff(root, runs["new"].run_id, name="A. Reviewer", role="model validator")
    remembered = _load_chain(root)
    assert remembered == _load_chain(root, fresh=True)
    assert [p.where for p in remembered.problems][:1] == ["chain.jsonl line 3"]


def test_read_chain_returns_the_callers_own_entries(populated):
    root, _ = populated
    first = archive.read_chain(root)
    first[0]["payload"]["run_id"] = "changed by the caller"
    assert archive.read_chain(root)[0]["payload"]["run_id"] != "changed by the caller"
    assert archive.verify_archive(root) == []


# ------------------------------------------------------------------------------------------
# writer rules and path safety


UNSAFE_PATHS = {
    "../escape.html": "'..'",
    "models/../../escape.html": "'..'",
    "/etc/passwd": "absolute",
    "\\\\server\\share": "absolute",
    "C:/x.html": "absolute",
    "a\x00b.html": "NUL",
    "": "non-empty",
    "models//m.html": "empty",
    "./m.html": "'.'",
    ".hidden": "not a safe name",
    "a b.html": "not a safe name",
    "models\\m.html": "not a safe name",
    "index.html\n": "not a safe name",
    "x" * 129: "not a safe name",
    "manifest.json": "written by finish",
}


@pytest.mark.parametrize("relpath", list(UNSAFE_PATHS), ids=repr)
def test_unsafe_file_paths_are_refused(tmp_path, relpath):
    root = tmp_path / "archive"
    with archive.open_run(root, "20260105-T220000Z-abcd", 2026) as run:
        with pytest.raises(InputError, match=UNSAFE_PATHS[relpath]):
            run.write_bytes(relpath, b"x")
        run.abort()
    assert not (tmp_path / "escape.html").exists()
    assert not list((root / "runs").rglob("*"))


UNSAFE_RUN_IDS = ["../x", "a/b", ".x", "", "x\x00", "abc\n", "x" * 129, "a b", 42]


@pytest.mark.parametrize("run_id", UNSAFE_RUN_IDS, ids=repr)
def test_unsafe_run_ids_are_refused(tmp_path, run_id):
    with pytest.raises(InputError, match="run id .* is not a safe name"):
        archive.open_run(tmp_path / "archive", run_id, 2026, as_of=dt.date(2026, 1, 5))
    with pytest.raises(InputError, match="run id .* is not a safe name"):
        archive.record_signoff(tmp_path / "archive", run_id, name="x", role="y")


def test_new_run_id_format_and_as_of_default():
    now = dt.datetime(2026, 11, 30, 23, 30, 1, tzinfo=dt.timezone(dt.timedelta(hours=1)))
    run_id = archive.new_run_id(dt.date(2026, 11, 30), now=now)
    # source: the run-id format of the archive brief (as-of date, UTC time of day, 4 random hex digits)
    assert re.fullmatch(r"20261130-T223001Z-[0-9a-f]{4}", run_id)
    assert archive.SAFE_NAME.fullmatch(run_id)
    with pytest.raises(InputError, match="timezone-aware"):
        archive.new_run_id(dt.date(2026, 11, 30), now=dt.datetime(2026, 11, 30))
    with pytest.raises(InputError, match="pass as_of"):
        archive.open_run("unused", "weekly-run", 2026)
    with pytest.raises(InputError, match="four-digit"):
        archive.open_run("unused", "20260105-x", 26)


def test_files_are_never_overwritten(tmp_path):
    root = tmp_path / "archive"
    with archive.open_run(root, "20260105-T220000Z-abcd", 2026) as run:
        run.write_text("models/m1.html", "first")
        for relpath in ("models/m1.html", "models", "models/m1.html/x"):
            with pytest.raises(InputError, match="never overwritten"):
                run.write_text(relpath, "second")
        with pytest.raises(InputError, match="must be bytes"):
            run.write_bytes("notes/n1.txt", "not bytes")
        run.write_text("notes", "a write that failed reserves no folder")
        with pytest.raises(InputError, match="may not set"):
            run.finish({"files": {}})
        with pytest.raises(InputError, match="differs"):
            run.finish({"run_id": "someone-else"})
        published = run.finish({})
    assert (published.path / "models" / "m1.html").read_text() == "first"
    with pytest.raises(ArchiveError, match="already finished"):
        run.write_text("late.html", "x")
    with pytest.raises(ArchiveError, match="already published"):
        archive.open_run(root, "20260105-T220000Z-abcd", 2026)
    assert archive.verify_archive(root, include_notes=True) == []


def test_unfinished_or_failed_run_leaves_nothing_visible(tmp_path):
    root = tmp_path / "archive"
    with pytest.raises(ArchiveError, match="was not finished"):
        with archive.open_run(root, "20260105-T220000Z-abcd", 2026) as run:
            run.write_text("index.html", "x")
    with pytest.raises(RuntimeError, match="boom"):
        with archive.open_run(root, "20260105-T220000Z-abce", 2026) as run:
            run.write_text("index.html", "x")
            raise RuntimeError("boom")
    assert not any((root / ".staging").iterdir())
    assert not list((root / "runs").rglob("*"))
    assert not (root / "chain.jsonl").exists()


def test_recover_keeps_a_live_writers_staging_folder(tmp_path):
    root = tmp_path / "archive"
    with archive.open_run(root, "20260105-T220000Z-abcd", 2026) as run:
        run.write_text("index.html", "x")
        assert archive.recover(root) == []
        assert archive.verify_archive(root) == []
        run.finish({})
    assert archive.verify_archive(root, include_notes=True) == []


def test_work_folders_are_kept_while_their_run_lives_and_removed_after(tmp_path):
    """A live run's scratch folder survives another run's recovery; a dead run's does not."""
    root = tmp_path / "archive"
    live = archive.open_work_folder(root, "20260105-T220000Z-abcd")
    (live.path / "batch-0001.pkl").write_bytes(b"staged")
    # a run killed by SIGKILL leaves its folder behind with no lock held (the kernel released it)
    dead = root / ".work" / "20260105-T210000Z-dead"
    dead.mkdir()
    (dead / "batch-0001.pkl").write_bytes(b"staged")
    actions = archive.recover(root)
    assert actions == ["removed the work folder of an interrupted run .work/20260105-T210000Z-dead"]
    assert not dead.exists() and (live.path / "batch-0001.pkl").exists()
    with pytest.raises(ArchiveError, match="already has a work folder"):
        archive.open_work_folder(root, "20260105-T220000Z-abcd")
    live.close()
    live.close()  # idempotent
    assert not live.path.exists()
    assert archive.recover(root) == [] and archive.verify_archive(root) == []


def test_concurrent_publications_keep_one_chain(tmp_path):
    root = tmp_path / "archive"
    errors = []

    def publish_many(tag: str) -> None:
        try:
            for k in range(4):
                _publish(root, f"20260105-{tag}-{k}", dt.date(2026, 1, 5))
        except Exception as exc:  # reported below
            errors.append(exc)

    threads = [threading.Thread(target=publish_many, args=(tag,)) for tag in ("a", "b", "c")]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert [e["seq"] for e in archive.read_chain(root)] == list(range(1, 13))
    assert archive.verify_archive(root, include_notes=True) == []


# ------------------------------------------------------------------------------------------
# interrupted work: journals excuse exactly what they cover


class SimulatedCrash(Exception):
    """Raised by the step hook to stop a protocol at a chosen step."""


def _crash_at(step: str):
    def hook(name: str) -> None:
        if name == step:
            raise SimulatedCrash(step)

    return hook


def test_torn_chain_append_is_pending_then_completed(tmp_path, monkeypatch):
    root = tmp_path / "archive"
    _publish(root, "20251229-T220000Z-aaaa", dt.date(2025, 12, 29))
    monkeypatch.setattr(archive.durable, "_STEP_HOOK", _crash_at("append-journal-written"))
    with pytest.raises(ArchiveError, match="call recover"):
        _publish(root, "20260105-T220000Z-bbbb", dt.date(2026, 1, 5))
    monkeypatch.setattr(archive.durable, "_STEP_HOOK", None)
    line = json.loads((root / ".journal" / "append.json").read_bytes())["line"].encode()
    with open(root / "chain.jsonl", "ab") as fh:  # what a write cut short by a crash leaves
        fh.write(line[: len(line) // 2])

    assert archive.verify_archive(root) == []
    notes = archive.verify_archive(root, include_notes=True)
    assert {n.where for n in notes} == {".journal/append.json", ".journal/run-20260105-T220000Z-bbbb.json"}
    with pytest.raises(ArchiveError, match="interrupted; call recover"):
        archive.read_chain(root)

    actions = archive.recover(root)
    assert any("completed interrupted append" in a for a in actions)
    assert archive.verify_archive(root, include_notes=True) == []
    assert [e["payload"]["run_id"] for e in archive.read_chain(root)] == [
        "20251229-T220000Z-aaaa",
        "20260105-T220000Z-bbbb",
    ]


def test_renamed_run_without_chain_entry_is_pending_then_recorded(tmp_path, monkeypatch):
    root = tmp_path / "archive"
    monkeypatch.setattr(archive.durable, "_STEP_HOOK", _crash_at("renamed"))
    with pytest.raises(SimulatedCrash):
        _publish(root, "20260105-T220000Z-bbbb", dt.date(2026, 1, 5))
    monkeypatch.setattr(archive.durable, "_STEP_HOOK", None)
    folder = root / "runs/2026/20260105-T220000Z-bbbb"
    assert folder.is_dir() and not (root / "chain.jsonl").exists()
    assert archive.verify_archive(root) == []
    assert [n.kind for n in archive.verify_archive(root, include_notes=True)] == ["pending"]

    _flip_byte(folder / "index.html")  # tampering while pending is still a problem
    assert [p.where for p in archive.verify_archive(root)] == ["runs/2026/20260105-T220000Z-bbbb/index.html"]
    with pytest.raises(ArchiveError, match="cannot complete"):
        archive.recover(root)
    _flip_byte(folder / "index.html")

    assert "completed interrupted publication" in archive.recover(root)[0]
    assert archive.read_chain(root)[0]["payload"]["recovered"] is True
    assert archive.verify_archive(root, include_notes=True) == []


def test_journal_of_another_run_does_not_excuse_a_missing_chain_line(populated):
    root, runs = populated
    _new_run_then_drop_last_line(root, runs)
    journal = {
        "staging": "x",
        "payload": {
            "run_id": runs["new"].run_id,
            "path": f"runs/2026/{runs['new'].run_id}",
            "as_of": "2026-01-12",
            "manifest_sha256": runs["new"].manifest_sha256,
        },
    }
    (root / ".journal" / f"run-{runs['new'].run_id}.json").write_bytes(_canonical(journal))
    problems = archive.verify_archive(root)
    assert [p.where for p in problems] == ["runs/2026/20260119-T220000Z-eeee"]


# ------------------------------------------------------------------------------------------
# sign-off, promotion and purge refuse what they cannot vouch for


def test_signoff_records_the_exact_report_and_refuses_a_changed_one(populated):
    root, runs = populated
    entry = archive.record_signoff(root, runs["new"].run_id, name="B. Chair", role="committee chair")
    index = (runs["new"].path / "index.html").read_bytes()
    assert entry["payload"]["report_sha256"] == _sha(index)
    assert entry["payload"]["manifest_sha256"] == _sha((runs["new"].path / "manifest.json").read_bytes())
    assert entry["time"].endswith("Z") and entry["payload"]["role"] == "committee chair"
    _flip_byte(runs["new"].path / "index.html")
    with pytest.raises(ArchiveError, match="cannot sign .*index.html"):
        archive.record_signoff(root, runs["new"].run_id, name="B. Chair", role="committee chair")
    with pytest.raises(ArchiveError, match="purged"):
        archive.record_signoff(root, runs["old"].run_id, name="B. Chair", role="committee chair")
    with pytest.raises(InputError, match="name must be a non-empty string"):
        archive.record_signoff(root, runs["mid"].run_id, name=" ", role="chair")


def test_append_chain_accepts_only_checked_promotions(populated):
    root, _ = populated
    rel, digest = _write_params(root, "ets-demand", {"alpha": 0.3})
    for kind in ("run", "purge", "signoff"):
        with pytest.raises(InputError, match="appended by"):
            archive.append_chain(root, kind, {})
    with pytest.raises(InputError, match="unknown"):
        archive.append_chain(root, "edit", {})
    with pytest.raises(InputError, match="not the recorded"):
        archive.append_chain(root, "promotion", {"path": rel, "sha256": "0" * 64})
    with pytest.raises(InputError, match="missing"):
        archive.append_chain(root, "promotion", {"path": "params/ets-demand/9.json", "sha256": digest})
    for path in ("params/../chain.jsonl", "params/ets-demand/../../chain.jsonl", "params/ets-demand/2.json/x"):
        with pytest.raises(InputError, match="is not params/"):
            archive.append_chain(root, "promotion", {"path": path, "sha256": digest})
    with pytest.raises(InputError, match="not a safe name"):
        archive.append_chain(root, "promotion", {"path": "params/../2.json", "sha256": digest})
    entry = archive.append_chain(root, "promotion", {"path": rel, "sha256": digest})
    assert entry["seq"] == 7 and archive.verify_archive(root) == []


def test_purge_refuses_tampered_runs_and_pending_work(tmp_path, monkeypatch):
    root = tmp_path / "archive"
    old = _publish(root, "20251229-T220000Z-aaaa", dt.date(2025, 12, 29))
    _flip_byte(old.path / "index.html")
    with pytest.raises(ArchiveError, match="destroy the evidence"):
        archive.purge_runs(root, before=dt.date(2026, 1, 1), reason="retention", approved_by="x")
    assert old.path.exists() and len(archive.read_chain(root)) == 1
    _flip_byte(old.path / "index.html")

    monkeypatch.setattr(archive.durable, "_STEP_HOOK", _crash_at("renamed"))
    with pytest.raises(SimulatedCrash):
        _publish(root, "20260105-T220000Z-bbbb", dt.date(2026, 1, 5))
    monkeypatch.setattr(archive.durable, "_STEP_HOOK", None)
    with pytest.raises(ArchiveError, match="call recover"):
        archive.purge_runs(root, before=dt.date(2026, 1, 1), reason="retention", approved_by="x")
    archive.recover(root)
    with pytest.raises(InputError, match="datetime.date"):
        archive.purge_runs(root, before=dt.datetime(2026, 1, 1), reason="retention", approved_by="x")
    with pytest.raises(InputError, match="reason"):
        archive.purge_runs(root, before=dt.date(2026, 1, 1), reason="", approved_by="x")
    assert archive.purge_runs(root, before=dt.date(2026, 1, 1), reason="retention", approved_by="x")["kind"] == "purge"
    assert archive.verify_archive(root, include_notes=True) == []


def test_verify_reads_without_writing(populated):
    root, _ = populated
    before = sorted((p.relative_to(root).as_posix(), p.stat().st_mtime_ns) for p in root.rglob("*"))
    os.chmod(root / "chain.jsonl", 0o444)
    assert archive.verify_archive(root) == []
    assert sorted((p.relative_to(root).as_posix(), p.stat().st_mtime_ns) for p in root.rglob("*")) == before


def test_verification_reads_each_parameter_file_once_and_finds_what_fresh_reads_find(tmp_path, monkeypatch):
    """One verification keeps each parameter file's bytes and checked record (tasks/archive/checks.py
    ParamsReads): every file is read once, and the problems equal those of a verification that reads
    the file again at every question, for an altered value, a re-hashed forgery, reformatted bytes
    and a file that is not JSON."""
    from fitaudit.tasks.archive import checks

    root = tmp_path / "archive"
    _publish(root, "20261130-T220000Z-aaaa", dt.date(2026, 11, 30))
    for model in ("m-altered", "m-forged", "m-reformatted", "m-garbage", "m-intact"):
        _write_params(root, model, {"ar1": 0.5})
    altered = root / "params" / "m-altered" / "1.json"
    altered.write_text(altered.read_text().replace('"ar1": 0.5', '"ar1": 0.6'))
    _rewrite_params(root, "params/m-forged/2.json", note="approved after all")
    reformatted = root / "params" / "m-reformatted" / "1.json"
    reformatted.write_text(json.dumps(json.loads(reformatted.read_text()), sort_keys=True, indent=4) + "\n")
    (root / "params" / "m-garbage" / "2.json").write_text("{not json")

    reads: list[pathlib.Path] = []
    real_read_bytes = pathlib.Path.read_bytes

    def counting(path):
        if "params" in path.parts:
            reads.append(path)
        return real_read_bytes(path)

    monkeypatch.setattr(pathlib.Path, "read_bytes", counting)
    kept = archive.verify_archive(root)
    assert sorted(reads) == sorted(set(reads)) and len(reads) == 10  # ten files, each read once

    class FreshReads(checks.ParamsReads):  # no memory: every question reads the file again
        def content(self, path):
            return path.read_bytes()

        def load(self, path, model_id, version):
            return checks._load(path, model_id, version)

    monkeypatch.setattr(checks, "ParamsReads", FreshReads)
    from fitaudit.tasks.archive import verify as verify_module

    monkeypatch.setattr(verify_module, "ParamsReads", FreshReads)
    reads.clear()
    fresh = archive.verify_archive(root)
    assert len(reads) > 10  # the comparison really read again
    assert [(p.kind, p.where, p.message) for p in kept] == [(p.kind, p.where, p.message) for p in fresh]
    found = " | ".join(f"{p.where}: {p.message}" for p in kept)
    for expected in (
        "m-altered/1.json: content does not match its SHA-256",
        "m-forged/2.json",
        "m-reformatted/1.json: is not byte-for-byte the canonical JSON",
        "m-garbage/2.json: cannot be read as JSON",
    ):
        assert expected in found, (expected, found)


def test_a_runs_files_are_synced_together_before_its_manifest(tmp_path, monkeypatch):
    """RunWriter writes a run's files without one fsync each and syncs them all, several at a time,
    before it writes manifest.json; an fsync that fails (a full disk can first show there) names
    the file, and nothing is published."""
    import errno

    from fitaudit.tasks.archive import durable, writer

    root = tmp_path / "archive"
    events, synced = [], []
    real_files, real_write = writer._fsync_files, writer.write_once

    def files(paths):
        paths = list(paths)
        synced.extend(p.name for p in paths)
        events.append("files synced")
        real_files(paths)

    def write(path, data, **options):
        if pathlib.Path(path).name == "manifest.json":
            events.append("manifest written")
        return real_write(path, data, **options)

    monkeypatch.setattr(writer, "_fsync_files", files)
    monkeypatch.setattr(writer, "write_once", write)
    first = _publish(root, "20261130-T220000Z-aaaa", dt.date(2026, 11, 30))
    assert events == ["files synced", "manifest written"]
    assert sorted(synced) == ["index.html", "m1.html", "m2.html", "results.json", "results.parquet"]
    assert archive.verify_archive(root) == []

    def full(fd):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(durable.os, "fsync", full)
    with pytest.raises(OSError) as caught:
        _publish(root, "20261201-T220000Z-bbbb", dt.date(2026, 12, 1))
    assert caught.value.errno == errno.ENOSPC and caught.value.filename is not None
    staged = {"index.html", "m1.html", "m2.html", "results.json", "results.parquet"}
    assert pathlib.Path(caught.value.filename).name in staged
    monkeypatch.undo()
    assert [p.name for p in (root / "runs" / "2026").iterdir()] == [first.path.name]
    assert archive.verify_archive(root) == []


def test_a_replaced_file_is_the_old_or_the_new_one_never_a_part(tmp_path, monkeypatch):
    from fitaudit.tasks import _io

    target = tmp_path / "index.html"
    target.write_bytes(b"old")
    _io.write_replacing(target, b"new")
    assert target.read_bytes() == b"new" and [p.name for p in tmp_path.iterdir()] == ["index.html"]

    class DiskFull(OSError):
        pass

    def failing_replace(src, dst):
        raise DiskFull(28, "No space left on device")

    monkeypatch.setattr(_io.os, "replace", failing_replace)
    with pytest.raises(DiskFull):
        _io.write_replacing(target, b"newer")
    assert target.read_bytes() == b"new" and [p.name for p in tmp_path.iterdir()] == ["index.html"]  # no leftover


def test_a_staged_page_is_linked_into_the_run_not_copied_and_copied_where_links_fail(tmp_path, monkeypatch):
    """tasks/_io.py link_once, RunWriter.write_file: a finished file gets the run's name as a
    second name of the same file, with write_once's permissions; never over an existing file; on a
    source on another file system the bytes are written instead."""
    import errno
    import stat

    from fitaudit.tasks import _io

    staged = tmp_path / "work" / "m1.html"
    staged.parent.mkdir()
    staged.write_bytes(b"abc")
    root = tmp_path / "archive"
    writer = archive.open_run(root, "20260105-T220000Z-eeee", 2026)
    with writer:
        writer.write_file("models/m1.html", staged)
        published = writer.finish({"operator": "svc-audit"})
    page = published.path / "models" / "m1.html"
    assert os.path.samefile(page, staged) and stat.S_IMODE(page.stat().st_mode) == 0o600
    manifest = json.loads((published.path / "manifest.json").read_bytes())
    assert manifest["files"]["models/m1.html"] == {"sha256": SHA256_ABC, "size": 3}  # source: hashlib
    assert archive.verify_archive(root) == []
    with pytest.raises(FileExistsError):
        _io.link_once(staged, page)

    real_link = os.link

    def across_devices(src, dst, **kwargs):  # as if the staged page were on another file system
        if pathlib.Path(src) == staged:
            raise OSError(errno.EXDEV, "Invalid cross-device link")
        return real_link(src, dst, **kwargs)

    monkeypatch.setattr(_io.os, "link", across_devices)
    copied = tmp_path / "elsewhere" / "m1.html"
    assert _io.link_once(staged, copied) == b"abc"
    assert copied.read_bytes() == b"abc" and not os.path.samefile(copied, staged)
