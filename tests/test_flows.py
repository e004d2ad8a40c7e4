"""The flows on a real Prefect server: end to end, determinism across batch sizes and runners."""

from __future__ import annotations

import asyncio
import json
import pathlib
import shutil

import pytest

from fitaudit.core.vocabulary import VERDICTS
from fitaudit.demo import DEMO_AS_OF, write_demo
from fitaudit.tasks.archive import verify_archive

pytestmark = pytest.mark.server

SUBSET = [
    "demand-d-02",  # healthy
    "demand-d-07",  # planted: volatility jump (refit)
    "demand-d-13",  # planted: heavy tails, no production version (respecify)
    "demand-d-25",  # planted: too short (insufficient)
    "demand-d-31",  # planted: missing reading (error)
    "energy-pump-01",  # exponential smoothing
    "leakage-leak-01",  # threshold autoregression
]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    root = tmp_path_factory.mktemp("flows-demo")
    return write_demo(root)


def _results(run: dict) -> bytes:
    return (pathlib.Path(run["report"]).parent / "results.json").read_bytes()


def _fresh_archive(demo: dict, tmp_path: pathlib.Path) -> str:
    """A copy of the demo archive (parameter store) so that runs do not see each other."""
    target = tmp_path / "archive"
    shutil.copytree(demo["archive"], target)
    return str(target)


@pytest.fixture(scope="module")
def first_run(demo, prefect_server, tmp_path_factory):
    from fitaudit.flows.audit import audit_flow

    archive = _fresh_archive(demo, tmp_path_factory.mktemp("run1"))
    return audit_flow(registry=demo["registry"], as_of=DEMO_AS_OF, archive=archive, models=SUBSET, batch_size=3)


def test_the_audit_flow_runs_with_its_imports_frozen_and_thaws_them(demo, prefect_server, tmp_path, monkeypatch):
    import gc

    import fitaudit.flows.audit as module

    seen = []
    summary = module.results_summary

    def counting(*args, **kwargs):  # called in the flow process after the batch stages
        seen.append(gc.get_freeze_count())
        return summary(*args, **kwargs)

    monkeypatch.setattr(module, "results_summary", counting)
    gc.unfreeze()
    archive = _fresh_archive(demo, tmp_path)
    module.audit_flow(registry=demo["registry"], as_of=DEMO_AS_OF, archive=archive, models=SUBSET[:2], batch_size=3)
    assert len(seen) == 1 and seen[0] > 10_000  # Prefect's, pydantic's and fitaudit's objects, frozen
    assert gc.get_freeze_count() == 0


def test_a_damaged_archive_is_refused_by_the_check_in_a_spare_worker(demo, prefect_server, tmp_path, monkeypatch):
    import fitaudit.tasks.archive_tasks as archive_tasks
    from fitaudit.flows.audit import audit_flow
    from fitaudit.tasks import workers
    from fitaudit.tasks.archive import ArchiveError

    def in_place(archive):  # the flow process's own check: it must not run when a worker is spare
        raise AssertionError("the archive was checked in the flow process, not in the spare worker")

    monkeypatch.setattr(archive_tasks, "require_intact", in_place)

    archive = pathlib.Path(_fresh_archive(demo, tmp_path))
    version = sorted((archive / "params").glob("*/*.json"))[0]
    version.write_bytes(version.read_bytes() + b" ")  # a promoted parameter version changed after the fact
    workers.start_spare_workers(2)  # as `fitaudit run` starts them: the check runs in one, beside staging
    try:
        spare = workers._SPARE[0][1]
        with pytest.raises(ArchiveError, match="fails verification, so nothing is added to it") as refused:
            audit_flow(registry=demo["registry"], as_of=DEMO_AS_OF, archive=str(archive), models=SUBSET[:2])
        assert version.name in str(refused.value)
        assert workers._SPARE[0][1] is spare  # refused before the batches: the workers stay spare (stopped at exit)
    finally:
        workers.stop_spare_workers()
    assert not any((archive / ".work").iterdir())  # the run's scratch folder is gone
    assert not (archive / "runs").exists()  # nothing added


