"""Served deployments on a real Prefect server: trigger through the API, check run, artifacts, events,
and the refit automation fired by the audit's ``fitaudit.run.completed`` event (one refit run for
every model the audit flagged)."""

from __future__ import annotations

import asyncio
import hashlib
import os
import pathlib
import signal
import subprocess
import sys
import time

import pytest

from fitaudit.demo import DEMO_AS_OF, write_demo

pytestmark = [pytest.mark.server, pytest.mark.slow]

MODELS = ["demand-d-02", "demand-d-07", "energy-pump-01"]  # d-07 is planted to need a refit


@pytest.fixture(scope="module")
def served(prefect_server, tmp_path_factory):
    root = tmp_path_factory.mktemp("served")
    demo = write_demo(root)
    env = dict(os.environ, PREFECT_API_URL=prefect_server)
    code = (
        "import sys; from fitaudit.flows.deploy import serve_all; serve_all(registry=sys.argv[1], archive=sys.argv[2])"
    )
    log = open(root / "serve.log", "wb")
    proc = subprocess.Popen(
        [sys.executable, "-c", code, demo["registry"], demo["archive"]],
        env=env,
        stdout=log,
        stderr=subprocess.STDOUT,
        start_new_session=True,
    )
    try:
        _wait_for_deployments(["fitaudit-audit/weekly", "fitaudit-refit/refit"], demo["registry"], proc)
        yield demo
    finally:
        os.killpg(proc.pid, signal.SIGTERM)
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
        log.close()


def _wait_for_deployments(names: list[str], registry: str, proc: subprocess.Popen, timeout: float = 120) -> None:
    """Wait until this process has (re)registered every deployment for ``registry``.

    A server that keeps its database between sessions still holds the same deployments from an
    earlier session, pointing at that session's (deleted) registry: existence alone is not enough.
    """
    from prefect.client.orchestration import get_client

    async def found() -> bool:
        async with get_client() as client:
            for name in names:
                try:
                    deployment = await client.read_deployment_by_name(name)
                except Exception:
                    return False
                if name.endswith("/weekly") and deployment.parameters.get("registry") != registry:
                    return False
                if name.endswith("/refit") and not any(
                    getattr(t, "parameters", None) and t.parameters.get("registry") == registry
                    for t in await _triggers(client, deployment.id)
                ):
                    return False
            return True

    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        assert proc.poll() is None, "the serving process exited"
        if asyncio.run(found()):
            return
        time.sleep(1)
    raise AssertionError(f"deployments {names} did not appear within {timeout} s")


async def _triggers(client, deployment_id) -> list:
    """The run-deployment actions of the automations attached to a deployment."""
    automations = await client.read_resource_related_automations(f"prefect.deployment.{deployment_id}")
    return [action for automation in automations for action in automation.actions]


def _events(prefix: str, since, want: int, timeout: float = 60, flow_run=None) -> list:
    """Events named ``prefix...`` since ``since``; with ``flow_run``, only those emitted by that flow run
    (a server database shared with other test sessions holds their events too)."""
    from prefect.client.orchestration import get_client
    from prefect.events.filters import EventFilter, EventNameFilter, EventOccurredFilter, EventRelatedFilter

    related = EventRelatedFilter(id=[f"prefect.flow-run.{flow_run}"]) if flow_run is not None else None

    async def read():
        async with get_client() as client:
            page = await client.read_events(
                filter=EventFilter(
                    event=EventNameFilter(prefix=[prefix]), occurred=EventOccurredFilter(since=since), related=related
                ),
                limit=50,
            )
            return page.events

    deadline = time.monotonic() + timeout
    events: list = []
    while time.monotonic() < deadline:
        events = asyncio.run(read())
        if len(events) >= want:
            return events
        time.sleep(1)
    return events


def test_served_audit_runs_through_the_api_with_artifacts_events_and_triggered_refit(served):
    import datetime as dt

    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import (
        ArtifactFilter,
        ArtifactFilterFlowRunId,
        DeploymentFilter,
        DeploymentFilterName,
    )
    from prefect.deployments import run_deployment

    since = dt.datetime.now(dt.UTC) - dt.timedelta(seconds=5)
    run = run_deployment(
        "fitaudit-audit/weekly",
        parameters={"as_of": DEMO_AS_OF.isoformat(), "models": MODELS},
        timeout=600,
        poll_interval=2,
    )
    assert run.state.is_completed(), run.state

    async def artifacts():
        async with get_client() as client:
            arts = await client.read_artifacts(
                artifact_filter=ArtifactFilter(flow_run_id=ArtifactFilterFlowRunId(any_=[run.id]))
            )
            return {a.key for a in arts}

    assert {"fitaudit-verdicts", "fitaudit-summary", "fitaudit-report"} <= asyncio.run(artifacts())

    verdict_events = _events("fitaudit.model.", since, want=len(MODELS), flow_run=run.id)
    names = {e.event for e in verdict_events}
    assert len(verdict_events) == len(MODELS) and "fitaudit.model.refit" in names
    (completed,) = _events("fitaudit.run.completed", since, want=1, flow_run=run.id)
    assert completed.payload["refit_models"] == ["demand-d-07"] and len(completed.payload["manifest_sha256"]) == 64

    # the refit deployment's trigger turns the run event into one refit flow run for the flagged models
    async def refit_runs():
        async with get_client() as client:
            return await client.read_flow_runs(
                deployment_filter=DeploymentFilter(name=DeploymentFilterName(any_=["refit"]))
            )

    deadline = time.monotonic() + 180
    runs = []
    while time.monotonic() < deadline:
        # runs of this session only: a kept server database also holds earlier sessions' runs
        runs = [
            r
            for r in asyncio.run(refit_runs())
            if r.parameters.get("model_ids") == ["demand-d-07"] and r.parameters.get("registry") == served["registry"]
        ]
        if runs and runs[0].state is not None and runs[0].state.is_final():
            break
        time.sleep(2)
    assert runs, "no refit run was triggered by the fitaudit.run.completed event"
    assert len(runs) == 1 and runs[0].state.is_completed(), runs  # one refit run per audit
    assert (
        runs[0].name == f"refit {DEMO_AS_OF.isoformat()} registry.yaml, 1 model"
    )  # the audit's as-of date, not today's
    # the trigger forwards the audited registry's digest: the refit checks it is the same file
    assert (
        runs[0].parameters.get("registry_sha256")
        == hashlib.sha256(pathlib.Path(served["registry"]).read_bytes()).hexdigest()
    )
