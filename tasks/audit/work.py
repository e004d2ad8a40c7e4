"""The audit stage's work: run :func:`fitaudit.core.audit.audit_series` over staged batches.

A forecast entry (forecasts made elsewhere) is audited by
:func:`fitaudit.core.forecasts.audit_forecasts` instead, after its issue times are checked; its
result has no refit check (``refit`` is None) and it gets no candidate search.

Plain functions only (testable without Prefect; the ``@task`` wrappers are in :mod:`.task`).
This is the module a local worker process imports to audit a batch or search candidates
(:func:`fitaudit.tasks.workers.run_local`), so it imports what the work needs and nothing more:
numpy, scipy (through the core), the registry's entry types and the batch files, never Prefect,
pyarrow or pandas (tests/test_startup.py checks).  One broken model never sinks a batch: every
failure becomes that model's ``error`` (or ``insufficient``) outcome with a plain message, and the
others go on.
"""

from __future__ import annotations

import dataclasses
import os
import pathlib
import time
import traceback
from collections.abc import Iterable, Mapping, Sequence
from concurrent.futures import CancelledError
from concurrent.futures.process import BrokenProcessPool
from typing import Any

import numpy as np

from fitaudit.core.audit import AuditResult, AuditSettings, apply_fleet_rules, as_model, audit_series_steps
from fitaudit.core.calibration import (
    CalibrationCache,
    TableStore,
    build_tables,
    prepare_calibration,
    table_job_key,
    table_jobs,
)
from fitaudit.core.exceptions import FitauditError
from fitaudit.core.lockstep import Steps, lockstep, run_steps

from .._io import claim
from ..batchfiles import ModelInput, batch_metadata, read_batch
from ..outcomes import Outcome, spill_outcomes
from ..registry import ForecastEntry, Policy
from ..workers import TimeLimitExceeded, map_local, submit_to_spare, time_limit

__all__ = [
    "audit_input",
    "audit_inputs",
    "audit_batch",
    "audit_batch_spilled",
    "audit_series_for",
    "audit_series_steps_for",
    "audit_forecasts_for",
    "forecast_timing_problems",
    "finalize",
    "wants_candidates",
    "independence_flags",
    "with_candidates",
    "calibration_for",
    "EarlyTables",
    "candidates_for",
    "candidates_claimed",
    "lanes_cache",
    "candidate_jobs",
    "candidate_tables",
]


def _spec_text(spec: Mapping[str, Any]) -> str:
    try:
        return as_model(dict(spec)).describe()
    except (FitauditError, ValueError, TypeError):
        return str(spec)


def audit_input(item: ModelInput, policy: Policy, cache: CalibrationCache, time_limit_s: float = 0.0) -> Outcome:
    """Audit one staged model; data problems and failures become ``insufficient``/``error``.

    ``time_limit_s`` bounds the model's audit where :func:`fitaudit.tasks.workers.time_limit` can
    (the local worker processes); reaching it gives an ``error`` verdict.
    """
    return audit_inputs([item], policy, cache, time_limit_s)[0]


def _outcome_base(item: ModelInput) -> tuple[dict, dict | None]:
    """What every outcome of ``item`` carries (entry, lineage, history, spec text) and its
    production version's identity (None without one)."""
    entry = item.entry
    spec_text = entry.describe() if isinstance(entry, ForecastEntry) else _spec_text(entry.spec)
    base = dict(entry=entry.to_dict(), lineage=item.lineage, history=item.history, spec_text=spec_text)
    production = item.production
    prod_meta = (
        None
        if production is None
        else {k: production[k] for k in ("version", "sha256", "created_at") if k in production}
    )
    return base, prod_meta


def _input_steps(item: ModelInput, policy: Policy, cache: CalibrationCache) -> Steps[Outcome]:
    """The audit of one staged model as steps (:mod:`fitaudit.core.lockstep`): its outcome, or
    an exception that :func:`audit_inputs` turns into the model's ``error`` outcome."""
    entry = item.entry
    forecast = isinstance(entry, ForecastEntry)
    base, prod_meta = _outcome_base(item)
    production = item.production
    errors = [p["message"] for p in item.problems if p["severity"] == "error"]
    if production is not None and production.get("error"):
        errors.append(production["error"])
    if errors:
        return Outcome(verdict="error", reasons=tuple(errors), production=prod_meta, **base)
    short = [p["message"] for p in item.problems if p["severity"] == "insufficient"]
    if short:
        return Outcome(verdict="insufficient", reasons=tuple(short), production=prod_meta, **base)
    if forecast:
        late = forecast_timing_problems(item)
        if late:
            return Outcome(verdict="error", reasons=tuple(late), production=prod_meta, **base)
    settings = entry.audit_settings(policy)
    if forecast:
        result = audit_forecasts_for(item, settings, cache)
    else:
        result = yield from audit_series_steps_for(item, settings, cache)
    return Outcome(
        verdict=result.verdict,
        reasons=result.reasons,
        result=result,
        production=prod_meta,
        settings=settings.to_dict(),
        timings=dict(result.timings),
        **base,
    )