def test_audit_flow_end_to_end(first_run):
    counts = first_run["counts"]
    assert counts["registered"] == len(SUBSET) == sum(counts[v] for v in VERDICTS)
    doc = json.loads(_results(first_run))
    verdicts = {m["id"]: m["verdict"] for m in doc["models"]}
    assert verdicts["demand-d-25"] == "insufficient"
    assert verdicts["demand-d-31"] == "error"
    assert verdicts["demand-d-13"] == "respecify"
    assert verdicts["demand-d-07"] == "refit"
    assert not [p for p in verify_archive(first_run["archive"]) if not p.is_note]
    manifest = json.loads((pathlib.Path(first_run["report"]).parent / "manifest.json").read_text())
    for key in (
        "run_id",
        "started_utc",
        "finished_utc",
        "operator",
        "tool_version",
        "packages",
        "registry",
        "inputs",
        "seeds",
        "timings",
        "files",
    ):
        assert manifest.get(key), key
    assert manifest["batches"] == 3  # 7 models in batches of 3 from two sources


def test_refit_refuses_a_registry_changed_since_the_audit(demo, first_run, tmp_path):
    from fitaudit.flows.refit import refit_flow
    from fitaudit.tasks.registry import RegistryChangedError

    manifest = json.loads((pathlib.Path(first_run["report"]).parent / "manifest.json").read_text())
    audited = manifest["registry"]["sha256"]  # the registry the audit read
    archive = pathlib.Path(_fresh_archive(demo, tmp_path))
    files = sorted(str(p.relative_to(archive)) for p in archive.rglob("*"))
    edited = pathlib.Path(demo["registry"]).with_name("registry-edited.yaml")  # same folder: same data
    edited.write_text(pathlib.Path(demo["registry"]).read_text() + "# edited after the audit\n")
    with pytest.raises(
        RegistryChangedError,
        match=rf"registry changed since the audit that asked for this refit \(SHA-256 {audited} then",
    ):
        refit_flow(
            registry=str(edited),
            model_ids=["demand-d-07"],
            archive=str(archive),
            as_of=DEMO_AS_OF,
            registry_sha256=audited,
        )
    assert sorted(str(p.relative_to(archive)) for p in archive.rglob("*")) == files  # nothing refitted or recorded
    run = refit_flow(
        registry=demo["registry"],
        model_ids=["demand-d-07"],
        archive=str(archive),
        as_of=DEMO_AS_OF,
        registry_sha256=audited,
    )
    assert [(r["model_id"], r["status"]) for r in run["records"]] == [
        ("demand-d-07", "awaiting approval")
    ]  # the audited file: refitted


def test_results_do_not_depend_on_batch_size(demo, first_run, tmp_path):
    from fitaudit.flows.audit import audit_flow

    other = audit_flow(
        registry=demo["registry"], as_of=DEMO_AS_OF, archive=_fresh_archive(demo, tmp_path), models=SUBSET, batch_size=1
    )
    assert _results(other) == _results(first_run)


def test_events_and_artifacts_exist(first_run):
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterKey

    async def read():
        async with get_client() as client:
            arts = await client.read_artifacts(
                artifact_filter=ArtifactFilter(
                    key=ArtifactFilterKey(any_=["fitaudit-verdicts", "fitaudit-summary", "fitaudit-report"])
                )
            )
            return {a.key for a in arts}

    assert {"fitaudit-verdicts", "fitaudit-summary", "fitaudit-report"} <= asyncio.run(read())


@pytest.mark.slow
def test_dask_runner_gives_the_same_results(demo, first_run, tmp_path):
    pytest.importorskip("prefect_dask")
    from fitaudit.flows.audit import audit_flow
    from fitaudit.flows.runners import dask_runner

    run = audit_flow.with_options(task_runner=dask_runner("local:2"))(
        registry=demo["registry"], as_of=DEMO_AS_OF, archive=_fresh_archive(demo, tmp_path), models=SUBSET, batch_size=3
    )
    assert run["counts"] == first_run["counts"]
    assert _results(run) == _results(first_run)


