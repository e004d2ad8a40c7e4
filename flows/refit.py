"""The refit flow: refit, re-audit, version, promote (or search candidates for respecification)."""

from __future__ import annotations

import datetime as dt
import pathlib

from prefect import flow, get_run_logger, unmapped

from fitaudit.core.calibration import CalibrationCache
from fitaudit.tasks.archive import new_run_id, open_work_folder, recover, require_intact
from fitaudit.tasks.batches import stage_inputs_task
from fitaudit.tasks.events import refit_events_task
from fitaudit.tasks.publish import code_commit, operator_identity, package_versions
from fitaudit.tasks.refit import record_task, refit_batch_task, refuse_forecast_entries
from fitaudit.tasks.registry import load_registry_task, require_digest
from fitaudit.tasks.settings import get_settings
from fitaudit.tasks.table_store import archive_tables

__all__ = ["refit_flow"]


def _run_name() -> str:
    """The flow run's name in the Prefect UI: ``refit 2026-11-30 registry.yaml, 3 models``."""
    from prefect.runtime import flow_run

    params = flow_run.parameters or {}
    as_of = params.get("as_of") or dt.datetime.now(dt.UTC).date()
    ids = params.get("model_ids") or []
    return (
        f"refit {str(as_of)[:10]} {pathlib.Path(str(params.get('registry'))).name}, {len(ids)} "
        f"model{'s' if len(ids) != 1 else ''}"
    )


@flow(name="fitaudit-refit", flow_run_name=_run_name, persist_result=False, log_prints=False)
def refit_flow(
    registry: str,
    model_ids: list[str],
    archive: str | None = None,
    as_of: dt.date | None = None,
    approve: bool = False,
    approved_by: str = "",
    reason: str = "",
    registry_sha256: str | None = None,
) -> dict:
    """Refit the named models and store new parameter versions.

    Parameters
    ----------
    registry : str
        Registry YAML path.
    model_ids : list of str
        Models to refit (e.g. those with a ``refit`` or ``respecify`` verdict).  A forecast entry
        (forecasts made elsewhere) is refused with ``NotRefittableError`` before anything is done.
    archive : str, optional
        Archive folder (parameter store and chain); default the ``archive_root`` setting.
    as_of : date, optional
        Data up to this day; default today (UTC).
    approve, approved_by : bool, str
        Promote passing refits now, recording who approved (policy ``approval``); with policy
        ``automatic`` passing refits are promoted anyway.
    reason : str
        Why the refit was started (e.g. the triggering event), recorded in the manifest.
    registry_sha256 : str, optional
        SHA-256 of the registry the audit read (its manifest and its verdict events carry it): a
        registry file that changed since is refused (``RegistryChangedError``) before anything is
        refitted.  None or empty: the file is used as it is.
    """
    settings = get_settings()
    archive = str(pathlib.Path(archive or settings.archive_root).resolve())
    as_of = as_of or dt.datetime.now(dt.UTC).date()
    reg = load_registry_task(registry)
    require_digest(reg, registry_sha256)
    refuse_forecast_entries(reg, model_ids)  # forecasts made elsewhere: their owners re-estimate
    recovered = recover(archive) if pathlib.Path(archive).exists() else []
    acknowledged = [str(p) for p in require_intact(archive)]  # nothing is added to an archive that verify rejects
    run_id = new_run_id(as_of)
    # the refit's scratch folder, locked while it runs (another run's recovery leaves it alone)
    scratch = open_work_folder(archive, run_id)
    work = scratch.path
    try:
        known = {m.id for m in reg.models}
        unknown = [m for m in model_ids if m not in known]
        staged = stage_inputs_task(
            reg,
            as_of,
            str(work),
            archive_root=archive,
            model_ids=[m for m in model_ids if m in known],
            batch_size=settings.batch_size,
        )
        operator = operator_identity(settings.operator)
        futures = refit_batch_task.map(
            [b.path for b in staged.batches],
            unmapped(reg.policy),
            unmapped(archive),
            unmapped(run_id),
            unmapped(operator),
            unmapped(approve),
            unmapped(approved_by),
            unmapped(CalibrationCache(store=archive_tables(archive, settings.reuse_null_tables))),
        )
        records = [r for batch in futures.result() for r in batch]
        records += [
            {"model_id": m, "status": "error", "reasons": [f"model {m!r} is not an accepted entry of the registry"]}
            for m in unknown
        ]
        manifest = {
            "kind": "refit",
            "operator": operator,
            "tool_version": package_versions()["fitaudit"],
            "code_commit": code_commit(),
            "packages": package_versions(),
            "registry": {"path": str(pathlib.Path(reg.path).resolve()), "sha256": reg.sha256},
            "inputs": staged.fingerprints,
            "reason": reason,
            "policy": reg.policy.to_dict(),
            "production": staged.production,
            "recovered": recovered,
            "acknowledged_damage": acknowledged,
            "counts": {
                s: sum(1 for r in records if r.get("status") == s) for s in sorted({r.get("status") for r in records})
            },
        }
        path = record_task(archive, run_id, as_of, records, manifest)
    finally:
        scratch.close()
    refit_events_task(records, run_id)
    get_run_logger().info("refit %s: %s", run_id, manifest["counts"])
    return {"run_id": run_id, "path": path, "records": records}
