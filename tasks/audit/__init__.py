"""The audit stage: audit staged batches, apply the fleet rules, search candidates, build the run's
null tables.

Two modules:

* :mod:`.work`: the plain functions (``audit_batch_spilled``, ``candidates_claimed``,
  ``calibration_for``, ``finalize``, ...).  A local worker process (:mod:`fitaudit.tasks.workers`)
  imports only this module and what it needs (numpy, scipy, the registry's entry types, the batch
  files): neither Prefect nor pyarrow nor pandas.
* :mod:`.task`: the ``@task`` wrappers, the only module here that imports Prefect.  Its names are
  importable from this package too (``from fitaudit.tasks.audit import audit_batch_task``), loaded
  on first use, so importing the package (as every import of :mod:`.work` does) loads no Prefect.

The outcome's shapes live in :mod:`fitaudit.tasks.outcomes`; the names the audit stage's callers
use are re-exported here.
"""

from __future__ import annotations

from ..outcomes import Outcome, light_outcome, records, rejected_outcome, restore_outcomes, spill_path
from .work import (
    EarlyTables,
    audit_batch,
    audit_batch_spilled,
    audit_forecasts_for,
    audit_input,
    audit_inputs,
    audit_series_for,
    calibration_for,
    candidate_jobs,
    candidate_tables,
    candidates_claimed,
    candidates_for,
    finalize,
    forecast_timing_problems,
    independence_flags,
    lanes_cache,
    wants_candidates,
    with_candidates,
)

_TASKS = ("finalize_task", "calibration_task", "audit_batch_task", "candidates_task")

__all__ = [
    "Outcome",
    "audit_input",
    "audit_inputs",
    "audit_batch",
    "audit_batch_spilled",
    "light_outcome",
    "restore_outcomes",
    "spill_path",
    "finalize",
    "rejected_outcome",
    "records",
    "audit_series_for",
    "audit_forecasts_for",
    "forecast_timing_problems",
    "wants_candidates",
    "independence_flags",
    "candidates_for",
    "candidate_jobs",
    "candidate_tables",
    "candidates_claimed",
    "lanes_cache",
    "with_candidates",
    "calibration_for",
    "EarlyTables",
    *_TASKS,
]


def __getattr__(name: str):
    """The ``@task`` wrappers on first use: their module imports Prefect, which the work does not need."""
    if name in _TASKS:
        from . import task

        value = getattr(task, name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