def test_a_second_run_names_the_first_run_and_the_chain_head_it_extends(demo, prefect_server, tmp_path):
    import datetime as dt
    import html

    from fitaudit.flows.audit import audit_flow
    from fitaudit.tasks.archive import chain_head, read_chain

    archive = _fresh_archive(demo, tmp_path)
    before = chain_head(archive)  # the demo's initial promotions are chained
    first = audit_flow(
        registry=demo["registry"],
        as_of=DEMO_AS_OF - dt.timedelta(days=28),
        archive=archive,
        models=["demand-d-02"],
        search_candidates=False,
    )
    after_first = chain_head(archive)
    second = audit_flow(
        registry=demo["registry"], as_of=DEMO_AS_OF, archive=archive, models=["demand-d-02"], search_candidates=False
    )
    entry = read_chain(archive)[after_first[1] - 1]
    assert entry["kind"] == "run" and entry["payload"]["run_id"] == first["run_id"] and entry["hash"] == after_first[0]

    page1 = pathlib.Path(first["report"]).read_text(encoding="utf-8")
    assert f"{before[0]} (seq {before[1]})" in page1
    assert "none: the first audit run in this archive" in page1
    page2 = pathlib.Path(second["report"]).read_text(encoding="utf-8")
    assert f"{after_first[0]} (seq {after_first[1]})" in page2  # the first run's own chain entry
    assert f"{first['run_id']}</span> (as of {first['as_of']})" in page2
    assert "none (first run)" not in page2
    manifest = json.loads((pathlib.Path(second["report"]).parent / "manifest.json").read_text())
    assert manifest["extends"] == {
        "chain_head": after_first[0],
        "chain_seq": after_first[1],
        "previous_run_id": first["run_id"],
        "previous_as_of": first["as_of"],
    }
    # the demo registers 45 models fitted here (one entry rejected) and 4 forecast entries
    assert manifest["scope"] == {"models_requested": ["demand-d-02"], "registry_models": 49, "unreadable_sources": []}
    assert "This is a partial run: only 1 of the registry's 49 models were audited (--models)" in html.unescape(page2)
    assert chain_head(archive)[1] == after_first[1] + 1  # the second run's entry follows the head its page names


def _webhook_receiver():
    """A local HTTP server that keeps the JSON bodies POSTed to it (a stand-in for a chat or mail service)."""
    import http.server
    import threading

    received: list[dict] = []

    class Hook(http.server.BaseHTTPRequestHandler):
        def do_POST(self):  # noqa: N802 (the standard library's name)
            received.append(json.loads(self.rfile.read(int(self.headers.get("Content-Length", 0)))))
            self.send_response(204)
            self.end_headers()

        def log_message(self, *args):
            pass

    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Hook)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return server, received


def test_owner_automation_sends_each_owner_their_exceptions(demo, prefect_server, tmp_path):
    import time
    import uuid

    from prefect.automations import Automation
    from prefect.blocks.notifications import CustomWebhookNotificationBlock

    from fitaudit.flows.deploy import install_owner_notifications
    from fitaudit.tasks.events import emit_verdict_events

    server, received = _webhook_receiver()
    owner, other = f"Zone {uuid.uuid4().hex[:8]} (A. Owner)", f"Zone {uuid.uuid4().hex[:8]} (B. Other)"
    block = CustomWebhookNotificationBlock(
        name="fitaudit test",
        url=f"http://127.0.0.1:{server.server_port}/hook",
        json_data={"subject": "{{subject}}", "body": "{{body}}"},
    )
    slug = f"fitaudit-test-{uuid.uuid4().hex[:8]}"
    block.save(slug, overwrite=True)
    # the registry setting `fitaudit serve` installs from: the policy's notify
    registry = pathlib.Path(demo["registry"]).with_name(f"registry-{slug}.yaml")
    registry.write_text(
        pathlib.Path(demo["registry"])
        .read_text()
        .replace(
            "  refit_policy: approval\n",
            f"  refit_policy: approval\n  notify:\n    - {{owner: '{owner}', block: 'custom-webhook/{slug}'}}\n",
            1,
        )
    )
    assert install_owner_notifications(str(registry)) == [f"fitaudit: exceptions for {owner}"]
    assert install_owner_notifications(str(registry)) == [
        f"fitaudit: exceptions for {owner}"
    ]  # installing again replaces it
    automation = Automation.read(name=f"fitaudit: exceptions for {owner}")
    try:
        time.sleep(3)  # the server's trigger service loads new automations
        folder = tmp_path / "archive" / "runs" / "2026" / "r1"
        run = {
            "run_id": "20261130-T060000Z-abcd",
            "as_of": "2026-11-30",
            "report_path": str(folder / "index.html"),
            "archive": str(tmp_path / "archive"),
            "report_base_url": "https://audit.example.org/fitaudit",
            "policy": {"days_to_act": {"tier_1": 7, "tier_2": 10, "tier_3": 28}},
        }
        records = [
            {
                "id": "m-refit",
                "safe_id": "m-refit",
                "owner": owner,
                "tier": 2,
                "verdict": "refit",
                "escalated": False,
                "reasons": ["Refit: the production parameters no longer fit."],
                "audit": None,
            },
            {
                "id": "m-pass",
                "safe_id": "m-pass",
                "owner": owner,
                "tier": 2,
                "verdict": "pass",
                "escalated": False,
                "reasons": ["Pass."],
                "audit": None,
            },
            {
                "id": "m-error",
                "safe_id": "m-error",
                "owner": other,
                "tier": 1,
                "verdict": "error",
                "escalated": False,
                "reasons": ["model 'm-error': no data."],
                "audit": None,
            },
        ]
        assert emit_verdict_events(records, run) == 3
        deadline = time.monotonic() + 90
        while time.monotonic() < deadline and not received:
            time.sleep(1)
        time.sleep(5)  # anything else (a pass, another owner's exception) would arrive by now
    finally:
        automation.delete()
        server.shutdown()
    assert len(received) == 1, received  # the owner's one exception; not their pass, not the other owner's error
    subject, body = received[0]["subject"], received[0]["body"]
    assert subject == "fitaudit: m-refit needs refit (as of 2026-11-30)"
    assert "Why: Refit: the production parameters no longer fit." in body
    assert "approve their promotion" in body and "By 2026-12-10." in body  # tier 2: 30 November + 10 days
    assert "Model page: https://audit.example.org/fitaudit/runs/2026/r1/models/m-refit.html" in body
    assert "Run report: https://audit.example.org/fitaudit/runs/2026/r1/index.html" in body


