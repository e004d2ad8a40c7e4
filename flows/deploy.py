"""Deployments: the weekly audit on a cron schedule and the refit flow triggered by events.

``fitaudit serve`` calls :func:`serve_all`, which serves both deployments from one long-lived
process with Prefect's serve mechanism (no work pool needed).  Both need a real Prefect server:
the embedded one runs no scheduler.  Teams with workers can use ``flows/prefect.yaml`` instead.

The refit deployment carries the automation: a Prefect event trigger that starts **one** refit
run per audit, for every model the audit flagged (``refit`` and ``respecify`` verdicts alike,
as ``fitaudit run --refit`` does: a passing refit is stored as a candidate, a failing one gets its
candidate specifications listed; forecast entries are left out, their owners re-estimate).  It
listens for the ``fitaudit.run.completed`` event whose resource says refits are needed and takes
the model ids from the event's ``refit_models``::

    DeploymentEventTrigger(expect={"fitaudit.run.completed"},
                           match={"prefect.resource.id": "fitaudit.run.*", "fitaudit.refits-needed": "yes"},
                           parameters={"model_ids": "{{ event.payload.refit_models }}", ...})

Both deployments stop a run that takes longer than the policy's ``flow_timeout_minutes``.

Owners hear about their exceptions through Prefect's own automations and notification blocks:
for each ``{owner, block}`` in the policy's ``notify``, :func:`install_owner_notifications`
(called by :func:`serve_all`) creates or replaces the automation
:func:`fitaudit.tasks.events.owner_automation`, which sends that owner every exception of a run.
"""

from __future__ import annotations

from prefect import serve
from prefect.events.schemas.deployment_triggers import DeploymentEventTrigger
from prefect.schedules import Cron

from fitaudit.tasks.events import REFITS_LABEL, RUN_EVENT, owner_automation
from fitaudit.tasks.registry import load_registry

from .audit import audit_flow
from .refit import refit_flow

__all__ = ["deployments", "serve_all", "refit_trigger", "install_owner_notifications", "REFIT_EVENT"]

#: The event the refit deployment listens for.
REFIT_EVENT = RUN_EVENT


def refit_trigger(registry: str, archive: str | None) -> DeploymentEventTrigger:
    """The event trigger that starts one refit run for all models an audit flagged."""
    return DeploymentEventTrigger(
        name="refit-after-audit",
        expect={REFIT_EVENT},
        match={"prefect.resource.id": "fitaudit.run.*", REFITS_LABEL: "yes"},
        parameters={
            "registry": registry,
            "archive": archive,
            "model_ids": "{{ event.payload.refit_models }}",  # a single expression: Prefect keeps the list a list
            "as_of": "{{ event.payload.as_of }}",  # the audit's data, not today's
            "reason": "verdicts of audit run {{ event.payload.run_id }}",
            "registry_sha256": "{{ event.payload.registry_sha256 }}",  # the audited file, or the refit refuses
        },
    )


def deployments(
    registry: str,
    archive: str | None = None,
    cron: str = "0 6 * * 1",
    timezone: str = "UTC",
    interval: float | None = None,
) -> list:
    """The audit deployment (cron, or ``interval`` seconds for tests) and the refit deployment.

    The registry is read once here: its policy's ``flow_timeout_minutes`` becomes both flows'
    timeout (a registry that cannot be read raises :class:`~fitaudit.tasks.registry.RegistryError`).
    """
    timeout = 60.0 * load_registry(registry).policy.flow_timeout_minutes
    params = {"registry": registry, "archive": archive}
    schedule = {"interval": interval} if interval else {"schedules": [Cron(cron, timezone=timezone)]}
    weekly = audit_flow.with_options(timeout_seconds=timeout).to_deployment(
        name="weekly", parameters=params, tags=["fitaudit"], **schedule
    )
    refit = refit_flow.with_options(timeout_seconds=timeout).to_deployment(
        name="refit", triggers=[refit_trigger(registry, archive)], tags=["fitaudit"]
    )
    return [weekly, refit]


def install_owner_notifications(registry: str) -> list[str]:
    """Create (or replace) one notification automation per owner in the policy's ``notify``.

    Each ``block`` (``block-type/block-name``) must be a Prefect notification block saved on the
    server (e.g. ``prefect block register`` and the UI, or ``SlackWebhook(url=...).save("south-zone")``).
    Returns the names of the automations installed.
    """
    from prefect.automations import Automation
    from prefect.blocks.core import Block

    installed = []
    for notice in load_registry(registry).policy.notify:
        block = Block.load(notice.block)
        automation = owner_automation(notice.owner, block._block_document_id)
        while True:  # replace every earlier copy (serve may have run before)
            try:
                Automation.read(name=automation.name).delete()
            except ValueError:
                break
        automation.create()
        installed.append(automation.name)
    return installed


def serve_all(
    registry: str,
    archive: str | None = None,
    cron: str = "0 6 * * 1",
    timezone: str = "UTC",
    interval: float | None = None,
) -> None:
    """Install the owners' notification automations, then serve both deployments until interrupted."""
    for name in install_owner_notifications(registry):
        print(f"fitaudit serve: automation {name!r} installed")
    serve(*deployments(registry, archive, cron, timezone, interval))
