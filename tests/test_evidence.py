"""Evidence that survives the whole workflow (docs/architecture.md §3): history, promotions anchored in
the chain, runs that refuse damaged archives, acknowledged damage, clean failures.

The first part works on archives directly and through the command line without Prefect; the second
runs the audit and refit flows against a real Prefect server (marker ``server``).  Hashes are
recomputed with :mod:`hashlib` (SHA-256, FIPS 180-4), not with the archive's helpers.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import errno
import hashlib
import json
import os
import pathlib
import re
import shutil
import signal
import subprocess
import sys
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))  # tests/: fleet_fixtures
from fleet_fixtures import (  # noqa: E402
    AR1,
    AS_OF,
    AUDIT,
    N_DAYS,
    Fleet,
    ar1,
    days,
    fitted_params,
    long_table,
    promote_production,
    write_parquet,
)

from fitaudit.flows.cli import EXIT_ERROR, EXIT_OK, EXIT_VERIFY, main  # noqa: E402
from fitaudit.tasks import archive  # noqa: E402
from fitaudit.tasks import params as param_store  # noqa: E402
from fitaudit.tasks.archive import ArchiveError  # noqa: E402
from fitaudit.tasks.params import ParameterStoreError  # noqa: E402
from fitaudit.tasks.publish import load_history  # noqa: E402

SPEC = {"family": "arima", "order": [1, 0, 0], "trend": "c"}
HEAD_LINE = re.compile(r"^head: ([0-9a-f]{64}) \(seq ([0-9]+)\)$", re.M)


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _canonical(obj) -> bytes:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=False).encode("utf-8")


def _candidate(root, model="m1", ar1=0.5) -> int:
    return param_store.write_version(
        root,
        model,
        spec=SPEC,
        noise={"law": "normal"},
        params={"ar1": ar1, "intercept": 0.0, "sigma2": 1.0},
        status="candidate",
        created_by="svc-audit",
        lineage={"run_id": "r1"},
    ).version


def _chain(root) -> list[dict]:
    return [json.loads(line) for line in (root / "chain.jsonl").read_bytes().splitlines()]


def _set_chain(root, lines: list[bytes]) -> None:
    (root / "chain.jsonl").write_bytes(b"".join(lines))


def _publish(
    root, run_id: str, as_of: dt.date, rows: list[dict] | None = None, kind: str = "audit", flip: bool = False
):
    """A run folder as the flows write them: an audit run (results.parquet) or a refit run (refit.json)."""
    with archive.open_run(root, run_id, as_of.year, as_of=as_of) as run:
        run.write_text("index.html", f"<p>{run_id}</p>")
        if kind == "audit":
            table = pa.Table.from_pylist(
                rows or [],
                schema=pa.schema(
                    [
                        ("model_id", pa.string()),
                        ("verdict", pa.string()),
                        ("production_r_max", pa.float64()),
                        ("refit_r_max", pa.float64()),
                        ("production_p_value", pa.float64()),
                        ("refit_p_value", pa.float64()),
                    ]
                ),
            )
            buf = pa.BufferOutputStream()
            pq.write_table(table, buf)
            run.write_bytes("results.parquet", buf.getvalue().to_pybytes())
        else:
            run.write_json("refit.json", {"records": []})
        return run.finish({"kind": kind, "operator": "tests"})


def _row(model: str, verdict: str, r: float = 1.0) -> dict:
    return {
        "model_id": model,
        "verdict": verdict,
        "production_r_max": r,
        "refit_r_max": 0.5,
        "production_p_value": 0.01,
        "refit_p_value": 0.4,
    }


# ------------------------------------------------------------------------------------------
# promotions: recorded with their chain entry, checked by verify and by the production lookup


def test_promotion_writes_the_version_and_its_chain_entry(tmp_path):
    _candidate(tmp_path)
    promoted = param_store.promote(
        tmp_path, "m1", 1, approved_by="A. Approver", note="validated", details={"run_id": "r9"}
    )
    (entry,) = _chain(tmp_path)
    data = (tmp_path / "params/m1/2.json").read_bytes()
    assert entry["kind"] == "promotion" and entry["payload"]["path"] == "params/m1/2.json"
    assert (
        entry["payload"]["sha256"]
        == promoted.sha256
        == _sha(_canonical({k: v for k, v in json.loads(data).items() if k != "sha256"}))
    )
    assert (entry["payload"]["approved_by"], entry["payload"]["promotes"], entry["payload"]["run_id"]) == (
        "A. Approver",
        1,
        "r9",
    )
    assert param_store.production_version(tmp_path, "m1") == promoted
    assert archive.verify_archive(tmp_path, include_notes=True) == []
    assert (
        archive.append_chain(tmp_path, "promotion", {"path": "params/m1/2.json", "sha256": promoted.sha256}) == entry
    )  # recorded once


class SimulatedCrash(BaseException):
    """Raised by the step hook to stop the promotion protocol at a chosen step."""


# steps of record_promotion in protocol order; the chain entry exists from "chain-appended" on
PROMOTION_STEPS = [
    "promotion-journal-written",
    "promotion-written",
    "append-journal-written",
    "chain-appended",
    "promotion-appended",
]


@pytest.mark.parametrize("step", PROMOTION_STEPS)
def test_an_interrupted_promotion_leaves_both_or_neither(tmp_path, monkeypatch, step):
    _candidate(tmp_path)

    def hook(name):
        if name == step:
            raise SimulatedCrash(step)

    monkeypatch.setattr(archive.durable, "_STEP_HOOK", hook)
    with pytest.raises(SimulatedCrash):
        param_store.promote(tmp_path, "m1", 1, approved_by="A. Approver", note="validated")
    monkeypatch.setattr(archive.durable, "_STEP_HOOK", None)
    assert archive.verify_archive(tmp_path) == []  # an interrupted promotion is pending, not a problem
    assert any(n.kind == "pending" for n in archive.verify_archive(tmp_path, include_notes=True))
    archive.recover(tmp_path)
    assert archive.verify_archive(tmp_path, include_notes=True) == []
    written = (tmp_path / "params/m1/2.json").exists()
    recorded = [e for e in _chain(tmp_path) if e["kind"] == "promotion"] if (tmp_path / "chain.jsonl").exists() else []
    assert (
        written == (len(recorded) == 1) == (PROMOTION_STEPS.index(step) >= PROMOTION_STEPS.index("promotion-written"))
    )
    assert (param_store.production_version(tmp_path, "m1") is not None) == written


def _forge(root, rel_from: str, rel_to: str, **changes) -> None:
    """A promoted version added by hand: an existing one copied, changed, its hash recomputed."""
    record = json.loads((root / rel_from).read_bytes())
    record.update(changes)
    record.pop("sha256")
    record["sha256"] = _sha(_canonical(record))
    (root / rel_to).write_text(
        json.dumps(record, sort_keys=True, ensure_ascii=False, indent=2, separators=(",", ": ")) + "\n"
    )


def _unrecorded(root):
    param_store.write_version(
        root,
        "m1",
        spec=SPEC,
        noise={"law": "normal"},
        params={"ar1": 0.9, "intercept": 0.0, "sigma2": 1.0},
        status="promoted",
        created_by="someone",
        lineage={},
        promotes=1,
    )
    return "params/m1/3.json", "params/m1/3.json"


def _forged(root):
    _forge(
        root, "params/m1/2.json", "params/m1/3.json", version=3, params={"ar1": 0.9, "intercept": 0.0, "sigma2": 1.0}
    )
    return "params/m1/3.json", "params/m1/3.json"


def _deleted(root):
    param_store.promote(
        root, "m1", _candidate(root, ar1=0.7), approved_by="B. Approver", note="refit"
    )  # versions 3 and 4
    (root / "params/m1/4.json").unlink()  # the newest promoted version
    return "chain.jsonl line 2", "params/m1/4.json"


@pytest.mark.parametrize("damage", [_unrecorded, _forged, _deleted], ids=["unrecorded", "forged", "deleted"])
def test_unrecorded_forged_and_deleted_promoted_versions_are_refused(tmp_path, capsys, damage):
    _candidate(tmp_path)
    param_store.promote(tmp_path, "m1", 1, approved_by="A. Approver", note="validated")
    where, named = damage(tmp_path)
    problems = archive.verify_archive(tmp_path)
    assert [(p.kind, p.where) for p in problems] == [("params", where)], [str(p) for p in problems]
    assert main(["verify", str(tmp_path)]) == EXIT_VERIFY
    assert named in capsys.readouterr().out
    with pytest.raises(ParameterStoreError, match=re.escape(named)):  # never the older version instead
        param_store.production_version(tmp_path, "m1")
    snapshot = archive.production_snapshot(tmp_path, ["m1"])
    assert snapshot.versions["m1"] is None and named in snapshot.errors["m1"]
    with pytest.raises(ArchiveError, match="fitaudit acknowledge"):
        archive.require_intact(tmp_path)


def test_an_acknowledged_unrecorded_promotion_is_recorded_as_found(tmp_path, capsys):
    _candidate(tmp_path)
    param_store.promote(tmp_path, "m1", 1, approved_by="A. Approver", note="validated")
    _unrecorded(tmp_path)
    assert (
        main(
            [
                "acknowledge",
                str(tmp_path),
                "--by",
                "C. Officer, model risk",
                "--note",
                "version 3 was written by hand during an outage",
            ]
        )
        == EXIT_OK
    )
    assert "recorded as found: promoted version params/m1/3.json" in capsys.readouterr().out
    assert archive.verify_archive(tmp_path, include_notes=True) == []
    assert param_store.production_version(tmp_path, "m1").version == 3
    _forge(
        tmp_path, "params/m1/3.json", "params/m1/3.json", note="changed afterwards"
    )  # the recorded hash still binds it
    assert [p.where for p in archive.verify_archive(tmp_path)] == ["chain.jsonl line 2"]


# ------------------------------------------------------------------------------------------
# damaged chains: refused, then acknowledged


def _two_runs(root):
    first = _publish(root, "20260821-T060000Z-aaaa", dt.date(2026, 8, 21), [_row("m1", "refit")])
    second = _publish(root, "20260828-T060000Z-bbbb", dt.date(2026, 8, 28), [_row("m1", "refit")])
    return first, second


def test_a_truncated_chain_is_refused_until_restored_or_acknowledged(tmp_path, capsys):
    _, second = _two_runs(tmp_path)
    lines = (tmp_path / "chain.jsonl").read_bytes().splitlines(keepends=True)
    _set_chain(tmp_path, lines[:-1])  # the last line removed
    assert main(["verify", str(tmp_path)]) == EXIT_VERIFY
    assert "runs/2026/20260828-T060000Z-bbbb" in capsys.readouterr().out
    with pytest.raises(ArchiveError, match=r"restore chain.jsonl from a backup.*fitaudit acknowledge") as refused:
        archive.require_intact(tmp_path)
    assert "runs/2026/20260828-T060000Z-bbbb" in str(refused.value)

    _set_chain(tmp_path, lines)  # restored from a backup: nothing to acknowledge
    assert archive.require_intact(tmp_path) == []
    with pytest.raises(ArchiveError, match="no damage to acknowledge"):
        archive.acknowledge_damage(tmp_path, by="x", note="y")

    _set_chain(tmp_path, lines[:-1])
    assert (
        main(
            [
                "acknowledge",
                str(tmp_path),
                "--by",
                "C. Officer, records",
                "--note",
                "chain.jsonl restored from a stale backup",
            ]
        )
        == EXIT_OK
    )
    out = capsys.readouterr().out
    assert "recorded as found: run folder runs/2026/20260828-T060000Z-bbbb" in out and HEAD_LINE.search(out)
    assert archive.verify_archive(tmp_path, include_notes=True) == []
    ack = _chain(tmp_path)[-1]
    assert ack["kind"] == "acknowledgement" and ack["payload"]["runs"][0]["manifest_sha256"] == second.manifest_sha256
    assert ack["payload"]["by"] == "C. Officer, records" and ack["seq"] == 2
    _publish(tmp_path, "20260904-T060000Z-cccc", dt.date(2026, 9, 4), [_row("m1", "pass")])  # the archive continues
    assert archive.verify_archive(tmp_path, include_notes=True) == []
    assert [r["run_id"] for r in archive.list_runs(tmp_path)][-2:] == [
        "20260828-T060000Z-bbbb",
        "20260904-T060000Z-cccc",
    ]
    (second.path / "index.html").write_text("<p>edited</p>")  # the folder recorded as found is checked like any run
    assert [p.where for p in archive.verify_archive(tmp_path)] == ["runs/2026/20260828-T060000Z-bbbb/index.html"]


def test_a_chain_cut_mid_line_is_ended_and_acknowledged(tmp_path):
    _two_runs(tmp_path)
    data = (tmp_path / "chain.jsonl").read_bytes()
    (tmp_path / "chain.jsonl").write_bytes(data[:-40])
    with pytest.raises(ArchiveError, match="acknowledge"):
        archive.open_run(tmp_path, "20260904-T060000Z-cccc", 2026)
    entry = archive.acknowledge_damage(tmp_path, by="C. Officer", note="disk fault")
    assert entry["payload"]["terminated_line"]["line"] == 2 and entry["seq"] == 3
    first_line = (tmp_path / "chain.jsonl").read_bytes().splitlines()[0]
    assert entry["prev"] == json.loads(first_line)["hash"]  # linked to the last intact entry
    assert [p.kind for p in archive.verify_archive(tmp_path, include_notes=True)] == ["acknowledged"]
    _publish(tmp_path, "20260904-T060000Z-cccc", dt.date(2026, 9, 4), [_row("m1", "pass")])
    assert archive.verify_archive(tmp_path) == []
    assert archive.read_chain(tmp_path)[-1]["seq"] == 4


def test_acknowledged_damage_is_shown_and_new_damage_is_a_problem_again(tmp_path, capsys):
    first, _ = _two_runs(tmp_path)
    page = first.path / "index.html"
    page.write_text("<p>edited once</p>")
    archive.acknowledge_damage(tmp_path, by="C. Officer", note="page overwritten by a backup tool")
    assert main(["verify", str(tmp_path)]) == EXIT_OK
    out = capsys.readouterr().out
    assert "damage acknowledged at chain.jsonl line 3 by C. Officer" in out and "1 acknowledged problem(s)" in out
    page.write_text("<p>edited twice</p>")
    assert main(["verify", str(tmp_path)]) == EXIT_VERIFY


# ------------------------------------------------------------------------------------------
# the chain head, printed whole and accepted back


def test_head_round_trip(tmp_path, capsys):
    _, second = _two_runs(tmp_path)
    assert main(["verify", str(tmp_path)]) == EXIT_OK
    ((digest, seq),) = HEAD_LINE.findall(capsys.readouterr().out)
    assert digest == _chain(tmp_path)[-1]["hash"] and seq == "2"
    line = f"head: {digest} (seq {seq})"
    assert main(["verify", str(tmp_path), "--head", line]) == EXIT_OK
    assert main(["verify", str(tmp_path), "--head", digest]) == EXIT_OK
    assert main(["verify", str(tmp_path), "--head", f"head: {digest} (seq 1)"]) == EXIT_VERIFY  # the hash is not line 1
    capsys.readouterr()
    with pytest.raises(SystemExit) as usage:
        main(["verify", str(tmp_path), "--head", digest[:16]])  # what signoff used to print
    assert usage.value.code == 2 and "64 hex digits" in capsys.readouterr().err
    assert main(["signoff", str(tmp_path), second.run_id, "--name", "B. Chair", "--role", "committee chair"]) == EXIT_OK
    ((signed, _),) = HEAD_LINE.findall(capsys.readouterr().out)
    _set_chain(tmp_path, (tmp_path / "chain.jsonl").read_bytes().splitlines(keepends=True)[:-1])  # the sign-off cut off
    assert main(["verify", str(tmp_path)]) == EXIT_OK  # the limit of a bare hash chain
    assert main(["verify", str(tmp_path), "--head", f"head: {signed} (seq 3)"]) == EXIT_VERIFY


def test_acknowledge_has_help(capsys):
    with pytest.raises(SystemExit) as done:
        main(["acknowledge", "--help"])
    assert done.value.code == 0 and "--by" in capsys.readouterr().out


# ------------------------------------------------------------------------------------------
# history: audit runs only, merged per model, checked against the manifests


def test_history_ignores_refit_runs_and_merges_partial_reruns(tmp_path):
    d1, d2 = dt.date(2026, 8, 14), dt.date(2026, 8, 21)
    _publish(tmp_path, "20260814-T060000Z-aaaa", d1, [_row("m1", "refit"), _row("m2", "pass")])
    _publish(tmp_path, "20260814-T070000Z-bbbb", d1, kind="refit")  # a refit run at the same as-of date
    _publish(tmp_path, "20260821-T060000Z-cccc", d2, [_row("m1", "refit"), _row("m2", "refit")])
    _publish(tmp_path, "20260821-T070000Z-dddd", d2, [_row("m2", "pass", 0.4)])  # a rerun of m2 only
    history = load_history(tmp_path, dt.date(2026, 8, 28), ["m1", "m2"])
    assert [(h["as_of"], h["verdict"], h["run_id"]) for h in history.records["m1"]] == [
        ("2026-08-14", "refit", "20260814-T060000Z-aaaa"),
        ("2026-08-21", "refit", "20260821-T060000Z-cccc"),
    ]
    assert [(h["as_of"], h["verdict"], h["run_id"]) for h in history.records["m2"]] == [
        ("2026-08-14", "pass", "20260814-T060000Z-aaaa"),
        ("2026-08-21", "pass", "20260821-T070000Z-dddd"),
    ]
    assert history.problems == () and "20260814-T070000Z-bbbb" not in history.runs
    assert [len(v) for v in load_history(tmp_path, dt.date(2026, 8, 28), ["m1", "m2"], limit=1).records.values()] == [
        1,
        1,
    ]


@pytest.mark.parametrize("damage", ["tampered", "deleted"])
def test_a_tampered_or_missing_history_file_is_named_not_used(tmp_path, damage):
    first = _publish(tmp_path, "20260814-T060000Z-aaaa", dt.date(2026, 8, 14), [_row("m1", "refit")])
    _publish(tmp_path, "20260821-T060000Z-cccc", dt.date(2026, 8, 21), [_row("m1", "refit")])
    path = first.path / "results.parquet"
    if damage == "tampered":  # the file rewritten with another verdict, as someone editing it would
        table = pq.read_table(path).to_pylist()
        table[0]["verdict"] = "pass"
        pq.write_table(pa.Table.from_pylist(table), path)
    else:
        path.unlink()
    history = load_history(tmp_path, dt.date(2026, 8, 28), ["m1"])
    assert [h["as_of"] for h in history.records["m1"]] == ["2026-08-21"]
    (problem,) = history.problems
    assert (
        problem["run_id"] == first.run_id and "runs/2026/20260814-T060000Z-aaaa/results.parquet" in problem["problem"]
    )
    assert history.to_manifest()["problems"] == [problem]


# ------------------------------------------------------------------------------------------
# one snapshot of the production versions per staging


def test_staging_uses_one_snapshot_of_the_production_versions(tmp_path, monkeypatch):
    from fitaudit.tasks import batches, batchfiles

    rng = np.random.default_rng(3)
    fleet = Fleet(tmp_path)
    series = {k: {"date": days(), "y": ar1(rng)} for k in ("a", "b")}
    write_parquet(tmp_path / "data" / "x.parquet", long_table(series))
    fleet.source("x", "data/x.parquet")
    for k in series:
        fleet.model(f"m-{k}", "x", k)
    store = tmp_path / "archive"
    for k in series:
        promote_production(store, f"m-{k}", dict(AR1), fitted_params(AR1, series[k]["y"]))
    from fitaudit.tasks.registry import load_registry

    reg = load_registry(fleet.write())
    real = batches._model_input

    def promotion_meanwhile(entry, *args, **kwargs):  # `fitaudit promote` for m-b while m-a is being staged
        if entry.id == "m-a":
            v = param_store.write_version(
                store,
                "m-b",
                spec=dict(AR1),
                noise={"law": "normal", "shape": None},
                params={"ar1": 0.1, "intercept": 50.0, "sigma2": 1.0},
                status="candidate",
                created_by="refit",
                lineage={},
            )
            param_store.promote(store, "m-b", v.version, approved_by="A. Approver", note="meanwhile")
        return real(entry, *args, **kwargs)

    monkeypatch.setattr(batches, "_model_input", promotion_meanwhile)
    staged = batches.stage_inputs(reg, AS_OF, tmp_path / "work", archive_root=store)
    items = {i.model_id: i for b in staged.batches for i in batchfiles.read_batch(b.path)}
    assert items["m-b"].production["version"] == 2  # the version of the snapshot, not the one promoted meanwhile
    assert param_store.production_version(store, "m-b").version == 4
    assert staged.production["versions"]["m-b"] == {"version": 2, "sha256": items["m-b"].production["sha256"]}
    assert staged.production["chain_seq"] == 2 and staged.production["chain_head"] == _chain(store)[1]["hash"]


# ------------------------------------------------------------------------------------------
# through the flows (a real Prefect server)


D1, D2 = AS_OF - dt.timedelta(days=7), AS_OF


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    """Three AR(1) models: m-s1 with good production parameters, m-s2 with a shifted mean (refit), m-s3 none."""
    root = tmp_path_factory.mktemp("evidence")
    rng = np.random.default_rng(7)
    fleet = Fleet(root)
    series = {f"s{i}": {"date": days(), "y": ar1(rng)} for i in range(1, 4)}
    write_parquet(root / "data" / "a.parquet", long_table(series))
    fleet.source("a", "data/a.parquet")
    for k in series:
        fleet.model(f"m-{k}", "a", k)
    template = root / "archive-template"
    good = fitted_params(AR1, series["s1"]["y"][: N_DAYS - AUDIT])
    promote_production(template, "m-s1", dict(AR1), good)
    promote_production(
        template, "m-s2", dict(AR1), {**good, "intercept": good["intercept"] + 3.0}
    )  # 3 innovation sd off
    return root, fleet.write()


def _run(registry, store, as_of, *extra) -> int:
    return main(["run", str(registry), "--archive", str(store), "--as-of", as_of.isoformat(), "--quiet", *extra])


def _verdicts(store, as_of) -> dict:
    runs = [r for r in archive.list_runs(store) if r["as_of"] == as_of.isoformat()]
    doc = json.loads((store / runs[-1]["path"] / "results.json").read_bytes())
    return {m["id"]: m["verdict"] for m in doc["models"]}


def _manifest(store, as_of) -> dict:
    runs = [r for r in archive.list_runs(store) if r["as_of"] == as_of.isoformat()]
    return json.loads((store / runs[-1]["path"] / "manifest.json").read_bytes())


@pytest.fixture(scope="module")
def after_d1(fleet, prefect_server):
    """An archive holding one audit at D1 (m-s2: refit)."""
    root, registry = fleet
    store = root / "archive-d1"
    shutil.copytree(root / "archive-template", store)
    assert _run(registry, store, D1) == EXIT_OK
    assert _verdicts(store, D1)["m-s2"] == "refit"
    return store


def _copy(after_d1, tmp_path) -> pathlib.Path:
    store = tmp_path / "archive"
    shutil.copytree(after_d1, store)
    return store


@pytest.mark.server
def test_a_same_date_refit_and_a_partial_rerun_keep_the_history(fleet, after_d1, tmp_path):
    _, registry = fleet
    control = _copy(after_d1, tmp_path / "control")
    assert _run(registry, control, D2) == EXIT_OK
    assert _verdicts(control, D2)["m-s2"] == "respecify"  # refit twice in a row: escalated by the persistence rule

    refitted = _copy(after_d1, tmp_path / "refitted")
    assert (
        main(["refit", str(registry), "--archive", str(refitted), "--as-of", D1.isoformat(), "--model", "m-s2"])
        == EXIT_OK
    )
    assert _run(registry, refitted, D2) == EXIT_OK
    assert _verdicts(refitted, D2)["m-s2"] == "respecify"
    history = _manifest(refitted, D2)["history"]
    assert history == {
        "runs": [archive.list_runs(refitted)[0]["run_id"]],
        "problems": [],
    }  # the audit at D1, not the refit

    partial = _copy(after_d1, tmp_path / "partial")
    assert _run(registry, partial, D1, "--models", "m-s1") == EXIT_OK
    assert _run(registry, partial, D2) == EXIT_OK
    assert _verdicts(partial, D2)["m-s2"] == "respecify"
    manifest = _manifest(partial, D2)
    assert manifest["kind"] == "audit" and manifest["production"]["versions"]["m-s2"]["version"] == 2
    assert manifest["production"]["versions"]["m-s3"] is None


@pytest.mark.server
def test_a_tampered_history_file_is_refused_then_named(fleet, after_d1, tmp_path, capsys):
    _, registry = fleet
    store = _copy(after_d1, tmp_path)
    (d1_run,) = archive.list_runs(store)
    path = store / d1_run["path"] / "results.parquet"
    rows = pq.read_table(path).to_pylist()
    for row in rows:
        row["verdict"] = "pass" if row["model_id"] == "m-s2" else row["verdict"]  # hides the refit at D1
    pq.write_table(pa.Table.from_pylist(rows), path)
    chain_before = (store / "chain.jsonl").read_bytes()
    capsys.readouterr()
    assert _run(registry, store, D2) == EXIT_ERROR
    err = capsys.readouterr().err
    assert f"{d1_run['path']}/results.parquet" in err and "fitaudit acknowledge" in err and "Traceback" not in err
    assert (store / "chain.jsonl").read_bytes() == chain_before  # nothing appended

    assert (
        main(["acknowledge", str(store), "--by", "C. Officer", "--note", "results.parquet edited; no backup"])
        == EXIT_OK
    )
    assert _run(registry, store, D2) == EXIT_OK
    (problem,) = _manifest(store, D2)["history"]["problems"]
    assert problem["run_id"] == d1_run["run_id"] and "results.parquet differs from its manifest" in problem["problem"]
    assert _verdicts(store, D2)["m-s2"] == "refit"  # the D1 record is not used: no escalation on edited evidence
    assert archive.verify_archive(store) == []
    (d2_run,) = [r for r in archive.list_runs(store) if r["as_of"] == D2.isoformat()]
    page = (store / d2_run["path"] / "index.html").read_text()
    assert "History incomplete." in page and d1_run["run_id"] in page  # the run page names the left-out audit


@pytest.mark.server
def test_a_run_refuses_a_truncated_chain_and_continues_after_acknowledgement(fleet, after_d1, tmp_path, capsys):
    _, registry = fleet
    store = _copy(after_d1, tmp_path)
    lines = (store / "chain.jsonl").read_bytes().splitlines(keepends=True)
    _set_chain(store, lines[:-1])  # the D1 run's line removed
    capsys.readouterr()
    assert _run(registry, store, D2) == EXIT_ERROR
    err = capsys.readouterr().err
    assert "restore chain.jsonl from a backup" in err and "fitaudit acknowledge" in err
    assert len((store / "chain.jsonl").read_bytes().splitlines()) == len(lines) - 1  # nothing appended after the gap
    assert main(["acknowledge", str(store), "--by", "C. Officer", "--note", "last line lost in a restore"]) == EXIT_OK
    assert _run(registry, store, D2) == EXIT_OK
    assert _verdicts(store, D2)["m-s2"] == "respecify"  # the D1 audit, recorded as found, still counts
    assert archive.verify_archive(store) == []


@pytest.mark.server
def test_a_run_refuses_an_unrecorded_promoted_version(fleet, after_d1, tmp_path, capsys):
    _, registry = fleet
    store = _copy(after_d1, tmp_path)
    _forge(store, "params/m-s1/2.json", "params/m-s1/3.json", version=3, note="never approved")
    capsys.readouterr()
    assert _run(registry, store, D2) == EXIT_ERROR
    assert "params/m-s1/3.json" in capsys.readouterr().err
    assert len(archive.list_runs(store)) == 1


@pytest.mark.server
def test_a_refit_racing_a_run_keeps_its_work_folder_and_promotion(fleet, after_d1, tmp_path, monkeypatch):
    from fitaudit.flows.refit import refit_flow
    from fitaudit.tasks import refit as refit_module

    _, registry = fleet
    store = _copy(after_d1, tmp_path)
    real, seen = refit_module.refit_batch, {}

    def a_run_starts_meanwhile(path, *args, **kwargs):
        seen["recovered"] = archive.recover(store)  # what every run does first
        seen["folder"] = pathlib.Path(path).parent.is_dir()
        return real(path, *args, **kwargs)

    monkeypatch.setattr(refit_module, "refit_batch", a_run_starts_meanwhile)
    result = refit_flow(
        registry=str(registry),
        model_ids=["m-s2"],
        archive=str(store),
        as_of=D1,
        approve=True,
        approved_by="A. Approver",
    )
    assert seen == {"recovered": [], "folder": True}
    (record,) = result["records"]
    assert record["status"] == "promoted"
    promotions = [e for e in archive.read_chain(store) if e["kind"] == "promotion"]
    assert promotions[-1]["payload"]["path"] == f"params/m-s2/{record['promoted_version']}.json"
    assert archive.verify_archive(store, include_notes=True) == []
    assert not any((store / ".work").iterdir())


@pytest.mark.server
def test_disk_full_at_publication_prints_the_cause_and_the_next_run_recovers(
    fleet, after_d1, tmp_path, monkeypatch, capsys
):
    _, registry = fleet
    store = _copy(after_d1, tmp_path)
    real_write = archive.writer.write_once

    def full(path, data, **options):
        if pathlib.Path(path).name == "results.parquet":
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))
        return real_write(path, data, **options)

    monkeypatch.setattr(archive.writer, "write_once", full)
    capsys.readouterr()
    assert _run(registry, store, D2) == EXIT_ERROR
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "results.parquet" in err[0] and "No space left on device [ENOSPC]" in err[0], err
    assert "already published" not in err[0]
    monkeypatch.setattr(archive.writer, "write_once", real_write)

    real_append, calls = archive.chain._append_bytes, []

    def full_after_rename(path, data):  # the run folder is already renamed into runs/
        calls.append(path)
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))

    monkeypatch.setattr(archive.chain, "_append_bytes", full_after_rename)
    assert _run(registry, store, D2) == EXIT_ERROR
    err = capsys.readouterr().err.strip().splitlines()
    assert (
        len(err) == 1
        and "was published but its chain entry could not be appended" in err[0]
        and "No space left on device" in err[0]
    ), err
    assert len(calls) == 1  # not retried
    monkeypatch.setattr(archive.chain, "_append_bytes", real_append)
    assert archive.verify_archive(store) == []  # the renamed run is pending, not a problem
    assert _run(registry, store, D2) == EXIT_OK  # its recovery records the interrupted run
    assert len([r for r in archive.list_runs(store) if r["as_of"] == D2.isoformat()]) == 2
    assert archive.verify_archive(store, include_notes=True) == []


class _ReadOnlyOs:
    """``os`` as the archive lock (a run's first write) sees it on a read-only mount: opening for writing fails."""

    def __init__(self, root: pathlib.Path):
        self._root = str(root)

    def __getattr__(self, name):
        return getattr(os, name)

    def open(self, path, flags, *args, **kwargs):
        if str(path).startswith(self._root) and flags & (os.O_WRONLY | os.O_RDWR | os.O_CREAT):
            raise OSError(errno.EROFS, os.strerror(errno.EROFS), str(path))
        return os.open(path, flags, *args, **kwargs)


@pytest.mark.server
def test_a_read_only_archive_fails_in_one_line(fleet, after_d1, tmp_path, monkeypatch, capsys):
    # tests run as root in CI, where chmod does not stop writes: the mount is simulated
    _, registry = fleet
    store = _copy(after_d1, tmp_path)
    monkeypatch.setattr(archive.lock, "os", _ReadOnlyOs(store))
    capsys.readouterr()
    assert _run(registry, store, D2) == EXIT_ERROR
    err = capsys.readouterr().err.strip().splitlines()
    assert (
        len(err) == 1 and f"{store}/.lock: Read-only file system [EROFS]" in err[0] and "writable file system" in err[0]
    ), err


@pytest.mark.server
@pytest.mark.skipif(
    os.geteuid() == 0, reason="root writes through chmod; the read-only mount is simulated in the test above"
)
def test_a_chmod_read_only_archive_fails_in_one_line(fleet, after_d1, tmp_path, capsys):
    _, registry = fleet
    store = _copy(after_d1, tmp_path)
    for path in [store, *store.rglob("*")]:
        path.chmod(path.stat().st_mode & ~0o222)
    try:
        capsys.readouterr()
        assert _run(registry, store, D2) == EXIT_ERROR
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and "Permission denied [EACCES]" in err[0], err
    finally:
        for path in [store, *store.rglob("*")]:
            path.chmod(path.stat().st_mode | 0o200)


# ------------------------------------------------------------------------------------------
# signals: the embedded Prefect server and the worker processes of `fitaudit run`


@pytest.fixture(scope="module")
def signal_fleet(tmp_path_factory):
    """40 models in batches of 4 on 2 worker processes (a run of several seconds) and a Prefect home of its own."""
    root = tmp_path_factory.mktemp("signals")
    rng = np.random.default_rng(11)
    fleet = Fleet(root)
    series = {f"s{i:02d}": {"date": days(), "y": ar1(rng)} for i in range(40)}
    write_parquet(root / "data" / "a.parquet", long_table(series))
    fleet.source("a", "data/a.parquet")
    for k in series:
        fleet.model(f"m-{k}", "a", k)
    return root, fleet.write(), root / "prefect-home"


def _cli(home: pathlib.Path, log, *args) -> subprocess.Popen:
    env = {
        k: v for k, v in os.environ.items() if k != "PREFECT_API_URL"
    }  # the embedded server, as a plain `fitaudit run`
    env.update(
        PREFECT_HOME=str(home), PREFECT_SERVER_EPHEMERAL_ENABLED="true", PREFECT_INTEGRATIONS_FITAUDIT_PROCESSES="2"
    )
    return subprocess.Popen(
        [sys.executable, "-m", "fitaudit.flows.cli", *args], env=env, stdout=log, stderr=subprocess.STDOUT
    )


def _wait_for(predicate, proc: subprocess.Popen, what: str, timeout: float = 240.0) -> None:
    deadline = time.monotonic() + timeout
    while not predicate():
        assert proc.poll() is None, f"fitaudit exited ({proc.returncode}) before {what}"
        assert time.monotonic() < deadline, f"no {what} within {timeout:.0f} s"
        time.sleep(0.2)


def _records(home: pathlib.Path) -> list[dict]:
    return [json.loads(p.read_text()) for p in sorted((home / "fitaudit-servers").glob("*.json"))]


def _gone(procs: list, timeout: float = 30.0) -> list:
    """The processes still running (zombies waiting for a reaper count as gone) after ``timeout``."""
    import psutil

    deadline = time.monotonic() + timeout
    while True:
        alive = []
        for p in procs:
            with contextlib.suppress(psutil.NoSuchProcess):
                if p.is_running() and p.status() != psutil.STATUS_ZOMBIE:
                    alive.append(p)
        if not alive or time.monotonic() > deadline:
            return alive
        time.sleep(0.2)


def _start_run(home, log, registry, archive_path):
    """`fitaudit run` in batches of four (so that it has worker processes) as a child process."""
    args = ("run", str(registry), "--archive", str(archive_path), "--as-of", AS_OF.isoformat(), "--batch-size", "4")
    return _cli(home, log, *args)


@pytest.mark.slow
def test_sigterm_stops_the_embedded_server_and_the_workers(signal_fleet, tmp_path):
    import psutil

    root, registry, home = signal_fleet
    log_path = tmp_path / "run.log"
    with open(log_path, "wb") as log:
        proc = _start_run(home, log, registry, tmp_path / "archive")
        try:
            _wait_for(lambda: b"fitaudit: audited" in log_path.read_bytes(), proc, "a finished batch")
            (record,) = _records(home)
            children = psutil.Process(proc.pid).children(recursive=True)
            assert (
                record["pid"] in {c.pid for c in children} and len(children) >= 3
            )  # the server and 2 workers at least
            proc.send_signal(signal.SIGTERM)
            assert proc.wait(timeout=120) == 128 + signal.SIGTERM
        finally:
            if proc.poll() is None:
                proc.kill()
    assert _gone(children) == []
    assert _records(home) == []
    out = log_path.read_text()
    assert "fitaudit: terminated (SIGTERM)" in out and "Traceback" not in out, out
    assert archive.verify_archive(tmp_path / "archive") == []


@pytest.mark.slow
def test_after_sigkill_the_next_command_reaps_the_server(signal_fleet, tmp_path):
    import psutil

    root, registry, home = signal_fleet
    log_path = tmp_path / "run.log"
    with open(log_path, "wb") as log:
        proc = _start_run(home, log, registry, tmp_path / "archive")
        try:
            _wait_for(lambda: len(_records(home)) == 1, proc, "the embedded server")
            (record,) = _records(home)
            children = psutil.Process(proc.pid).children(recursive=True)
            proc.kill()  # SIGKILL: nothing can be stopped by the process itself
            proc.wait(timeout=60)
        finally:
            if proc.poll() is None:
                proc.kill()
    server = psutil.Process(record["pid"])
    assert server.is_running() and server.status() != psutil.STATUS_ZOMBIE  # left behind, as the limit of SIGKILL
    reaped = subprocess.run(
        [sys.executable, "-m", "fitaudit.flows.cli", "verify", str(tmp_path / "archive")],
        env={**os.environ, "PREFECT_HOME": str(home)},
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert (
        f"stopped a Prefect server left running by an interrupted fitaudit command (pid {record['pid']}"
        in reaped.stderr
    )
    assert _gone([server, *children]) == []
    assert _records(home) == []


def test_a_refusal_comes_before_the_errors_of_the_reads_beside_the_check():
    from concurrent.futures import Future

    from fitaudit.tasks.archive_tasks import refusal_first

    refused = Future()
    refused.set_exception(ArchiveError("the archive fails verification"))
    with pytest.raises(ArchiveError, match="fails verification") as info:
        with refusal_first(refused):  # the check ran beside the reads and refused
            raise OSError("an extract could not be read")
    assert isinstance(info.value.__cause__, OSError)  # the reads' error is kept, chained
    passed = Future()
    passed.set_result([])
    for started in (passed, None):  # an intact archive, or the check run in place afterwards
        with pytest.raises(OSError, match="could not be read"):
            with refusal_first(started):
                raise OSError("an extract could not be read")
