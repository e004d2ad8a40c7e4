"""Prefect tasks around the archive: recovery and the integrity check a run starts with.

The work is done by :func:`fitaudit.tasks.archive.recover` and
:func:`fitaudit.tasks.archive.require_intact`; these wrappers give the audit flow its named steps
(docs/architecture.md §3.6).  Publishing a run and reading history back are in
:mod:`fitaudit.tasks.publish`.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import pathlib
from collections.abc import Iterator

from prefect import task
from prefect.cache_policies import NO_CACHE

from .archive import ArchiveError, damage, recover, require_intact
from .workers import submit_to_spare

__all__ = ["recover_task", "check_archive_task", "start_archive_check", "refusal_first"]


@task(name="recover-archive", cache_policy=NO_CACHE, persist_result=False)
def recover_task(archive: str) -> list[str]:
    """Complete or roll back an interrupted publication before a new run starts."""
    return recover(archive) if pathlib.Path(archive).exists() else []


def start_archive_check(archive: str) -> cf.Future | None:
    """Start :func:`~fitaudit.tasks.archive.require_intact` on ``archive`` in a spare local worker
    (:func:`fitaudit.tasks.workers.submit_to_spare`), so that the run's first reads (its context,
    history and staging) go on meanwhile on the other core; :func:`check_archive_task` takes the
    outcome.  None when no worker is spare or the archive does not exist yet: the check then runs
    in place.

    In another process because the check is mostly Python (parsing manifests and parameter
    files): in a thread of the flow process it competed with staging for the interpreter.  The
    run's scratch folder must be open before (its exclusive archive lock would otherwise wait for
    the check's shared one).  Nothing the run writes depends on the reads before the outcome is
    taken, and a refusal is raised before any error of those reads (:func:`refusal_first`).
    """
    if not pathlib.Path(archive).is_dir():
        return None
    # the function from its own module: a worker then imports the archive package alone, not this
    # module, which imports Prefect (a wrapper under this module's name, as the benchmark's timers
    # are, would make the worker import Prefect first, for a second)
    return submit_to_spare(damage.require_intact, archive)


@task(name="check-archive", cache_policy=NO_CACHE, persist_result=False)
def check_archive_task(archive: str, started: cf.Future | None = None) -> list[str]:
    """Refuse to add to an archive that ``fitaudit verify`` rejects; returns the acknowledged damage.

    With ``started`` (:func:`start_archive_check`), the check already running is waited for;
    otherwise it runs here."""
    found = started.result() if started is not None else require_intact(archive)
    return [str(p) for p in found]


@contextlib.contextmanager
def refusal_first(started: cf.Future | None) -> Iterator[None]:
    """Around the reads that run beside the archive check: if they fail, the check's refusal (a
    damaged archive, naming what to restore) is raised instead, with their error chained to it."""
    try:
        yield
    except BaseException as exc:
        if started is None:
            raise
        try:
            started.result()
        except ArchiveError as refusal:
            raise refusal from exc
        except BaseException:  # the check failed otherwise: the reads' error stands
            pass
        raise
