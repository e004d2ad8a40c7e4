"""Deployments: the weekly audit on a cron schedule and the refit flow triggered by events.

``fitaudit serve`` calls :func:`serve_all`, which serves both deployments from one long-lived
process with Prefect's serve mechanism (no work pool needed).  Both need a real Prefect server:
the embedded one runs no scheduler.  Teams with workers can use ``flows/prefect.yaml`` instead.

The refit deployment carries the automation: a Prefect event trigger that starts a refit run for
every ``fitaudit.model.refit`` event of a model fitaudit fits (resource label
``fitaudit.entry: model``; a forecast entry's refit verdict asks its owner to re-estimate), with
the model id taken from the event's resource name::

    DeploymentEventTrigger(expect={"fitaudit.model.refit"},
                           match={"prefect.resource.id": "fitaudit.model.*", "fitaudit.entry": "model"},
                           parameters={"model_ids": ["{{ event.resource.name }}"], ...})
"""

from __future__ import annotations

from prefect import serve
from prefect.events.schemas.deployment_triggers import DeploymentEventTrigger
from prefect.schedules import Cron

from fitaudit.tasks.events import ENTRY_LABEL

from .audit import audit_flow
from .refit import refit_flow

__all__ = ["deployments", "serve_all", "REFIT_EVENT"]

REFIT_EVENT = "fitaudit.model.refit"


def refit_trigger(registry: str, archive: str | None) -> DeploymentEventTrigger:
    """The event trigger that starts one refit run per ``fitaudit.model.refit`` event of a model
    fitaudit fits (never for forecasts made elsewhere: label ``fitaudit.entry`` = ``model``)."""
    return DeploymentEventTrigger(
        name="refit-on-verdict",
        expect={REFIT_EVENT},
        match={"prefect.resource.id": "fitaudit.model.*", ENTRY_LABEL: "model"},
        parameters={
            "registry": registry,
            "archive": archive,
            "model_ids": ["{{ event.resource.name }}"],
            "reason": "{{ event.event }} from audit run {{ event.payload.run_id }}",
            "registry_sha256": "{{ event.payload.registry_sha256 }}",  # the audited file, or the refit refuses
        },
    )


def deployments(registry: str, archive: str | None = None, cron: str = "0 6 * * 1", timezone: str = "UTC", interval: float | None = None) -> list:
    """The audit deployment (cron, or ``interval`` seconds for tests) and the refit deployment."""
    params = {"registry": registry, "archive": archive}
    schedule = {"interval": interval} if interval else {"schedules": [Cron(cron, timezone=timezone)]}
    weekly = audit_flow.to_deployment(name="weekly", parameters=params, tags=["fitaudit"], **schedule)
    refit = refit_flow.to_deployment(name="refit", triggers=[refit_trigger(registry, archive)], tags=["fitaudit"])
    return [weekly, refit]


def serve_all(registry: str, archive: str | None = None, cron: str = "0 6 * * 1", timezone: str = "UTC", interval: float | None = None) -> None:
    """Serve both deployments until interrupted."""
    serve(*deployments(registry, archive, cron, timezone, interval))