def _failed_outcome(item: ModelInput, exc: BaseException, seconds: float, limit_s: float) -> Outcome:
    """The ``error`` outcome of a model whose audit raised ``exc`` (or reached its time limit)."""
    if isinstance(exc, TimeLimitExceeded):
        msg = (
            f"model {item.model_id!r}: the audit did not finish within the time limit of {limit_s:g} s per model "
            "(setting model_time_limit_s). A mean function that never returns, or a much longer series or larger "
            "model than usual, can cause this: check the model spec and the series, or raise the limit; "
            "the other models are unaffected."
        )
    else:
        where = traceback.extract_tb(exc.__traceback__)[-1] if exc.__traceback__ else None
        at = f" (at {where.filename.rsplit('/', 1)[-1]}:{where.lineno})" if where else ""
        msg = (
            f"model {item.model_id!r}: the audit failed with {type(exc).__name__}: {exc}{at}. Check the model spec "
            "and the series; the other models are unaffected."
        )
    base, prod_meta = _outcome_base(item)
    return Outcome(verdict="error", reasons=(msg,), production=prod_meta, timings={"total_s": seconds}, **base)


def audit_series_for(item: ModelInput, settings: AuditSettings, cache: CalibrationCache) -> AuditResult:
    """Call the core audit with a staged model's data, spec, noise law and production version."""
    return run_steps(audit_series_steps_for(item, settings, cache))


def audit_series_steps_for(item: ModelInput, settings: AuditSettings, cache: CalibrationCache) -> Steps[AuditResult]:
    """:func:`audit_series_for` as steps (:func:`fitaudit.core.audit.audit_series_steps`)."""
    production = item.production
    return (
        yield from audit_series_steps(
            item.y,
            dict(item.entry.spec),
            noise=item.entry.noise_law(),
            exog=item.exog or None,
            production=None if production is None else production["params"],
            production_noise=None if production is None else production.get("noise"),
            settings=settings,
            cache=cache,
            label=f"model {item.model_id!r}",
            timestamps=item.time,
        )
    )


def _forecast_label(item: ModelInput) -> str:
    entry = item.entry
    return f"model {entry.id!r} (source {entry.source!r}, series {entry.series!r})"


def forecast_timing_problems(item: ModelInput) -> list[str]:
    """Problems with the issue times of a forecast entry's audited forecasts (empty when none,
    or when the entry states no ``issued`` column).

    Each forecast of the audit window must have been issued strictly before the time stamp of
    the observation it predicts, as stored in the extract
    (:func:`fitaudit.core.forecasts.check_forecast_timing`).
    """
    from fitaudit.core.forecasts import check_forecast_timing

    entry = item.entry
    column = entry.forecasts.issued
    if column is None or item.y.size == 0:
        return []
    w = min(entry.audit_window, item.y.size)
    seconds = np.asarray(item.forecasts[column], dtype=float)[-w:]
    issued = np.full(seconds.size, np.datetime64("NaT"), dtype="datetime64[s]")
    known = np.isfinite(seconds)
    issued[known] = np.round(seconds[known]).astype("int64").astype("datetime64[s]")
    target = np.asarray(item.time)[-w:].astype("datetime64[s]")
    label = f"{_forecast_label(item)}, column {column!r}"
    problems = check_forecast_timing(issued, target, label=label)
    if any("issued at or after" in p for p in problems):
        problems.insert(
            0, f"model {entry.id!r}: forecasts issued after the observation they predict cannot be audited."
        )
    return problems


