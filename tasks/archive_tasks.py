"""Prefect tasks around the archive: recovery and the integrity check a run starts with.

The work is done by :func:`fitaudit.tasks.archive.recover` and
:func:`fitaudit.tasks.archive.require_intact`; these wrappers give the audit flow its named steps
(docs/architecture.md §3.6).  Publishing a run and reading history back are in
:mod:`fitaudit.tasks.publish`.
"""

from __future__ import annotations

import pathlib

from prefect import task
from prefect.cache_policies import NO_CACHE

from .archive import recover, require_intact

__all__ = ["recover_task", "check_archive_task"]


@task(name="recover-archive", cache_policy=NO_CACHE, persist_result=False)
def recover_task(archive: str) -> list[str]:
    """Complete or roll back an interrupted publication before a new run starts."""
    return recover(archive) if pathlib.Path(archive).exists() else []


@task(name="check-archive", cache_policy=NO_CACHE, persist_result=False)
def check_archive_task(archive: str) -> list[str]:
    """Refuse to add to an archive that ``fitaudit verify`` rejects; returns the acknowledged damage."""
    return [str(p) for p in require_intact(archive)]
