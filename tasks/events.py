"""Prefect events and artifacts of an audit run.

One event per model verdict (``fitaudit.model.pass``, ``.refit``, ``.respecify``,
``.insufficient``, ``.error``; resource ``fitaudit.model.<id>``) and one per run
(``fitaudit.run.completed``).  An automation or a deployment trigger can listen for
``fitaudit.model.refit`` and start the refit flow (see :mod:`fitaudit.flows.deploy`).

Each verdict event's resource carries the label ``fitaudit.entry``: ``model`` for a model
fitaudit fits, ``forecasts`` for forecasts made elsewhere, whose ``refit`` verdict asks the owner
to re-estimate (fitaudit cannot refit them; the refit deployment's trigger matches ``model``
only).
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from typing import Any

from prefect.artifacts import create_link_artifact, create_markdown_artifact, create_table_artifact
from prefect.events import emit_event

from fitaudit.core.vocabulary import VERDICTS

from .results import is_forecast_record

__all__ = ["EVENT_PREFIX", "ENTRY_LABEL", "verdict_event_name", "emit_verdict_events", "emit_run_event", "publish_artifacts", "artifact_key"]

EVENT_PREFIX = "fitaudit"
#: Resource label of a verdict event naming the entry's kind: ``model`` or ``forecasts``.
ENTRY_LABEL = "fitaudit.entry"


def verdict_event_name(verdict: str) -> str:
    """``fitaudit.model.<verdict>``."""
    return f"{EVENT_PREFIX}.model.{verdict}"


def artifact_key(*parts: str) -> str:
    """A Prefect artifact key (``^[a-z0-9-]*$``) built from ``parts``."""
    text = "-".join(parts).lower()
    return re.sub(r"-+", "-", re.sub(r"[^a-z0-9-]", "-", text)).strip("-")[:200]


def _resource_id(model_id: str) -> str:
    return f"{EVENT_PREFIX}.model.{model_id}"


def emit_verdict_events(records: Sequence[Mapping[str, Any]], run: Mapping[str, Any]) -> int:
    """Emit one event per model; returns how many were emitted."""
    count = 0
    for rec in records:
        audit = rec.get("audit") or {}
        deciding = audit.get("production") or audit.get("refit") or {}
        kind = "forecasts" if is_forecast_record(rec) else "model"
        emit_event(
            event=verdict_event_name(rec["verdict"]),
            resource={
                "prefect.resource.id": _resource_id(rec["safe_id"]),
                "prefect.resource.name": rec["safe_id"],
                "fitaudit.owner": str(rec.get("owner") or ""),
                ENTRY_LABEL: kind,
            },
            related=[{"prefect.resource.id": f"{EVENT_PREFIX}.run.{run['run_id']}", "prefect.resource.role": "audit-run"}],
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
            },
        )
        count += 1
    return count


def emit_run_event(run: Mapping[str, Any], summary: Mapping[str, Any]) -> None:
    """One event for the completed run, with the summary counts."""
    emit_event(
        event=f"{EVENT_PREFIX}.run.completed",
        resource={"prefect.resource.id": f"{EVENT_PREFIX}.run.{run['run_id']}", "prefect.resource.name": run["run_id"]},
        payload={"as_of": run["as_of"], "report": run.get("report_path"), **{k: summary.get(k) for k in ("registered", "audited", *VERDICTS)}},
    )


def publish_artifacts(records: Sequence[Mapping[str, Any]], summary: Mapping[str, Any], run: Mapping[str, Any]) -> None:
    """A table artifact of verdicts, a markdown summary and a link to the report."""
    rows = [
        {"model": r["id"], "owner": r.get("owner") or "", "verdict": r["verdict"], "movement": r["movement"], "reason": (r["reasons"][0] if r["reasons"] else "")[:300]}
        for r in sorted(records, key=lambda r: (r["severity"], r["id"]))
    ]
    create_table_artifact(rows, key=artifact_key("fitaudit-verdicts"), description=f"Verdicts of audit run {run['run_id']} (as of {run['as_of']})")
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
    create_markdown_artifact("\n".join(lines), key=artifact_key("fitaudit-summary"), description="Summary of the latest audit run")
    if run.get("report_path"):
        create_link_artifact(f"file://{run['report_path']}", link_text="Audit report", key=artifact_key("fitaudit-report"), description="Report of the latest audit run")