def audit_forecasts_for(item: ModelInput, settings: AuditSettings, cache: CalibrationCache) -> AuditResult:
    """Call :func:`fitaudit.core.forecasts.audit_forecasts` with a staged forecast entry's actuals
    and its stated forecasts (the registry's ``forecasts`` block)."""
    from fitaudit.core.forecasts import audit_forecasts

    stated = item.entry.forecasts
    columns = item.forecasts
    if stated.quantiles is not None:
        kwargs = {"quantiles": {level: columns[name] for level, name in stated.levels().items()}}
    else:
        kwargs = {"mean": columns[stated.mean], "noise": stated.law()}
        if stated.scale is not None:
            kwargs["scale"] = columns[stated.scale] if isinstance(stated.scale, str) else stated.scale
    return audit_forecasts(
        item.y,
        horizon=stated.horizon,
        period=stated.period,
        settings=settings,
        cache=cache,
        label=_forecast_label(item),
        **kwargs,
    )


def audit_inputs(
    items: Iterable[ModelInput], policy: Policy, cache: CalibrationCache | None = None, time_limit_s: float = 0.0
) -> list[Outcome]:
    """Audit staged models with one shared calibration cache (``time_limit_s`` per model, see :func:`audit_input`).

    The models run side by side (:func:`fitaudit.core.lockstep.lockstep`), so that their checks'
    maps and gates are computed together; each outcome is the one the model gets alone.  A model's
    time limit bounds its own stretches of work, and whatever one model's audit raises becomes its
    ``error`` outcome only.
    """
    cache = cache if cache is not None else CalibrationCache()
    items = list(items)
    spent = [0.0] * len(items)

    def resume(i: int, advance):
        t0 = time.perf_counter()
        try:
            with time_limit(max(time_limit_s - spent[i], 1e-3) if time_limit_s > 0 else 0.0):
                return advance()
        except (TimeLimitExceeded, Exception) as exc:  # anything (a user's nonlinear function) stays with this model
            return _failed_outcome(items[i], exc, spent[i] + time.perf_counter() - t0, time_limit_s)
        finally:
            spent[i] += time.perf_counter() - t0

    return lockstep([_input_steps(item, policy, cache) for item in items], resume)


def audit_batch(
    path: str, policy: Policy, cache: CalibrationCache | None = None, time_limit_s: float = 0.0
) -> list[Outcome]:
    """Audit every model of one staged batch file."""
    return audit_inputs(read_batch(path), policy, cache, time_limit_s)


def audit_batch_spilled(
    path: str, policy: Policy, cache: CalibrationCache | None = None, time_limit_s: float = 0.0
) -> list[Outcome]:
    """:func:`audit_batch`, keeping the full outcomes in :func:`~fitaudit.tasks.outcomes.spill_path`
    and returning them light (:func:`~fitaudit.tasks.outcomes.spill_outcomes`): the flow process
    never holds every model's full result."""
    return spill_outcomes(audit_batch(path, policy, cache, time_limit_s), path)


def finalize(outcomes: Sequence[Outcome], policy: Policy) -> list[Outcome]:
    """Apply the fleet rules (p-value adjustment, persistence) to the outcomes that were audited."""
    audited = [i for i, o in enumerate(outcomes) if o.result is not None]
    results = [outcomes[i].result for i in audited]
    histories = [[h["verdict"] for h in outcomes[i].history] for i in audited]
    adjusted = apply_fleet_rules(
        results,
        q=policy.fdr_q,
        method=policy.multiple_testing,
        histories=histories,
        k=policy.persistence_k,
        n=policy.persistence_n,
    )
    out = list(outcomes)
    for i, res in zip(audited, adjusted):
        out[i] = dataclasses.replace(out[i], result=res, verdict=res.verdict, reasons=res.reasons)
    return out


def wants_candidates(outcome: Outcome) -> bool:
    """Whether the candidate search runs for an outcome: a ``respecify`` verdict of a model
    fitaudit fits (a forecast audit has no refit check, and no specification to vary)."""
    return outcome.verdict == "respecify" and outcome.result is not None and outcome.result.refit is not None


def independence_flags(outcomes: Iterable[Outcome]) -> dict[str, bool]:
    """By model id, for the outcomes the candidate search runs for (:func:`wants_candidates`):
    whether the refit check flags its independence gate.  The search asks that first of the
    failing specification; handed these, it neither checks nor refits the specification again
    (:func:`fitaudit.core.candidates.search_candidates`, ``independence``)."""
    from fitaudit.core.candidates import independence_flagged

    return {o.model_id: independence_flagged(o.result.refit) for o in outcomes if wants_candidates(o)}


def with_candidates(outcomes: Sequence[Outcome], found: Mapping[str, list[dict]]) -> list[Outcome]:
    """Attach candidate lists to the outcomes they belong to."""
    return [dataclasses.replace(o, candidates=tuple(found[o.model_id])) if o.model_id in found else o for o in outcomes]


