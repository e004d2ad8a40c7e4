"""The scheduled audit job: ``audit_flow``.

Composition only: every step is a task from :mod:`fitaudit.tasks`; models are audited in batches
(one task per batch, never one per model), results go through the fleet rules, the report and the
archive, and verdicts are published as Prefect events.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import pathlib
import time

from prefect import flow, get_run_logger, unmapped
from prefect.task_runners import ThreadPoolTaskRunner
from prefect.utilities.annotations import quote

from fitaudit.core.vocabulary import VERDICTS
from fitaudit.tasks.archive import new_run_id, open_work_folder
from fitaudit.tasks.archive_tasks import check_archive_task, recover_task, refusal_first, start_archive_check
from fitaudit.tasks.audit import (
    EarlyTables,
    candidate_jobs,
    candidate_tables,
    independence_flags,
    lanes_cache,
    wants_candidates,
    with_candidates,
)
from fitaudit.tasks.audit.task import audit_batch_task, calibration_task, candidates_task, finalize_task
from fitaudit.tasks.batches import stage_inputs_task
from fitaudit.tasks.events import events_task
from fitaudit.tasks.memory import heap_frozen
from fitaudit.tasks.outcomes import rejected_outcome, render_parcels
from fitaudit.tasks.publish import (
    code_commit,
    context_task,
    history_task,
    operator_identity,
    package_versions,
    publish_task,
    render_outcomes_task,
)
from fitaudit.tasks.registry import load_registry_task
from fitaudit.tasks.results import results_head, results_summary
from fitaudit.tasks.settings import get_settings
from fitaudit.tasks.table_store import archive_tables
from fitaudit.tasks.workers import default_processes, local_workers, start_spare_workers

__all__ = ["audit_flow", "start_workers_early"]


def _utc() -> str:
    return dt.datetime.now(dt.UTC).replace(microsecond=0).isoformat().replace("+00:00", "Z")


def _workers() -> int:
    """Parallel workers of the running flow's task runner (threads or Dask workers)."""
    from prefect.context import FlowRunContext

    ctx = FlowRunContext.get()
    runner = getattr(ctx, "task_runner", None)
    for attr in ("max_workers", "_max_workers"):
        value = getattr(runner, attr, None)
        if isinstance(value, int) and value > 0:
            return value
    kwargs = getattr(runner, "cluster_kwargs", None) or {}
    return int(kwargs.get("n_workers", 1))


def _report_progress(futures, staged) -> None:
    """One line on standard error per finished batch: models done out of the total."""
    import sys

    from prefect.futures import as_completed

    sizes = {id(f): len(b.model_ids) for f, b in zip(futures, staged.batches)}
    total, done = sum(sizes.values()), 0
    for i, fut in enumerate(as_completed(list(futures)), start=1):
        done += sizes.get(id(fut), 0)
        print(f"fitaudit: audited {done}/{total} models ({i}/{len(sizes)} batches)", file=sys.stderr, flush=True)


#: Below this many models the automatic choice computes in the task threads: starting worker
#: processes (about a second of imports each) would cost more than they save.
AUTO_PROCESSES_MIN_MODELS = 100


def _requested_processes(requested: int, models: int) -> int:
    """``requested`` (the setting ``processes``), or for 0 every CPU when the run has at least
    :data:`AUTO_PROCESSES_MIN_MODELS` models and one otherwise."""
    if requested == 0:
        return default_processes() if models >= AUTO_PROCESSES_MIN_MODELS else 1
    return requested


def _local_processes(requested: int, batches: int, models: int) -> int:
    """Worker processes for the batches under the default (thread) task runner:
    :func:`_requested_processes`, at most one per batch.  None under other runners (Dask workers
    are processes already)."""
    if _runner_name() != "ThreadPoolTaskRunner" or batches < 2:
        return 0
    return min(_requested_processes(requested, models), batches)


def start_workers_early(models: int) -> None:
    """Start the local worker processes that a run of ``models`` models under the default task
    runner will ask for, before the run (:func:`fitaudit.tasks.workers.start_spare_workers`).

    ``fitaudit run`` and ``fitaudit backfill`` call it while the embedded Prefect server starts, a
    few seconds in which one core waits: the workers' imports are made then rather than beside the
    run's null tables.  A run that asks for another number of workers (a batch size that makes
    fewer batches than workers) stops them and starts its own; nothing else depends on it.
    """
    start_spare_workers(_requested_processes(get_settings().processes, models))


