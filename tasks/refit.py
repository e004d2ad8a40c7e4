"""The refit stage: re-estimate, re-audit, store a parameter version, promote or search candidates.

For each model: the staged series is refitted and audited (with the production version, when
there is one, so the record shows the check before and after).  When the refit check passes, the
fitted parameters are written as a ``candidate`` parameter version, and promoted (a new
``promoted`` version plus a ``promotion`` entry in the hash chain, written together under the
archive lock: :func:`fitaudit.tasks.archive.record_promotion`) when the policy is
``automatic`` or a person approved it.  When the refit check fails, the model class no longer
fits: the candidate search lists neighbouring specifications and noise laws that pass.

Forecast entries (forecasts made elsewhere) are never refitted: fitaudit holds no model of them,
and their ``refit`` verdict asks their owner to re-estimate.  :func:`refuse_forecast_entries`
refuses them before anything is staged, and :func:`refit_targets` leaves them out of the refits
an audit starts.
"""

from __future__ import annotations

import datetime as dt
import os
import pathlib
from collections.abc import Mapping, Sequence
from typing import Any

from prefect import get_run_logger, task
from prefect.cache_policies import NO_CACHE

from fitaudit.core.audit import as_model
from fitaudit.core.calibration import CalibrationCache
from fitaudit.core.candidates import independence_flagged, search_candidates
from fitaudit.core.exceptions import FitauditError

from .archive import open_run
from .audit import audit_series_for
from .batchfiles import ModelInput, read_batch
from .outcomes import is_forecast_record
from .params import promote, write_version
from .registry import ForecastEntry, Policy, Registry

__all__ = [
    "NotRefittableError",
    "REFIT_VERDICTS",
    "refuse_forecast_entries",
    "refit_targets",
    "refit_input",
    "refit_batch",
    "refit_batch_task",
    "record_task",
]

#: Verdicts after which the audit may start the refit flow (a model fitaudit fits only).
REFIT_VERDICTS = ("refit", "respecify")


class NotRefittableError(FitauditError):
    """A refit was asked for an entry fitaudit cannot refit (forecasts made elsewhere)."""


def refuse_forecast_entries(registry: Registry, model_ids: Sequence[str]) -> None:
    """Refuse a refit that names forecast entries, before anything is staged or written.

    Raises
    ------
    NotRefittableError
        Naming each forecast entry, why fitaudit cannot refit it, and what to do.
    """
    forecasts = [m.id for m in registry.models if isinstance(m, ForecastEntry) and m.id in set(model_ids)]
    if not forecasts:
        return
    names = ", ".join(repr(m) for m in forecasts)
    others = [m for m in model_ids if m not in forecasts]
    raise NotRefittableError(
        f"{registry.path}: {names} {'is a forecast entry' if len(forecasts) == 1 else 'are forecast entries'}: "
        "fitaudit audits the forecasts its owner states and holds no model to refit. A 'refit' verdict there means "
        "the forecasts no longer match their stated uncertainty and the owner should re-estimate the model that "
        "issues them; the next audit checks the new forecasts. Nothing was refitted"
        + (f"; refit the other models alone ({', '.join(repr(m) for m in others)})." if others else ".")
    )


def refit_targets(records: Sequence[Mapping[str, Any]]) -> list[str]:
    """The ids of an audit's records whose verdict asks for a refit (:data:`REFIT_VERDICTS`) and
    that fitaudit can refit: forecast entries are left out (their owners re-estimate)."""
    return [r["id"] for r in records if r["verdict"] in REFIT_VERDICTS and not is_forecast_record(r)]


def _check_summary(check: Any) -> dict | None:
    if check is None:
        return None
    if not check.ok:
        return {"status": check.status, "message": check.message}
    return {
        "status": "ok",
        "passed": bool(check.passed()),
        "n": check.n,
        "r_max": check.r_max,
        "p_value": check.p_value,
        "p_distribution": check.p_distribution,
        "p_independence": check.p_independence,
    }