def _calibration_entry(entry: Any, meta: Mapping[str, Any], policy: Policy) -> tuple[str, tuple] | None:
    """What the shared null tables of one staged model depend on: ``("model", (spec, noise,
    settings, n_obs, has_production))`` (an entry of :func:`~fitaudit.core.calibration.table_jobs`)
    or ``("forecast", (settings, horizon))``; None for a model with an error or no data (its own
    audit reports it)."""
    if any(p["severity"] == "error" for p in meta["problems"]) or meta["lineage"].get("rows_loaded", 0) == 0:
        return None
    if isinstance(entry, ForecastEntry):
        return "forecast", (entry.audit_settings(policy), entry.forecasts.horizon)
    production = meta.get("production")
    has_production = bool(production and not production.get("error"))
    return "model", (
        dict(entry.spec),
        entry.noise_law(),
        entry.audit_settings(policy),
        _fit_length(entry, meta),
        has_production,
    )


def _fit_length(entry: Any, meta: Mapping[str, Any]) -> int:
    """The observations a staged model is fitted on: those loaded, at most its fit window."""
    return min(int(meta["lineage"]["rows_loaded"]), entry.windows.fit)


class EarlyTables:
    """The run's shared null tables, begun on the spare workers while the batches are staged.

    Staging hands each batch it has written to :meth:`batch_staged` (``on_batch`` of
    :func:`fitaudit.tasks.batches.stage_inputs`); the tables its models need that no earlier
    batch needed (:func:`~fitaudit.core.calibration.table_jobs`) go to the spare worker processes
    (:func:`~fitaudit.tasks.workers.submit_to_spare`), which wait for the batches then, so the
    tables are simulated while the rest is staged.  Each batch's new tables go as one call: one
    worker builds them one after another, and the other core stays with the staging.
    :func:`calibration_for` takes each begun table (:meth:`take`) and builds the others, and
    takes what the tables depend on from here rather than from the batch files (:meth:`entries`).
    A table is a function of its key and the seed, so the run's tables are the same either way;
    without a spare pool nothing is begun.
    """

    def __init__(self, policy: Policy, store: TableStore | None = None):
        self.policy = policy
        self.store = store
        self._begun: dict[tuple, Any] = {}  # table job key -> future of its CalibrationCache
        self._entries: dict[str, list] = {}  # batch path -> _calibration_entry of each model
        self._spare = True

    def batch_staged(self, batch: Any, staged: Iterable[tuple[Any, Mapping[str, Any]]]) -> None:
        """Begin the tables of a staged batch's ``(entry, metadata)`` pairs not begun before."""
        found = [_calibration_entry(entry, meta, self.policy) for entry, meta in staged]
        self._entries[str(batch.path)] = found
        if not self._spare:
            return
        entries = [item for kind, item in filter(None, found) if kind == "model"]
        new = [job for job in table_jobs(entries) if table_job_key(job) not in self._begun]
        if not new:
            return
        future = submit_to_spare(build_tables, new, CalibrationCache(store=self.store))
        if future is None:  # no spare workers: calibration_for builds every table
            self._spare = False
            return
        self._begun.update((table_job_key(job), future) for job in new)

    def entries(self, path: str) -> list | None:
        """:func:`_calibration_entry` of each model of the batch staged at ``path`` (None: not seen)."""
        return self._entries.get(str(path))

    def take(self, job: tuple) -> CalibrationCache | None:
        """The tables begun with ``job``'s (waiting for them), else None.  A batch's new jobs are
        built by one call, in the order of :func:`~fitaudit.core.calibration.table_jobs`, and the
        jobs of later batches follow those of earlier ones in that order, so merging each call's
        tables at its first job keeps the order of the tables."""
        future = self._begun.pop(table_job_key(job), None)
        if future is None:
            return None
        try:
            return future.result()
        except (CancelledError, BrokenProcessPool):  # the spare pool stopped before building it
            return None


