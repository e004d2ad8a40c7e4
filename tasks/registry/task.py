"""The Prefect task that loads the registry in a flow run.

Kept apart from :mod:`fitaudit.tasks.registry.loader` so that the commands that only read or
check a registry (``fitaudit registry check``, ``verify``, ``promote``, ``signoff``) do not import
Prefect; ``fitaudit.tasks.registry.load_registry_task`` imports this module on first use.
"""

from __future__ import annotations

import os

from prefect import task

from .loader import Registry, _transient, load_registry

__all__ = ["load_registry_task", "CHILD_PARSE_BYTES"]

#: Registry files at least this large (about 3,000 entries) are parsed in a child process.
CHILD_PARSE_BYTES = 1_000_000


@task(name="load-registry", retries=2, retry_delay_seconds=2, retry_condition_fn=_transient, persist_result=False)
def load_registry_task(path: str) -> Registry:
    """Prefect task: read and validate the registry (retried for transient I/O errors only).

    Registry-level problems raise :class:`RegistryError` and fail the run before any model is
    audited, without a retry; entry-level problems come back in ``Registry.rejected``.

    A file of :data:`CHILD_PARSE_BYTES` or more is parsed in a child process and the validated
    registry comes back pickled: the parse holds about 15 KB of YAML nodes per entry for a moment,
    and the flow process, which keeps the registry for the whole run, could not give that memory
    back afterwards (10,000 entries: 190 MiB retained after an in-process parse, 46 MiB unpickled).
    """
    try:
        large = os.path.getsize(path) >= CHILD_PARSE_BYTES
    except OSError:
        large = False  # load_registry reports the unreadable file
    if large:
        from ..workers import run_in_child

        return run_in_child(load_registry, path)
    return load_registry(path)