def _runner_name() -> str:
    from prefect.context import FlowRunContext

    ctx = FlowRunContext.get()
    return type(getattr(ctx, "task_runner", None)).__name__


def _run_name() -> str:
    """The flow run's name in the Prefect UI: ``audit 2026-11-30 registry.yaml`` (``, 3 models`` for --models)."""
    from prefect.runtime import flow_run

    params = flow_run.parameters or {}
    as_of = params.get("as_of") or dt.datetime.now(dt.UTC).date()
    some = params.get("models")
    some = f", {len(some)} model{'s' if len(some) != 1 else ''}" if some else ""
    return f"audit {str(as_of)[:10]} {pathlib.Path(str(params.get('registry'))).name}{some}"


# one task thread per CPU (at least two): each batch task waits on one local worker process; the
# command line and the deployments set the timeout from the policy (flow_timeout_minutes)
@flow(
    name="fitaudit-audit",
    flow_run_name=_run_name,
    persist_result=False,
    log_prints=False,
    task_runner=ThreadPoolTaskRunner(max_workers=max(2, default_processes())),
)
def audit_flow(
    registry: str,
    as_of: dt.date | None = None,
    archive: str | None = None,
    models: list[str] | None = None,
    batch_size: int = 0,
    trigger_refits: bool = False,
    search_candidates: bool = True,
    progress: bool = False,
) -> dict:
    """Audit every model of a registry at an as-of date and archive the report.

    Parameters
    ----------
    registry : str
        Path of the registry YAML.
    as_of : date, optional
        Data up to the end of this day are used; default today (UTC).
    archive : str, optional
        Archive folder; default the ``archive_root`` setting.
    models : list of str, optional
        Audit only these model ids.
    batch_size : int
        Models per task (0 chooses automatically).
    search_candidates : bool
        Score neighbouring specifications for ``respecify`` models and list passing ones in the
        report (default True).
    progress : bool
        Print a line to standard error as each batch finishes (the command line turns it on).
    trigger_refits : bool
        Start one refit flow run for all models with a ``refit`` or ``respecify`` verdict right away
        (works on the embedded server; respecify models get their candidates listed, nothing is
        promoted for them); otherwise the refit deployment's trigger does the same from the
        ``fitaudit.run.completed`` event (its ``refit_models``).
        Forecast entries are never refitted by fitaudit (their owners re-estimate).

    Returns
    -------
    dict
        Run id, report path, summary counts and timings.
    """
    t_start = time.perf_counter()
    started = _utc()
    settings = get_settings()
    archive = str(pathlib.Path(archive or settings.archive_root).resolve())
    as_of = as_of or dt.datetime.now(dt.UTC).date()
    logger = get_run_logger()
    timings: dict[str, float] = {}

    reg = load_registry_task(registry)
    recovered = recover_task(archive)
    run_id = new_run_id(as_of)
    # the run's scratch folder, locked while it runs; recover() removes it if the process dies.  Opened
    # before the archive check starts: its exclusive archive lock would otherwise wait for the check's
    # shared one
    scratch = open_work_folder(archive, run_id)
    work = scratch.path
    with contextlib.ExitStack() as ending:
        ending.callback(scratch.close)
        # the archive's integrity check runs in a spare worker beside the run's first reads (context,
        # history, staging); its outcome is taken before any model is audited, and its refusal is the
        # error a run on a damaged archive ends with, whatever those reads met
        checking = start_archive_check(archive)
        # the imports' objects (Prefect, pydantic, pyarrow) left out of the collector's passes until the run ends
        ending.enter_context(heap_frozen())
        with refusal_first(checking):
            extends = context_task(archive, as_of)
            wanted = None if models is None else set(models)
            ids = [m.id for m in reg.models if wanted is None or m.id in wanted]
            history = history_task(archive, as_of, quote(ids))
            t0 = time.perf_counter()
            # the shared null tables begin on the spare workers as the batches are written
            early = EarlyTables(reg.policy, archive_tables(archive, settings.reuse_null_tables))
            # quote(): large inputs are passed as they are; Prefect would otherwise walk every element of
            # them (twice per task call) looking for futures, which costs seconds on a big fleet
            stage_args = dict(
                archive_root=archive,
                histories=quote(history.records),
                model_ids=quote(ids),
                batch_size=batch_size or settings.batch_size,
                workers=_workers(),
                on_batch=early.batch_staged,
            )
            try:
                staged = stage_inputs_task(quote(reg), as_of, str(work), **stage_args)
            except OSError:
                staged = stage_inputs_task(quote(reg), as_of, str(work), os_errors="record", **stage_args)
            timings["stage_s"] = time.perf_counter() - t0
        acknowledged = check_archive_task(archive, quote(checking))

        with local_workers(_local_processes(settings.processes, len(staged.batches), len(ids))) as workers:
            t0 = time.perf_counter()
            cache = calibration_task([b.path for b in staged.batches], reg.policy, early.store, workers, quote(early))
            timings["calibration_s"] = time.perf_counter() - t0
            t0 = time.perf_counter()
            futures = audit_batch_task.map(
                [b.path for b in staged.batches],
                unmapped(reg.policy),
                unmapped(cache),
                unmapped(workers),
                unmapped(settings.model_time_limit_s),
            )
            if progress:
                _report_progress(futures, staged)
            batches = list(futures.result())
            batches.append([rejected_outcome(r) for r in reg.rejected if wanted is None or r.id in wanted])
            outcomes = [o for batch in batches for o in batch]
            timings["audit_s"] = time.perf_counter() - t0
            timings["core_s"] = sum(o.timings.get("total_s", 0.0) for o in outcomes)

            final = finalize_task(quote(outcomes), quote(reg))
            if search_candidates:
                t0 = time.perf_counter()
                todo = {o.model_id for o in final if wants_candidates(o)}
                jobs = candidate_jobs(staged.batches, todo)
                if jobs:
                    # the null tables the searches share, then the searches, in one lane per worker: the
                    # lanes share both out as they go (candidates_claimed)
                    lanes = candidates_task.map(
                        range(min(_workers(), len(todo))),
                        unmapped(jobs),
                        unmapped(candidate_tables(jobs, reg.policy)),
                        unmapped(reg.policy),
                        unmapped(lanes_cache(cache, work)),
                        unmapped(str(work / "candidate-claims")),
                        unmapped(workers),
                        # what the audit knows: the searches neither refit nor check a failing spec again
                        unmapped(independence_flags(o for o in final if o.model_id in todo)),
                    )
                    found = {}
                    for part, shared in lanes.result():
                        found.update(part)
                        cache.merge(shared)
                    final = with_candidates(final, found)
                timings["candidates_s"] = time.perf_counter() - t0
            head = results_head(
                as_of=as_of.isoformat(),
                registry={"path": pathlib.Path(reg.path).name, "sha256": reg.sha256},
                policy=reg.policy.to_dict(),
                tool_version=package_versions()["fitaudit"] or "unknown",
            )
            t0 = time.perf_counter()
            meta = {
                "run_id": run_id,
                "started_utc": started,
                "finished_utc": _utc(),
                "operator": operator_identity(settings.operator),
                "tool_version": head["run"]["tool_version"],
                "code_commit": code_commit(),
                "prefect_version": package_versions()["prefect"],
                **{k: extends[k] for k in ("archive_head", "previous_run_id", "previous_as_of", "fleet_trend")},
                # earlier audits whose results could not be used as history: the run page names them
                "history_problems": [dict(p) for p in history.problems],
                # p-values adjusted over a partial run: the run page says so
                "scope": {
                    "models_requested": None
                    if wanted is None
                    else len(ids) + sum(1 for r in reg.rejected if r.id in wanted),
                    "registry_models": len(reg.models) + len(reg.rejected),
                    "unreadable_sources": sorted(staged.source_errors),
                },
                # sources too stale to audit: the run page lists each once
                "stale_sources": {k: dict(v) for k, v in staged.stale_sources.items()},
            }
            parcels, names, spills = render_parcels(final, batches, [b.path for b in staged.batches])
            rendered = render_outcomes_task.map(
                parcels,
                unmapped(head),
                unmapped(meta),
                unmapped(str(work / "publish")),
                names,
                spills,
                unmapped(workers),
            )
            staged_records = [r for part in rendered.result() for r in part]
            timings["render_s"] = time.perf_counter() - t0
        per_model = {o.model_id: o.timings for o in final}
        del outcomes, final, batches, parcels, futures, rendered  # the full results now live in the work folder
        recs = [r.light for r in staged_records]
        summary = results_summary(recs, head["run"]["policy"])
        manifest = {
            "kind": "audit",
            **{k: meta[k] for k in ("started_utc", "operator", "tool_version", "code_commit")},
            "packages": package_versions(),
            "registry": {"path": str(pathlib.Path(reg.path).resolve()), "sha256": reg.sha256},
            "inputs": staged.fingerprints,
            "source_errors": staged.source_errors,
            "stale_sources": staged.stale_sources,
            "policy": reg.policy.to_dict(),
            "seeds": {"policy_seed": reg.policy.seed},
            "counts": {k: summary[k] for k in ("registered", "audited", *VERDICTS)},
            "batches": len(staged.batches),
            "calibration_tables": len(cache),
            # of the shared tables (before the batches, for the candidate search), those read from <archive>/.tables
            "calibration_tables_reused": len(cache.reused),
            "recovered": recovered,
            "acknowledged_damage": acknowledged,
            "history": history.to_manifest(),
            "extends": {k: extends[k] for k in ("chain_head", "chain_seq", "previous_run_id", "previous_as_of")},
            "fleet_trend": extends["fleet_trend"],
            "scope": {**meta["scope"], "models_requested": sorted(wanted) if wanted is not None else None},
            "production": staged.production,
            "task_runner": _runner_name(),
        }
        timings["total_s"] = time.perf_counter() - t_start
        manifest["timings"] = {**timings, "per_model": per_model}
        manifest["finished_utc"] = meta["finished_utc"]
        published = publish_task(archive, head, summary, quote(staged_records), meta, quote(manifest), run_id)
        timings["publish_s"] = time.perf_counter() - t0
        report = str(pathlib.Path(published["path"]) / "index.html")
        if published["seq"] != extends["chain_seq"] + 1:
            logger.warning(
                "run %s: %d chain entries were appended while it ran; its page names the head before them (seq %s), "
                "its own entry is seq %d",
                run_id,
                published["seq"] - extends["chain_seq"] - 1,
                extends["chain_seq"],
                published["seq"],
            )
        from fitaudit.tasks.refit import refit_targets

        todo = refit_targets(recs)  # refit and respecify verdicts; forecast entries are re-estimated by their owners
        run = {
            "run_id": run_id,
            "as_of": as_of.isoformat(),
            "report_path": report,
            "registry_sha256": reg.sha256,
            "archive": archive,
            "report_base_url": settings.report_base_url,
            "policy": head["run"]["policy"],
            "manifest_sha256": published["manifest_sha256"],
            "chain_head": published["chain_head"],
            "refit_models": todo,
        }
        t0 = time.perf_counter()
        events_task(quote(recs), summary, run)
        timings["events_s"] = time.perf_counter() - t0
        counts = manifest["counts"]
        logger.info("audit %s as of %s: %s; report %s", run_id, as_of, counts, report)

        refits = None
        if trigger_refits:
            from fitaudit.flows.refit import refit_flow

            if todo:
                refits = refit_flow(
                    registry=registry,
                    model_ids=todo,
                    archive=archive,
                    as_of=as_of,
                    reason=f"verdicts of audit run {run_id}",
                    registry_sha256=reg.sha256,
                )
    return {
        "run_id": run_id,
        "as_of": as_of.isoformat(),
        "report": report,
        "archive": archive,
        "counts": counts,
        "timings": {k: round(v, 3) for k, v in timings.items()},
        "refits": refits,
        "refit_models": todo,
        "manifest_sha256": published["manifest_sha256"],
        "chain_head": published["chain_head"],
    }
