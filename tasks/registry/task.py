"""The Prefect task that loads the registry in a flow run.

Kept apart from :mod:`fitaudit.tasks.registry.loader` so that the commands that only read or
check a registry (``fitaudit registry check``, ``verify``, ``promote``, ``signoff``) do not import
Prefect; ``fitaudit.tasks.registry.load_registry_task`` imports this module on first use.
"""

from __future__ import annotations

from prefect import task

from .loader import Registry, _transient, load_registry

__all__ = ["load_registry_task"]


@task(name="load-registry", retries=2, retry_delay_seconds=2, retry_condition_fn=_transient, persist_result=False)
def load_registry_task(path: str) -> Registry:
    """Prefect task: read and validate the registry (retried for transient I/O errors only).

    Registry-level problems raise :class:`RegistryError` and fail the run before any model is
    audited, without a retry; entry-level problems come back in ``Registry.rejected``.
    """
    return load_registry(path)
