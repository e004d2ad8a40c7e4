"""The audit stage: run :func:`fitaudit.core.audit.audit_series` over staged batches.

Plain functions do the work (testable without Prefect); the thin ``@task`` wrapper adds logging.
One broken model never sinks a batch: every failure becomes that model's ``error`` (or
``insufficient``) outcome with a plain message, and the others go on.
"""

from __future__ import annotations

import dataclasses
import time
import traceback
from dataclasses import dataclass, field
from typing import Any, Iterable, Mapping, Sequence

from prefect import get_run_logger, task
from prefect.cache_policies import NO_CACHE

from fitaudit.core.audit import AuditResult, AuditSettings, apply_fleet_rules, as_model, prepare_calibration
from fitaudit.core.calibration import CalibrationCache
from fitaudit.core.exceptions import FitauditError

from .batches import ModelInput, batch_metadata, read_batch
from .registry import Policy, RejectedEntry
from .results import model_record

__all__ = ["Outcome", "settings_for", "audit_input", "audit_inputs", "audit_batch", "finalize", "rejected_outcome", "records", "audit_batch_task", "candidates_for", "candidates_task", "with_candidates", "calibration_for", "calibration_task"]


@dataclass(frozen=True)
class Outcome:
    """One model's outcome in a run (before or after the fleet rules)."""

    entry: dict
    verdict: str
    reasons: tuple
    result: AuditResult | None = None
    lineage: dict = field(default_factory=dict)
    production: dict | None = None
    history: tuple = ()
    settings: dict = field(default_factory=dict)
    spec_text: str = ""
    timings: dict = field(default_factory=dict)
    candidates: tuple | None = None

    @property
    def model_id(self) -> str:
        """The model entry's id."""
        return str(self.entry.get("id"))


def settings_for(entry: Mapping[str, Any], policy: Policy) -> AuditSettings:
    """Audit settings of one model: the policy, the entry's overrides, its windows."""
    over = dict(entry.get("settings") or {})
    return AuditSettings(
        level=float(over.get("level", policy.level)),
        calibration=str(over.get("calibration", policy.calibration)),
        replicates=int(over.get("replicates", policy.replicates)),
        seed=int(policy.seed),
        audit_window=int(entry["windows"]["audit"]),
    )


def _spec_text(entry: Mapping[str, Any]) -> str:
    try:
        return as_model(dict(entry.get("spec") or {})).describe()
    except (FitauditError, ValueError, TypeError):
        return str(entry.get("spec"))


def audit_input(item: ModelInput, policy: Policy, cache: CalibrationCache) -> Outcome:
    """Audit one staged model; data problems and failures become ``insufficient``/``error``."""
    entry = item.entry
    base = dict(entry=entry, lineage=item.lineage, history=item.history, spec_text=_spec_text(entry))
    production = item.production
    prod_meta = None if production is None else {k: production[k] for k in ("version", "sha256", "created_at") if k in production}
    errors = [p["message"] for p in item.problems if p["severity"] == "error"]
    if production is not None and production.get("error"):
        errors.append(production["error"])
    if errors:
        return Outcome(verdict="error", reasons=tuple(errors), production=prod_meta, **base)
    short = [p["message"] for p in item.problems if p["severity"] == "insufficient"]
    if short:
        return Outcome(verdict="insufficient", reasons=tuple(short), production=prod_meta, **base)
    t0 = time.perf_counter()
    try:
        settings = settings_for(entry, policy)
        result = audit_series_for(item, settings, cache)
    except Exception as exc:  # contain anything (e.g. a user's nonlinear function) to this model
        where = traceback.extract_tb(exc.__traceback__)[-1] if exc.__traceback__ else None
        at = f" (at {where.filename.rsplit('/', 1)[-1]}:{where.lineno})" if where else ""
        msg = f"model {item.model_id!r}: the audit failed with {type(exc).__name__}: {exc}{at}. Check the model spec and the series; the other models are unaffected."
        return Outcome(verdict="error", reasons=(msg,), production=prod_meta, timings={"total_s": time.perf_counter() - t0}, **base)
    return Outcome(
        verdict=result.verdict,
        reasons=result.reasons,
        result=result,
        production=prod_meta,
        settings=settings.to_dict(),
        timings=dict(result.timings),
        **base,
    )


def audit_series_for(item: ModelInput, settings: AuditSettings, cache: CalibrationCache) -> AuditResult:
    """Call the core audit with a staged model's data, spec, noise law and production version."""
    from fitaudit.core.audit import audit_series

    production = item.production
    return audit_series(
        item.y,
        dict(item.entry["spec"]),
        noise={"law": item.entry["noise"]["law"], "shape": item.entry["noise"].get("shape")},
        exog=item.exog or None,
        production=None if production is None else production["params"],
        production_noise=None if production is None else production.get("noise"),
        settings=settings,
        cache=cache,
        label=f"model {item.model_id!r}",
    )


def audit_inputs(items: Iterable[ModelInput], policy: Policy, cache: CalibrationCache | None = None) -> list[Outcome]:
    """Audit staged models with one shared calibration cache."""
    cache = cache if cache is not None else CalibrationCache()
    return [audit_input(item, policy, cache) for item in items]


