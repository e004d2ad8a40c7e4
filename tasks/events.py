"""Prefect events and artifacts of an audit run.

One event per model verdict (``fitaudit.model.pass``, ``.refit``, ``.respecify``,
``.insufficient``, ``.error``; resource ``fitaudit.model.<id>`` with the owner as the label
``fitaudit.owner``; payload: the reason, what the owner should do and by when, the link to the
model's page) and one per run (``fitaudit.run.completed``: the counts, the manifest's SHA-256, the
chain head the run's entry made, the link to the report and ``refit_models``, the models the audit
flagged for a refit).  The refit deployment's trigger listens for the run event and starts one
refit run for all flagged models; :func:`owner_automation` builds the automation that sends each
owner their exceptions (see :mod:`fitaudit.flows.deploy`).

Report links are ``file://`` URIs unless the ``report_base_url`` setting says where the archive
is served (:func:`report_url`).

Each verdict event's resource carries the label ``fitaudit.entry``: ``model`` for a model
fitaudit fits, ``forecasts`` for forecasts made elsewhere, whose ``refit`` verdict asks the owner
to re-estimate (fitaudit cannot refit them; the refit deployment's trigger matches ``model``
only).
"""

from __future__ import annotations

import datetime as dt
import pathlib
import re
from collections.abc import Callable, Mapping, Sequence
from typing import Any

from prefect import task
from prefect.artifacts import create_link_artifact, create_markdown_artifact, create_table_artifact
from prefect.cache_policies import NO_CACHE
from prefect.events import emit_event

from fitaudit.core.vocabulary import VERDICTS

from .outcomes import is_forecast_record

__all__ = [
    "EVENT_PREFIX",
    "ENTRY_LABEL",
    "OWNER_LABEL",
    "EXCEPTION_EVENTS",
    "RUN_EVENT",
    "REFITS_LABEL",
    "verdict_event_name",
    "report_url",
    "emit_verdict_events",
    "emit_run_event",
    "publish_artifacts",
    "events_task",
    "REFIT_EVENTS",
    "refit_events_task",
    "artifact_key",
    "owner_automation",
]

EVENT_PREFIX = "fitaudit"
#: Resource label of a verdict event naming the entry's kind: ``model`` or ``forecasts``.
ENTRY_LABEL = "fitaudit.entry"


#: Resource label of a verdict event naming the model's owner (automations filter on it).
OWNER_LABEL = "fitaudit.owner"
#: The completed-run event.
RUN_EVENT = f"{EVENT_PREFIX}.run.completed"
#: Resource label of the run event: ``yes`` when the audit flagged models for a refit.
REFITS_LABEL = "fitaudit.refits-needed"


def verdict_event_name(verdict: str) -> str:
    """``fitaudit.model.<verdict>``."""
    return f"{EVENT_PREFIX}.model.{verdict}"


#: The verdict events of exceptions (every verdict but ``pass``).
EXCEPTION_EVENTS = tuple(verdict_event_name(v) for v in VERDICTS if v != "pass")


def report_url(path: str | None, archive: str | None, base_url: str = "") -> str | None:
    """A link to a page of the archive: ``<base_url>/<path below the archive>`` when the archive is
    served or synced there (setting ``report_base_url``), else a ``file://`` URI.

    Examples
    --------
    >>> report_url("/srv/archive/runs/2026/r1/index.html", "/srv/archive", "https://audit.example/fitaudit/")
    'https://audit.example/fitaudit/runs/2026/r1/index.html'
    >>> report_url("/srv/archive/runs/2026/r1/index.html", "/srv/archive")
    'file:///srv/archive/runs/2026/r1/index.html'
    """
    if not path:
        return None
    page = pathlib.Path(path)
    if base_url and archive:
        try:
            rel = page.resolve().relative_to(pathlib.Path(archive).resolve())
        except ValueError:
            rel = None
        if rel is not None:
            return f"{base_url.rstrip('/')}/{rel.as_posix()}"
    return page.resolve().as_uri() if page.is_absolute() else f"file://{path}"


def _model_urls(report_path: str | None, archive: str | None, base_url: str = "") -> Callable[[str], str | None]:
    """``safe_id -> report_url(<run folder>/models/<safe_id>.html, archive, base_url)``, the folder
    resolved once per run rather than once per page (a safe id is a plain file name: no separator,
    nothing a URI escapes).

    >>> _model_urls("/srv/archive/runs/2026/r1/index.html", "/srv/archive", "https://audit.example")("m-1")
    'https://audit.example/runs/2026/r1/models/m-1.html'
    """
    if not report_path:
        return lambda safe_id: None
    models = report_url(str(pathlib.Path(report_path).parent / "models"), archive, base_url)
    return lambda safe_id: f"{models}/{safe_id}.html"