def calibration_for(
    batch_paths: Sequence[str],
    policy: Policy,
    store: TableStore | None = None,
    workers: str | None = None,
    early: EarlyTables | None = None,
) -> CalibrationCache:
    """Build the run's shared null tables from the staged batches' metadata (no data read):
    :func:`fitaudit.core.audit.prepare_calibration` for fitted models and
    :func:`fitaudit.core.forecasts.prepare_forecast_calibration` for forecast entries (the
    window, or for h-step forecasts the lengths of their subsequences).  With a ``store``
    (:class:`~fitaudit.tasks.table_store.FolderTableStore`), tables kept by earlier runs are
    taken from it and new ones saved to it; the returned cache carries the store to the batches,
    so the tables they build on demand are kept too.

    With ``workers`` (:func:`fitaudit.tasks.workers.local_workers`), the fitted models' tables are
    built one per call in the worker processes, side by side, and merged in the order in which
    :func:`~fitaudit.core.calibration.prepare_calibration` builds them (the same tables: each is a
    function of its key and the seed); those ``early`` began while the batches were staged
    (:class:`EarlyTables`, for the same policy) are taken from it, with the models' metadata."""
    from fitaudit.core.forecasts import prepare_forecast_calibration

    entries, forecasts = [], []
    staged = early if early is not None and early.policy == policy else None
    for path in batch_paths:
        seen = staged.entries(path) if staged is not None else None
        if seen is None:
            seen = [_calibration_entry(meta["entry"], meta, policy) for meta in batch_metadata(path)]
        for kind, item in filter(None, seen):
            (forecasts if kind == "forecast" else entries).append(item)
    jobs = table_jobs(entries)
    begun = [early.take(job) if early is not None else None for job in jobs]
    missing = [([job], CalibrationCache(store=store)) for job, part in zip(jobs, begun) if part is None]
    built = iter(map_local(workers, build_tables, missing))
    cache = CalibrationCache(store=store)
    for part in begun:
        cache.merge(part if part is not None else next(built))
    return prepare_forecast_calibration(forecasts, cache) if forecasts else cache


def candidates_for(
    path: str,
    model_ids: Sequence[str],
    policy: Policy,
    cache: CalibrationCache | None = None,
    independence: Mapping[str, bool] | None = None,
) -> dict[str, list[dict]]:
    """Candidate search (:func:`fitaudit.core.candidates.search_candidates`) for models of a batch;
    ``independence``: what the run's audit knows (:func:`independence_flags`)."""
    cache = cache if cache is not None else CalibrationCache()
    out: dict[str, list[dict]] = {}
    for item in read_batch(path, model_ids):
        out.update(_search_item(item, policy, cache, independence))
    return out


def _search_item(
    item: ModelInput, policy: Policy, cache: CalibrationCache, independence: Mapping[str, bool] | None = None
) -> dict[str, list[dict]]:
    """The candidate search of one staged model, as ``{model id: candidates}`` (empty for a forecast entry)."""
    from fitaudit.core.candidates import search_candidates

    if isinstance(item.entry, ForecastEntry):
        return {}  # forecasts made elsewhere: fitaudit has no specification to vary
    entry = item.entry
    try:
        found = search_candidates(
            item.y,
            dict(entry.spec),
            noise=entry.noise_law(),
            exog=item.exog or None,
            settings=entry.audit_settings(policy),
            cache=cache,
            independence=(independence or {}).get(item.model_id),
        )
        return {item.model_id: [c.to_dict() for c in found]}
    except Exception as exc:  # the search is advice; its failure must not lose the verdict
        return {item.model_id: [{"error": f"candidate search failed: {type(exc).__name__}: {exc}"}]}


#: How long a lane waits for the other lanes' shared tables before its searches build what they lack.
_TABLES_WAIT_S = 600.0