def audit_batch(path: str, policy: Policy, cache: CalibrationCache | None = None) -> list[Outcome]:
    """Audit every model of one staged batch file."""
    return audit_inputs(read_batch(path), policy, cache)


def rejected_outcome(entry: RejectedEntry) -> Outcome:
    """A registry entry that failed validation: an ``error`` outcome listing its problems."""
    info = {"id": entry.id, "safe_id": entry.safe_id, "owner": entry.owner, "line": entry.line, "spec": {}}
    reasons = tuple(f"Registry entry rejected: {p}" for p in entry.problems)
    return Outcome(entry=info, verdict="error", reasons=reasons, spec_text="(invalid registry entry)")


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


def with_candidates(outcomes: Sequence[Outcome], found: Mapping[str, list[dict]]) -> list[Outcome]:
    """Attach candidate lists to the outcomes they belong to."""
    return [dataclasses.replace(o, candidates=tuple(found[o.model_id])) if o.model_id in found else o for o in outcomes]


def records(outcomes: Sequence[Outcome], as_of: str) -> list[dict]:
    """Results-document records (see :mod:`fitaudit.tasks.results`) of the outcomes."""
    out = []
    for o in outcomes:
        entry = dict(o.entry)
        entry.setdefault("safe_id", entry.get("id"))
        out.append(
            model_record(
                entry,
                as_of=as_of,
                verdict=o.verdict,
                reasons=o.reasons,
                audit=None if o.result is None else o.result.to_dict(),
                spec_text=o.spec_text,
                lineage=o.lineage,
                settings=o.settings,
                production_version=o.production,
                history=o.history,
                candidates=None if o.candidates is None else list(o.candidates),
                escalated=bool(o.result.escalated) if o.result is not None else False,
            )
        )
    return out


def calibration_for(batch_paths: Sequence[str], policy: Policy) -> CalibrationCache:
    """Build the run's shared null tables from the staged batches' metadata (no data read)."""
    entries = []
    for path in batch_paths:
        for meta in batch_metadata(path):
            if any(p["severity"] == "error" for p in meta["problems"]) or meta["lineage"].get("rows_loaded", 0) == 0:
                continue
            entry = meta["entry"]
            production = meta.get("production")
            n_obs = min(int(meta["lineage"]["rows_loaded"]), int(entry["windows"]["fit"]))
            noise = {"law": entry["noise"]["law"], "shape": entry["noise"].get("shape")}
            entries.append((dict(entry["spec"]), noise, settings_for(entry, policy), n_obs, bool(production and not production.get("error"))))
    return prepare_calibration(entries)


@task(name="prepare-calibration", cache_policy=NO_CACHE, persist_result=False)
def calibration_task(batch_paths: list[str], policy: Policy) -> CalibrationCache:
    """Prefect task: simulate every null table the run needs, once, before the batches start."""
    cache = calibration_for(batch_paths, policy)
    get_run_logger().info("calibration: %d null tables", len(cache))
    return cache


@task(name="audit-batch", cache_policy=NO_CACHE, persist_result=False)
def audit_batch_task(path: str, policy: Policy, cache: CalibrationCache | None = None) -> list[Outcome]:
    """Prefect task: audit one staged batch (a file path in, compact outcomes out)."""
    t0 = time.perf_counter()
    outcomes = audit_batch(path, policy, cache)
    counts: dict[str, int] = {}
    for o in outcomes:
        counts[o.verdict] = counts.get(o.verdict, 0) + 1
    get_run_logger().info("batch %s: %d models in %.1f s %s", path.rsplit("/", 1)[-1], len(outcomes), time.perf_counter() - t0, counts)
    return outcomes


def candidates_for(path: str, model_ids: Sequence[str], policy: Policy, cache: CalibrationCache | None = None) -> dict[str, list[dict]]:
    """Candidate search (:func:`fitaudit.core.candidates.search_candidates`) for models of a batch."""
    from fitaudit.core.candidates import search_candidates

    wanted = set(model_ids)
    cache = cache if cache is not None else CalibrationCache()
    out: dict[str, list[dict]] = {}
    for item in read_batch(path):
        if item.model_id not in wanted:
            continue
        entry = item.entry
        try:
            found = search_candidates(
                item.y, dict(entry["spec"]), noise={"law": entry["noise"]["law"], "shape": entry["noise"].get("shape")},
                exog=item.exog or None, settings=settings_for(entry, policy), cache=cache,
            )
            out[item.model_id] = [c.to_dict() for c in found]
        except Exception as exc:  # the search is advice; its failure must not lose the verdict
            out[item.model_id] = [{"error": f"candidate search failed: {type(exc).__name__}: {exc}"}]
    return out


@task(name="search-candidates", cache_policy=NO_CACHE, persist_result=False)
def candidates_task(path: str, model_ids: list[str], policy: Policy, cache: CalibrationCache | None = None) -> dict[str, list[dict]]:
    """Prefect task: candidate specifications for the ``respecify`` models of one batch."""
    return candidates_for(path, model_ids, policy, cache)