def artifact_key(*parts: str) -> str:
    """A Prefect artifact key (``^[a-z0-9-]*$``) built from ``parts``."""
    text = "-".join(parts).lower()
    return re.sub(r"-+", "-", re.sub(r"[^a-z0-9-]", "-", text)).strip("-")[:200]


def _resource_id(model_id: str) -> str:
    return f"{EVENT_PREFIX}.model.{model_id}"


def emit_verdict_events(records: Sequence[Mapping[str, Any]], run: Mapping[str, Any]) -> int:
    """Emit one event per model; returns how many were emitted.

    ``run`` holds ``run_id``, ``as_of``, ``report_path``, ``registry_sha256`` and, optionally,
    ``archive``, ``report_base_url`` (links) and ``policy`` (the owner's deadline).
    """
    from .report import record_action

    count = 0
    base = run.get("report_base_url") or ""
    report = report_url(run.get("report_path"), run.get("archive"), base)
    model_url = _model_urls(run.get("report_path"), run.get("archive"), base)
    for rec in records:
        audit = rec.get("audit") or {}
        deciding = audit.get("production") or audit.get("refit") or {}
        kind = "forecasts" if is_forecast_record(rec) else "model"
        action = record_action(rec, run.get("policy"), run["as_of"])
        emit_event(
            event=verdict_event_name(rec["verdict"]),
            resource={
                "prefect.resource.id": _resource_id(rec["safe_id"]),
                "prefect.resource.name": rec["safe_id"],
                OWNER_LABEL: str(rec.get("owner") or ""),
                ENTRY_LABEL: kind,
            },
            related=[
                {"prefect.resource.id": f"{EVENT_PREFIX}.run.{run['run_id']}", "prefect.resource.role": "audit-run"}
            ],
            payload={
                "model_id": rec["id"],
                "verdict": rec["verdict"],
                "reason": rec["reasons"][0] if rec["reasons"] else "",
                "as_of": run["as_of"],
                "run_id": run["run_id"],
                "p_value": deciding.get("p_value"),
                "p_adjusted": deciding.get("p_adjusted"),
                "r_max": deciding.get("r_max"),
                "report": run.get("report_path"),
                "registry_sha256": run.get("registry_sha256"),  # a triggered refit refuses a changed registry
                "entry": kind,
                "owner": str(rec.get("owner") or ""),
                "action": action["action"],
                "due": action["due"],
                "model_url": model_url(rec["safe_id"]),
                "report_url": report,
            },
        )
        count += 1
    return count


def emit_run_event(run: Mapping[str, Any], summary: Mapping[str, Any]) -> None:
    """One event for the completed run: the counts, the manifest's SHA-256, the chain head of the
    run's entry (``{"hash", "seq"}``), the report's link, the registry's SHA-256 and
    ``refit_models`` (the resource label :data:`REFITS_LABEL` says whether there are any)."""
    refits = list(run.get("refit_models") or ())
    emit_event(
        event=RUN_EVENT,
        resource={
            "prefect.resource.id": f"{EVENT_PREFIX}.run.{run['run_id']}",
            "prefect.resource.name": run["run_id"],
            REFITS_LABEL: "yes" if refits else "no",
        },
        payload={
            "as_of": run["as_of"],
            "run_id": run["run_id"],
            "report": run.get("report_path"),
            "report_url": report_url(run.get("report_path"), run.get("archive"), run.get("report_base_url") or ""),
            "manifest_sha256": run.get("manifest_sha256"),
            "chain_head": run.get("chain_head"),
            "registry_sha256": run.get("registry_sha256"),
            "refit_models": refits,
            **{k: summary.get(k) for k in ("registered", "audited", *VERDICTS)},
        },
    )