def refit_input(
    item: ModelInput,
    policy: Policy,
    archive_root: str | os.PathLike,
    *,
    run_id: str,
    operator: str,
    approve: bool = False,
    approved_by: str = "",
    cache: CalibrationCache | None = None,
) -> dict:
    """Refit one staged model and act on the result; returns a JSON-ready record."""
    entry = item.entry
    record: dict[str, Any] = {"model_id": item.model_id, "spec": entry.spec, "noise": entry.noise_law()}
    problems = [p["message"] for p in item.problems]
    if problems:
        record.update(status="not refitted", reasons=problems)
        return record
    cache = cache if cache is not None else CalibrationCache()
    settings = entry.audit_settings(policy)
    result = audit_series_for(item, settings, cache)
    record["before"] = _check_summary(result.production)
    record["after"] = _check_summary(result.refit)
    record["production_version"] = None if item.production is None else item.production.get("version")
    record["reasons"] = list(result.reasons)
    if not result.refit.ok:
        record["status"] = result.refit.status
        return record
    if result.refit.passed():
        fitted_noise = entry.noise_law()
        if fitted_noise.get("shape") is None and result.refit.noise.get("shape") is not None:
            fitted_noise["shape"] = result.refit.noise["shape"]
        lineage = {
            "run_id": run_id,
            "extract_digest": item.lineage.get("extract_digest"),
            "fit_first": item.lineage.get("first"),
            "fit_last": item.lineage.get("last"),
            "refit_p_value": result.refit.p_value,
            "loglik": result.fitted.get("loglik"),
        }
        version = write_version(
            archive_root,
            item.model_id,
            spec=entry.spec,
            noise=fitted_noise,
            params=result.fitted["params"],
            status="candidate",
            created_by=operator,
            lineage=lineage,
            note="refitted by fitaudit; the refit check passed",
        )
        record["candidate_version"] = version.version
        if policy.refit_policy == "automatic" or approve:
            who = approved_by or (f"{operator} (automatic policy)" if policy.refit_policy == "automatic" else operator)
            note = "promoted automatically: the refit check passed" if not approve else "promotion approved"
            promoted = promote(
                archive_root, item.model_id, version.version, approved_by=who, note=note, details={"run_id": run_id}
            )
            record.update(status="promoted", promoted_version=promoted.version)
        else:
            record["status"] = "awaiting approval"
        return record
    candidates = search_candidates(
        item.y,
        dict(entry.spec),
        noise=entry.noise_law(),
        exog=item.exog or None,
        settings=settings,
        cache=cache,
        independence=independence_flagged(result.refit),  # this refit check's: not made again
    )
    record.update(
        status="respecify",
        spec_text=as_model(dict(entry.spec)).describe(),
        candidates=[c.to_dict() for c in candidates],
    )
    return record


def refit_batch(path: str, policy: Policy, archive_root: str, **kwargs) -> list[dict]:
    """Refit every model of a staged batch; one model's failure is recorded, not raised."""
    out = []
    for item in read_batch(path):
        try:
            out.append(refit_input(item, policy, archive_root, **kwargs))
        except Exception as exc:  # contain the failure to this model
            out.append(
                {
                    "model_id": item.model_id,
                    "status": "error",
                    "reasons": [f"model {item.model_id!r}: refit failed with {type(exc).__name__}: {exc}"],
                }
            )
    return out


@task(name="refit-batch", cache_policy=NO_CACHE, persist_result=False)
def refit_batch_task(
    path: str,
    policy: Policy,
    archive_root: str,
    run_id: str,
    operator: str,
    approve: bool = False,
    approved_by: str = "",
    cache: CalibrationCache | None = None,
) -> list[dict]:
    """Prefect task: refit one staged batch."""
    out = refit_batch(
        path,
        policy,
        archive_root,
        run_id=run_id,
        operator=operator,
        approve=approve,
        approved_by=approved_by,
        cache=cache,
    )
    get_run_logger().info("refit batch %s: %s", path.rsplit("/", 1)[-1], {r["model_id"]: r["status"] for r in out})
    return out


@task(name="record-refits", cache_policy=NO_CACHE, persist_result=False)
def record_task(archive: str, run_id: str, as_of: dt.date, records: list[dict], manifest: dict) -> str:
    """Archive the refit records as a run folder (``refit.json``), linked into the chain."""
    writer = open_run(archive, run_id, as_of.year, as_of=as_of)
    with writer:
        writer.write_json(
            "refit.json",
            {"schema": "fitaudit.refit", "schema_version": 1, "as_of": as_of.isoformat(), "records": records},
        )
        published = writer.finish(manifest)
    return str(pathlib.Path(archive) / published.path)