def test_the_run_event_carries_the_manifest_digest_the_chain_head_and_the_models_to_refit(first_run):
    import asyncio
    import time

    from prefect.client.orchestration import get_client
    from prefect.events.filters import EventFilter, EventNameFilter, EventResourceFilter

    async def read():
        async with get_client() as client:
            page = await client.read_events(
                filter=EventFilter(
                    event=EventNameFilter(name=["fitaudit.run.completed"]),
                    resource=EventResourceFilter(id=[f"fitaudit.run.{first_run['run_id']}"]),
                ),
                limit=5,
            )
            return page.events

    deadline, events = time.monotonic() + 60, []
    while time.monotonic() < deadline and not events:
        events = asyncio.run(read())
        time.sleep(0 if events else 1)
    assert len(events) == 1
    payload, resource = events[0].payload, events[0].resource
    manifest = (pathlib.Path(first_run["report"]).parent / "manifest.json").read_bytes()
    import hashlib

    assert payload["manifest_sha256"] == hashlib.sha256(manifest).hexdigest() == first_run["manifest_sha256"]
    assert payload["chain_head"] == first_run["chain_head"] and len(payload["chain_head"]["hash"]) == 64
    assert sorted(payload["refit_models"]) == [
        "demand-d-07",
        "demand-d-13",
    ]  # refit and respecify alike, as `run --refit`
    assert resource.get("fitaudit.refits-needed") == "yes"
    assert payload["report_url"] == pathlib.Path(first_run["report"]).as_uri()  # no report_base_url: a file:// link


def test_stale_extracts_are_named_once_in_the_manifest_and_on_the_run_page(demo, prefect_server, tmp_path):
    import datetime as dt

    from fitaudit.flows.audit import audit_flow

    late = DEMO_AS_OF + dt.timedelta(days=8)  # the demo's extracts end at DEMO_AS_OF: 8 daily periods late
    models = ["demand-d-02", "demand-d-07", "energy-pump-01", "leakage-leak-01"]
    run = audit_flow(
        registry=demo["registry"], as_of=late, archive=_fresh_archive(demo, tmp_path), models=models, batch_size=3
    )
    doc = json.loads(_results(run))
    assert {m["id"]: m["verdict"] for m in doc["models"]} == dict.fromkeys(models, "insufficient")
    manifest = json.loads((pathlib.Path(run["report"]).parent / "manifest.json").read_text())
    stale = manifest["stale_sources"]
    assert sorted(stale) == ["demand", "network"]
    assert stale["demand"]["models"] == ["demand-d-02", "demand-d-07"] and stale["demand"]["as_of"] == late.isoformat()
    page = pathlib.Path(run["report"]).read_text(encoding="utf-8")
    assert page.count("Stale source.") == 2 and page.count("Source demand (") == 1