def publish_artifacts(records: Sequence[Mapping[str, Any]], summary: Mapping[str, Any], run: Mapping[str, Any]) -> None:
    """A table artifact of verdicts, a markdown summary and a link to the report."""
    rows = [
        {
            "model": r["id"],
            "owner": r.get("owner") or "",
            "verdict": r["verdict"],
            "movement": r["movement"],
            "reason": (r["reasons"][0] if r["reasons"] else "")[:300],
        }
        for r in sorted(records, key=lambda r: (r["severity"], r["id"]))
    ]
    create_table_artifact(
        rows,
        key=artifact_key("fitaudit-verdicts"),
        description=f"Verdicts of audit run {run['run_id']} (as of {run['as_of']})",
    )
    lines = [
        f"# fitaudit run {run['run_id']}",
        f"As of **{run['as_of']}**: {summary['registered']} registered, {summary['audited']} audited.",
        "",
        "| verdict | models |",
        "| --- | --- |",
        *[f"| {v} | {summary[v]} |" for v in VERDICTS],
        "",
        "Audit results inform people; they do not replace model validation.",
    ]
    create_markdown_artifact(
        "\n".join(lines), key=artifact_key("fitaudit-summary"), description="Summary of the latest audit run"
    )
    if run.get("report_path"):
        link = report_url(run["report_path"], run.get("archive"), run.get("report_base_url") or "")
        create_link_artifact(
            link,
            link_text="Audit report",
            key=artifact_key("fitaudit-report"),
            description="Report of the latest audit run",
        )


@task(name="publish-events", cache_policy=NO_CACHE, persist_result=False)
def events_task(recs: list[dict], summary: dict, run: dict) -> int:
    """One event per model verdict, one per run, and the run's artifacts."""
    n = emit_verdict_events(recs, run)
    emit_run_event(run, summary)
    publish_artifacts(recs, summary, run)
    return n


#: A refit record's status and the event it emits (``fitaudit.model.<name>``).
REFIT_EVENTS = {
    "promoted": "promoted",
    "awaiting approval": "refit-awaiting-approval",
    "respecify": "respecify-candidates",
}


@task(name="refit-events", cache_policy=NO_CACHE, persist_result=False)
def refit_events_task(records: list[dict], run_id: str) -> None:
    """``fitaudit.model.promoted`` / ``.refit-awaiting-approval`` / ``.respecify-candidates`` events."""
    for rec in records:
        name = REFIT_EVENTS.get(rec.get("status"))
        if name:
            emit_event(
                event=f"fitaudit.model.{name}",
                resource={
                    "prefect.resource.id": f"fitaudit.model.{rec['model_id']}",
                    "prefect.resource.name": rec["model_id"],
                },
                related=[{"prefect.resource.id": f"fitaudit.refit.{run_id}", "prefect.resource.role": "refit-run"}],
                payload={
                    k: rec.get(k) for k in ("status", "candidate_version", "promoted_version") if rec.get(k) is not None
                }
                | {"candidates": len(rec.get("candidates") or [])},
            )


def owner_automation(owner: str, block_document_id, *, name: str | None = None, within: dt.timedelta = dt.timedelta(0)):
    """An example Prefect automation that sends ``owner`` each exception of every audit run.

    It is triggered by the verdict events of exceptions (:data:`EXCEPTION_EVENTS`) whose resource
    carries ``fitaudit.owner`` = ``owner``, one notification per exception, through the Prefect
    notification block ``block_document_id`` (Slack, Microsoft Teams, e-mail, a webhook, ...): the
    model, its verdict, the reason, what to do and by when, and the links to its page and the run's
    report.  ``fitaudit serve`` installs one per owner named in the policy's ``notify``
    (:func:`fitaudit.flows.deploy.install_owner_notifications`).

    Returns
    -------
    prefect.automations.Automation
        Not yet created: call ``.create()``.
    """
    from prefect.automations import Automation, EventTrigger, Posture, SendNotification

    body = (
        "{{ event.payload.model_id }}: {{ event.payload.verdict }} in the audit as of {{ event.payload.as_of }} "
        "(run {{ event.payload.run_id }}).\n\n"
        "Why: {{ event.payload.reason }}\n\n"
        "What to do: {{ event.payload.action }}{% if event.payload.due %} By {{ event.payload.due }}.{% endif %}\n\n"
        "Model page: {{ event.payload.model_url }}\nRun report: {{ event.payload.report_url }}"
    )
    return Automation(
        name=name or f"fitaudit: exceptions for {owner}"[:200],
        description=f"Sends {owner} every exception of a fitaudit audit run (one notification per model).",
        trigger=EventTrigger(
            expect=set(EXCEPTION_EVENTS),
            match={"prefect.resource.id": f"{EVENT_PREFIX}.model.*", OWNER_LABEL: owner},
            posture=Posture.Reactive,
            threshold=1,
            within=within,
        ),
        actions=[
            SendNotification(
                block_document_id=block_document_id,
                subject=(
                    "fitaudit: {{ event.payload.model_id }} needs {{ event.payload.verdict }} (as of {{ "
                    "event.payload.as_of }})"
                ),
                body=body,
            )
        ],
    )
