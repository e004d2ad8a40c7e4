"""The audit stage's Prefect tasks: thin ``@task`` wrappers around :mod:`.work`.

Each hands its batch to :func:`fitaudit.tasks.workers.run_local` (the local worker processes, or
in place) and logs; the plain functions, and the local worker processes, never import this
module, which imports Prefect.
"""

from __future__ import annotations

import time

from prefect import get_run_logger, task
from prefect.cache_policies import NO_CACHE

from fitaudit.core.calibration import CalibrationCache, TableStore

from ..memory import release_freed_memory
from ..outcomes import Outcome
from ..registry import Policy, Registry
from ..workers import run_local
from .work import EarlyTables, audit_batch_spilled, calibration_for, candidates_claimed, finalize

__all__ = ["finalize_task", "calibration_task", "audit_batch_task", "candidates_task"]


@task(name="apply-fleet-rules", cache_policy=NO_CACHE, persist_result=False)
def finalize_task(outcomes: list[Outcome], registry: Registry) -> list[Outcome]:
    """p-value adjustment across the run and the persistence rule."""
    return finalize(outcomes, registry.policy)


@task(name="prepare-calibration", cache_policy=NO_CACHE, persist_result=False)
def calibration_task(
    batch_paths: list[str],
    policy: Policy,
    store: TableStore | None = None,
    workers: str | None = None,
    early: EarlyTables | None = None,
) -> CalibrationCache:
    """Prefect task: simulate every null table the run needs, once, before the batches start
    (or take it from ``store``, where earlier runs kept it: :func:`calibration_for`), in the local
    worker processes named by ``workers`` when given; those begun while the batches were staged
    are taken from ``early``.

    Then the simulations' freed arrays go back to the system (:func:`release_freed_memory`: about
    60 MB of glibc's heap otherwise); the tables themselves are small and kept."""
    try:
        cache = calibration_for(batch_paths, policy, store, workers, early)
    finally:
        release_freed_memory()
    get_run_logger().info("calibration: %d null tables (%d kept from earlier runs)", len(cache), len(cache.reused))
    return cache


@task(name="audit-batch", cache_policy=NO_CACHE, persist_result=False)
def audit_batch_task(
    path: str,
    policy: Policy,
    cache: CalibrationCache | None = None,
    workers: str | None = None,
    time_limit_s: float = 0.0,
) -> list[Outcome]:
    """Prefect task: audit one staged batch (a file path in, light outcomes out; the full ones
    wait in :func:`spill_path` for :func:`restore_outcomes`).

    ``workers`` is the token of the flow run's local worker processes
    (:func:`fitaudit.tasks.workers.local_workers`); the batch is computed there when given, and
    only there is ``time_limit_s`` per model enforced.
    """
    t0 = time.perf_counter()
    outcomes = run_local(workers, audit_batch_spilled, path, policy, cache, time_limit_s)
    counts: dict[str, int] = {}
    for o in outcomes:
        counts[o.verdict] = counts.get(o.verdict, 0) + 1
    get_run_logger().info(
        "batch %s: %d models in %.1f s %s", path.rsplit("/", 1)[-1], len(outcomes), time.perf_counter() - t0, counts
    )
    return outcomes


@task(name="search-candidates", cache_policy=NO_CACHE, persist_result=False)
def candidates_task(
    lane: int,
    jobs: list,
    tables: list,
    policy: Policy,
    cache: CalibrationCache | None,
    claims: str,
    workers: str | None = None,
    independence: dict | None = None,
) -> tuple[dict[str, list[dict]], CalibrationCache]:
    """Prefect task: lane ``lane`` of the candidate stage (:func:`candidates_claimed`: each lane takes
    the next shared table, then the next model, that no other lane has claimed in the folder
    ``claims``), in the local worker processes named by ``workers`` when given; ``independence``:
    the audit's refit checks' independence flags of the searched models."""
    found, shared = run_local(workers, candidates_claimed, jobs, tables, policy, cache, claims, independence)
    get_run_logger().info("candidate lane %d: %d models searched", lane, len(found))
    return found, shared