def candidates_claimed(
    jobs: Sequence[Sequence],
    tables: Sequence[Sequence],
    policy: Policy,
    cache: CalibrationCache | None,
    claims: str,
    independence: Mapping[str, bool] | None = None,
) -> tuple[dict[str, list[dict]], CalibrationCache]:
    """One lane of the candidate searches: the shared null tables ``tables`` (entries of
    :func:`candidate_tables`) and then the searches of ``jobs`` (``[batch path, [model ids]]``
    pairs), each of them the ones this lane claims first in the folder ``claims``;
    ``independence``: what the run's audit knows of the searched models (:func:`independence_flags`).

    Several lanes run over the same tables and jobs at once, one per worker, and each takes the
    next table or model no other lane has claimed, so the lanes end within one search of each
    other whatever the searches cost (a search that simulates a student-t table costs five times
    one that does not).  A lane starts its searches once every shared table is built (or after
    :data:`_TABLES_WAIT_S`, when its searches build what they lack), and reads the other lanes'
    tables from ``cache``'s store or builds them itself when it has none; every model is searched
    exactly once and its candidates do not depend on its lane.  A lane reads each batch's models
    once, holds one batch at a time, and keeps one cache for all its searches.

    Returns
    -------
    (dict, CalibrationCache)
        The candidates of the models this lane searched, and the shared tables it built or read.
    """
    cache = cache if cache is not None else CalibrationCache()
    folder = pathlib.Path(claims)
    folder.mkdir(parents=True, exist_ok=True)
    shared = CalibrationCache(tables=cache.tables, store=cache.store)  # the run's tables are not built again
    for number, entries in enumerate(tables):
        if claim(folder, f"table-{number}"):
            try:
                prepare_calibration(entries, shared)
            finally:  # the other lanes wait for this mark, also when the build failed
                claim(folder, f"table-{number}.done")
    cache.merge(shared)
    deadline = time.monotonic() + _TABLES_WAIT_S
    while not all((folder / f"table-{i}.done").exists() for i in range(len(tables))) and time.monotonic() < deadline:
        time.sleep(0.005)
    found: dict[str, list[dict]] = {}
    read_path, items = None, {}
    for number, (path, model_id) in enumerate((path, m) for path, ids in jobs for m in ids):
        if not claim(folder, str(number)):
            continue
        if path != read_path:  # the claims go in batch order: a batch read is never needed again
            items = {}  # its models' arrays are views of the whole batch's buffers: let them go before the next
            wanted = [m for p, ids in jobs if p == path for m in ids]
            read_path, items = path, {item.model_id: item for item in read_batch(path, wanted)}
        found.update(_search_item(items[model_id], policy, cache, independence))
    return found, shared


def lanes_cache(cache: CalibrationCache, scratch: str | os.PathLike) -> CalibrationCache:
    """The cache the lanes of :func:`candidates_claimed` start from: the run's tables, and the store
    through which each lane reads the tables the others built, ``cache``'s (the archive's
    ``.tables``) or, when the run keeps none, one in the run's scratch folder; claimed in the
    scratch folder (:class:`~fitaudit.tasks.table_store.ClaimedTableStore`), so that a table two
    lanes' searches need at once (a student-t table at a shape both estimate) is built by one."""
    from ..table_store import ClaimedTableStore, FolderTableStore

    store = cache.store if cache.store is not None else FolderTableStore(pathlib.Path(scratch) / "tables")
    claimed = ClaimedTableStore(store, pathlib.Path(scratch) / "table-claims")
    return CalibrationCache(tables=cache.tables, store=claimed)


def candidate_jobs(batches: Sequence[Any], model_ids: Iterable[str]) -> list[list]:
    """The candidate searches of ``model_ids`` as ``[batch path, [model ids]]`` pairs in batch order
    (lists, not tuples: prefect-dask hands tuples inside task inputs on in another shape).

    The lanes of :func:`candidates_claimed` build the searches' shared null tables first
    (:func:`candidate_tables`) and then share the models out as they go; what remains per model
    is its fits and the table of a law whose shape it estimates.
    """
    wanted = set(model_ids)
    jobs = [[batch.path, [m for m in batch.model_ids if m in wanted]] for batch in batches]
    return [job for job in jobs if job[1]]


def candidate_tables(jobs: Sequence[Sequence], policy: Policy) -> list[list[list]]:
    """The null tables the candidate searches of ``jobs`` share, as :func:`prepare_calibration`
    entries, one group per table (metadata only, no data read).

    Neighbouring specifications and other noise laws need tables for new (residual count, law)
    pairs; the lanes of :func:`candidates_claimed` build each once, side by side, before the
    searches, so no search builds one again.  Laws whose shape is estimated are left out: their
    tables depend on each model's estimate.
    """
    from fitaudit.core.candidates import CONTINUOUS_LAWS, neighbour_specs

    tables: dict[tuple, list] = {}
    for path, ids in jobs:
        for meta in batch_metadata(path, ids):
            entry = meta["entry"]
            if isinstance(entry, ForecastEntry):
                continue
            settings = entry.audit_settings(policy)
            n_obs = _fit_length(entry, meta)
            noise = entry.noise_law()
            trials = [(spec, noise) for spec in neighbour_specs(dict(entry.spec))]
            trials += [
                (dict(entry.spec), {"law": law, "shape": None}) for law in CONTINUOUS_LAWS if law != noise["law"]
            ]
            for spec, law in trials:
                try:
                    model = as_model(spec)
                    key = (law["law"], law["shape"], n_obs - model.presample(), model.has_location(), settings)
                except (FitauditError, ValueError, TypeError):
                    continue  # the search itself reports an unusable candidate
                tables.setdefault(key, [[spec, law, settings, n_obs, False]])
    return list(tables.values())
