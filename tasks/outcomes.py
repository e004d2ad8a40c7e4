"""One model's outcome in an audit run, from the audit to the archive: its shapes and conversions.

A run streams: the flow process never holds every model's full result, its record or its page at
once (docs/architecture.md §5; ``docs/performance.md`` measures the memory).  Streaming is why a
model's outcome takes more than one shape; this module holds all of them, each produced by one
function here, in the order a run makes them:

1. :class:`Outcome`, full (``audit_input`` in :mod:`fitaudit.tasks.audit`): the registry entry's
   plain view, the verdict and reasons, the core's :class:`~fitaudit.core.results.AuditResult`
   (maps, grids, plots), lineage, settings, history and timings.  Everything the record needs.
2. :class:`Outcome`, light (:func:`light_outcome`): the same class with what only the record
   needs emptied (the entry but its id, lineage, settings, the checks' maps, grids, plots and
   counts, the change location, the fitted parameters).  What the batch tasks return to the flow:
   enough for the fleet rules and the candidate search at a fraction of the memory.  They travel
   on to the render tasks pickled, a batch at a time (:func:`render_parcels`).
3. The spill file (:func:`spill_outcomes`, :func:`spill_path`): a batch's full outcomes, pickled
   next to its batch file in the run's scratch folder until :func:`restore_outcomes` copies the
   fleet rules' decisions (verdict, reasons, escalation, adjusted p-values, candidates) from the
   light outcomes onto them.  Pickled, not JSON: the full outcomes hold the core's result objects,
   and the records must be made *after* the fleet rules.
4. The record (:func:`record`, :func:`model_record`): one element of ``results.json``'s
   ``models`` (schema in :mod:`fitaudit.tasks.results`); also what the model page is rendered
   from.  Published, so its form is fixed.
5. The light record (:func:`light_record`): the record without lineage, settings, candidates and
   all but each check's headline numbers.  What the flow keeps per model after the pages are made:
   enough for the summary, the run page, ``results.parquet`` and the events.
6. :class:`StagedRecord` (:func:`stage_records`): a light record with the place where its record's
   canonical JSON and its page wait in the scratch folder, so that :func:`staged_bytes` streams
   ``results.json`` into the run folder without holding the records.
7. The parquet row (:func:`parquet_row`, :func:`results_rows`, :func:`parquet_bytes`): one row of
   ``results.parquet``, the headline numbers flat.  Published (``fitaudit.load_results`` reads it).
8. The history row (:func:`history_row`): one earlier audit of a model, read back from an
   earlier run's ``results.parquet`` (:data:`HISTORY_COLUMNS`) by
   :func:`fitaudit.tasks.publish.load_history`; staging attaches a model's rows to its batch
   entry, the outcome carries them, the fleet rules read their verdicts, and the record publishes
   them (``history``).

Shapes 1 and 2 are one class and 3 is its file; 4 and 7 are published formats; 5 and 6 exist for
streaming only; 8 is the published row read back.  The core's ``AuditResult`` is the result of
:func:`fitaudit.core.audit.audit_series` itself and lives in ``core/results.py``.
"""

from __future__ import annotations

import dataclasses
import io
import os
import pathlib
import pickle
from collections.abc import Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from ._io import canonical_json, write_replacing

if TYPE_CHECKING:
    from fitaudit.core.results import AuditResult

    from .registry import RejectedEntry

__all__ = [
    "Outcome",
    "rejected_outcome",
    "light_outcome",
    "spill_path",
    "spill_outcomes",
    "restore_outcomes",
    "SEVERITY",
    "movement",
    "model_record",
    "record",
    "records",
    "is_forecast_record",
    "light_record",
    "StagedRecord",
    "stage_records",
    "render_parcels",
    "render_outcomes",
    "render_pickled",
    "staged_bytes",
    "parquet_row",
    "results_rows",
    "parquet_bytes",
    "HISTORY_COLUMNS",
    "history_row",
]


# --------------------------------------------------------------------------------------------
# 1-3: the outcome, light and spilled


@dataclass(frozen=True)
class Outcome:
    """One model's outcome in a run (before or after the fleet rules).

    ``entry`` is the registry entry's plain view (``ModelEntry.to_dict()``, or the fields of a
    rejected entry), as the results record takes it.
    """

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


def rejected_outcome(entry: RejectedEntry) -> Outcome:
    """A registry entry that failed validation: an ``error`` outcome listing its problems."""
    info = {"id": entry.id, "safe_id": entry.safe_id, "owner": entry.owner, "line": entry.line, "spec": {}}
    # the registry by file name, as in the results document: results do not depend on where the registry lives
    reasons = tuple(
        f"Registry entry rejected: {dataclasses.replace(p, file=pathlib.PurePath(p.file).name)}" for p in entry.problems
    )
    return Outcome(entry=info, verdict="error", reasons=reasons, spec_text="(invalid registry entry)")


#: CheckResult fields that only the records and pages need (the fleet rules use the others: the
#: reasons they rewrite name the classical members, McLeod-Li, the simulation's floor and, for a
#: forecast audit, the window's length, so ``members``, ``mcleod_li``, ``calibration`` and
#: ``window`` stay; of the ``gate`` only its ``deciding`` cell, which the reasons describe).
_CHECK_DETAIL = {"map": None, "critical_grid": None, "scaled_grid": None, "plots": {}, "counts": ()}


def _check_for_fleet_rules(check):
    gate = check.gate or {}
    kept = {"deciding": gate["deciding"]} if "deciding" in gate else {}
    return dataclasses.replace(check, gate=kept, **_CHECK_DETAIL)


def light_outcome(outcome: Outcome) -> Outcome:
    """The outcome without what only its record needs: enough for the fleet rules
    (:func:`fitaudit.tasks.audit.finalize`), the candidate search and the run's timings, at a
    fraction of the memory.

    Kept: the id, verdict, reasons, history, timings and, of the result, every number the verdict
    is decided from and every figure its reasons quote.  Dropped: the entry's other fields,
    lineage, settings, and the checks' maps, grids, plots and counts, their gates' partitions and
    member statistics, the change location and the fitted parameters.
    :func:`restore_outcomes` puts them back.
    """
    res = outcome.result
    if res is not None:
        res = dataclasses.replace(
            res,
            production=None if res.production is None else _check_for_fleet_rules(res.production),
            refit=None if res.refit is None else _check_for_fleet_rules(res.refit),
            change=None,
            fitted={},
            production_params=None,
        )
    return dataclasses.replace(
        outcome, entry={"id": outcome.entry.get("id")}, result=res, lineage={}, settings={}, spec_text=""
    )


def spill_path(batch_path: str) -> str:
    """Where a batch's full outcomes are kept (:func:`spill_outcomes`)."""
    return str(batch_path) + ".outcomes.pickle"


def spill_outcomes(outcomes: Sequence[Outcome], batch_path: str) -> list[Outcome]:
    """Keep a batch's full outcomes in :func:`spill_path` (written whole, then renamed into place)
    and return them light (:func:`light_outcome`)."""
    write_replacing(spill_path(batch_path), pickle.dumps(list(outcomes), protocol=pickle.HIGHEST_PROTOCOL))
    return [light_outcome(o) for o in outcomes]


def restore_outcomes(final: Sequence[Outcome], spilled: str) -> list[Outcome]:
    """Full outcomes of a batch with the run's final decisions applied.

    ``final`` are the batch's light outcomes after :func:`fitaudit.tasks.audit.finalize` and
    :func:`fitaudit.tasks.audit.with_candidates`; ``spilled`` the file :func:`spill_outcomes`
    wrote (the run's own work folder).  The fleet rules change a result's verdict, reasons,
    escalation and each check's adjusted p-value, and the outcome's verdict, reasons and
    candidates; exactly these are copied onto the full outcomes.
    """
    from fitaudit.core.exceptions import FitauditError

    full = pickle.loads(pathlib.Path(spilled).read_bytes())
    if [o.model_id for o in full] != [o.model_id for o in final]:
        raise FitauditError(
            f"{spilled}: the kept outcomes do not match the batch's models; the run's work folder was changed during "
            "the run."
        )
    out = []
    for whole, done in zip(full, final):
        res = whole.result
        if res is not None:
            checks = {
                kind: dataclasses.replace(getattr(res, kind), p_adjusted=getattr(done.result, kind).p_adjusted)
                for kind in ("production", "refit")
                if getattr(res, kind) is not None
            }
            res = dataclasses.replace(
                res, verdict=done.result.verdict, reasons=done.result.reasons, escalated=done.result.escalated, **checks
            )
        out.append(
            dataclasses.replace(
                whole, verdict=done.verdict, reasons=done.reasons, result=res, candidates=done.candidates
            )
        )
    return out


# --------------------------------------------------------------------------------------------
# 4: the record


#: Exceptions are listed most severe first.
SEVERITY = {"error": 1, "respecify": 2, "refit": 3, "insufficient": 4, "pass": 5}


def movement(previous: str | None, current: str) -> str:
    """Status change against the previous audit: ``new``, ``persisting``, ``resolved``, ``steady``
    (pass after pass) or ``first`` (no earlier audit)."""
    if previous is None:
        return "first"
    before, now = previous != "pass", current != "pass"
    if now:
        return "persisting" if before else "new"
    return "resolved" if before else "steady"


def _exception(history: Sequence[Mapping[str, Any]], as_of: str, verdict: str) -> dict | None:
    """First audit of the current run of non-pass verdicts and its length (exceptions register)."""
    if verdict == "pass":
        return None
    first, count = as_of, 1
    for h in reversed(list(history)):
        if h.get("verdict") == "pass":
            break
        first, count = h.get("as_of", first), count + 1
    return {"first_seen": first, "consecutive": count}


def model_record(
    entry: Mapping[str, Any],
    *,
    as_of: str,
    verdict: str,
    reasons: Sequence[str],
    audit: Mapping[str, Any] | None,
    spec_text: str,
    lineage: Mapping[str, Any] | None = None,
    settings: Mapping[str, Any] | None = None,
    production_version: Mapping[str, Any] | None = None,
    history: Sequence[Mapping[str, Any]] = (),
    candidates: Sequence[Mapping[str, Any]] | None = None,
    escalated: bool = False,
) -> dict:
    """One model's entry in the results document.

    ``entry`` is the registry entry (``ModelEntry.to_dict()`` or a rejected entry's fields:
    ``id``, ``safe_id``, ``owner``, ...); ``audit`` is ``AuditResult.to_dict()`` or None when the
    model never reached the audit (registry or extract problems).  ``history`` lists earlier
    audits, oldest first.  A forecast entry's record (``ForecastEntry.to_dict()``) also holds
    ``forecasts``, the statement audited, and its ``noise`` is the stated law (None for
    quantiles); its ``audit`` has ``refit`` None and an ``accuracy`` block.
    """
    previous = history[-1]["verdict"] if history else None
    record = {
        "id": str(entry.get("id")),
        "safe_id": str(entry.get("safe_id") or entry.get("id")),
        "owner": entry.get("owner"),
        "tier": entry.get("tier"),
        "description": entry.get("description"),
        "source": entry.get("source"),
        "series": entry.get("series"),
        "last_validated": entry.get("last_validated"),
        "spec": dict(entry.get("spec") or {}),
        "spec_text": spec_text,
        "noise": entry.get("noise"),
        "verdict": verdict,
        "severity": SEVERITY[verdict],
        "reasons": [str(r) for r in reasons],
        "escalated": bool(escalated),
        "movement": movement(previous, verdict),
        "exception": _exception(history, as_of, verdict),
        "production_version": dict(production_version) if production_version else None,
        "lineage": dict(lineage or {}),
        "settings": dict(settings or {}),
        "audit": dict(audit) if audit is not None else None,
        "history": [dict(h) for h in history],
        "candidates": [dict(c) for c in candidates] if candidates is not None else None,
    }
    if entry.get("forecasts") is not None:  # forecasts made elsewhere: the statement audited, and its law
        record["forecasts"] = dict(entry["forecasts"])
        record["noise"] = entry["forecasts"].get("noise")
    return record


def record(outcome: Outcome, as_of: str) -> dict:
    """The results-document record of a (full, final) outcome: :func:`model_record` of its fields."""
    entry = dict(outcome.entry)
    entry.setdefault("safe_id", entry.get("id"))
    return model_record(
        entry,
        as_of=as_of,
        verdict=outcome.verdict,
        reasons=outcome.reasons,
        audit=None if outcome.result is None else outcome.result.to_dict(),
        spec_text=outcome.spec_text,
        lineage=outcome.lineage,
        settings=outcome.settings,
        production_version=outcome.production,
        history=outcome.history,
        candidates=None if outcome.candidates is None else list(outcome.candidates),
        escalated=bool(outcome.result.escalated) if outcome.result is not None else False,
    )


def records(outcomes: Sequence[Outcome], as_of: str) -> list[dict]:
    """:func:`record` of each outcome, in order."""
    return [record(o, as_of) for o in outcomes]


def is_forecast_record(record: Mapping[str, Any]) -> bool:
    """Whether a record (or its :func:`light_record` view) is a forecast entry's: forecasts made
    elsewhere, audited against their stated uncertainty and never refitted by fitaudit."""
    return record.get("forecasts") is not None


# --------------------------------------------------------------------------------------------
# 5-6: the light record and the staged record

#: Per-check numbers kept by :func:`light_record` (those of :func:`parquet_row`, the report's run
#: page and the verdict events).
_CHECK_FIELDS = (
    "status",
    "n",
    "cells",
    "t_max",
    "r_max",
    "alpha_max",
    "beta_max",
    "p_distribution",
    "p_independence",
    "p_value",
    "p_adjusted",
    "effect_divergence",
    "effect_acf",
)
_BULKY = ("audit", "lineage", "settings", "candidates")


def _light_check(check: Mapping[str, Any]) -> dict:
    """A check's headline numbers, and of its gate only the deciding partition's kind."""
    out = {f: check.get(f) for f in _CHECK_FIELDS if f in check}
    deciding = (check.get("gate") or {}).get("deciding") or {}
    if "gate" in check:
        out["gate"] = {"deciding": {"kind": deciding["kind"]} if "kind" in deciding else {}}
    return out


def light_record(record: Mapping[str, Any]) -> dict:
    """A model record without its bulky parts: everything but ``lineage``, ``settings`` and
    ``candidates``, and of ``audit`` only each check's headline numbers (:data:`_CHECK_FIELDS`).

    Enough for :func:`fitaudit.tasks.results.results_summary`, :func:`parquet_row`, the run page
    and the events, at a few per cent of the record's size; the full record goes to
    ``results.json`` and the model's page as soon as it is made.
    """
    out = {k: v for k, v in record.items() if k not in _BULKY}
    audit = record.get("audit")
    if audit is not None:
        audit = {
            kind: None if audit.get(kind) is None else _light_check(audit[kind]) for kind in ("production", "refit")
        }
    out["audit"] = audit
    return out


@dataclass(frozen=True)
class StagedRecord:
    """One model's record and page, made and waiting in the run's work folder.

    ``light`` is :func:`light_record` of the record; the record's canonical JSON is ``length``
    bytes at ``offset`` of the file ``part``; ``page`` is its rendered page.
    """

    light: dict
    part: str
    offset: int
    length: int
    page: str


def stage_records(
    records: Iterable[Mapping[str, Any]],
    head: Mapping[str, Any],
    meta: Mapping[str, Any],
    folder: str | os.PathLike,
    name: str,
) -> list[StagedRecord]:
    """Write each record's canonical JSON to ``<folder>/<name>.json`` and its model page to
    ``<folder>/models/``; return the :class:`StagedRecord` of each, in order.

    ``head`` is :func:`~fitaudit.tasks.results.results_head`; ``meta`` as for
    :func:`~fitaudit.tasks.report.render_run`.  One record is in memory at a time.
    """
    from .report import page_context, render_model_page

    folder = pathlib.Path(folder)
    (folder / "models").mkdir(parents=True, exist_ok=True)
    context = page_context(head, meta)
    as_of = head["run"]["as_of"]
    part = folder / f"{name}.json"
    staged, offset = [], 0
    with open(part, "wb") as fh:
        for rec in records:
            data = canonical_json(rec, str_keys=True)  # records hold string keys only (test)
            fh.write(data)
            page = folder / "models" / f"{rec['safe_id']}.html"
            page.write_bytes(render_model_page(rec, context, as_of))
            staged.append(StagedRecord(light_record(rec), str(part), offset, len(data), str(page)))
            offset += len(data)
    return staged


def render_parcels(
    final: Sequence[Outcome], batches: Sequence[Sequence[Outcome]], batch_paths: Sequence[str]
) -> tuple[list[bytes], list[str], list[str | None]]:
    """Per batch: its final (light) outcomes pickled, a part name and the file of its full outcomes,
    the inputs of one :func:`render_outcomes` call each.

    ``batches`` are the batch tasks' outcome lists plus the rejected entries' last, ``batch_paths``
    the staged batch files; ``final`` keeps their order.  Pickled, because Prefect walks lists of
    dataclasses among task inputs and prefect-dask reshapes ``quote``-wrapped ones; bytes pass
    through both untouched.
    """
    parcels, names, spills, start = [], [], [], 0
    for i, batch in enumerate(batches):
        if batch:
            batch_path = batch_paths[i] if i < len(batch_paths) else None
            parcels.append(pickle.dumps(list(final[start : start + len(batch)]), protocol=pickle.HIGHEST_PROTOCOL))
            names.append(pathlib.Path(batch_path).name if batch_path else "rejected")
            spills.append(spill_path(batch_path) if batch_path else None)
        start += len(batch)
    return parcels, names, spills


def render_outcomes(
    outcomes: Sequence[Outcome],
    head: Mapping[str, Any],
    meta: Mapping[str, Any],
    folder: str,
    name: str,
    spilled: str | None = None,
) -> list[StagedRecord]:
    """Records of a batch's final outcomes (:func:`records`), staged with :func:`stage_records`.
    With ``spilled``, ``outcomes`` are light and the full ones are read back from that file first
    (:func:`restore_outcomes`)."""
    if spilled is not None:
        outcomes = restore_outcomes(outcomes, spilled)
    return stage_records(records(outcomes, head["run"]["as_of"]), head, meta, folder, name)


def render_pickled(
    parcel: bytes, head: Mapping[str, Any], meta: Mapping[str, Any], folder: str, name: str, spilled: str | None
) -> list[StagedRecord]:
    """:func:`render_outcomes` of a pickled parcel (:func:`render_parcels`): the function the render
    task hands to a local worker process (:func:`fitaudit.tasks.workers.run_local`), which then
    imports this module and the report's, never Prefect or pyarrow."""
    return render_outcomes(pickle.loads(parcel), head, meta, folder, name, spilled)


def staged_bytes(staged: Sequence[StagedRecord]) -> Iterator[bytes]:
    """The canonical JSON of each staged record, in order, read back from the work folder."""
    handles: dict[str, Any] = {}
    try:
        for item in staged:
            fh = handles.get(item.part)
            if fh is None:
                fh = handles[item.part] = open(item.part, "rb")
            fh.seek(item.offset)
            yield fh.read(item.length)
    finally:
        for fh in handles.values():
            fh.close()


# --------------------------------------------------------------------------------------------
# 7-8: the parquet row and the history row


def _num(x: Any) -> float | None:
    if x is None:
        return None
    if isinstance(x, str):
        return float(x) if x in ("inf", "-inf", "nan") else None
    return float(x)


def parquet_row(record: Mapping[str, Any], as_of: str) -> dict:
    """One row of ``results.parquet``: a record's (or light record's) headline numbers, flat."""
    audit = record.get("audit") or {}
    row = {
        "as_of": as_of,
        "model_id": record["id"],
        "owner": record.get("owner"),
        "tier": record.get("tier"),
        "spec": record.get("spec_text"),
        "verdict": record["verdict"],
        "movement": record["movement"],
        "escalated": record["escalated"],
        "reason": record["reasons"][0] if record["reasons"] else "",
    }
    for kind in ("production", "refit"):
        chk = audit.get(kind) or {}
        ok = chk.get("status") == "ok"
        row[f"{kind}_status"] = chk.get("status")
        row[f"{kind}_partition"] = ((chk.get("gate") or {}).get("deciding") or {}).get("kind") if ok else None
        for name in _CHECK_FIELDS[1:]:  # the numbers (status is above)
            row[f"{kind}_{name}"] = _num(chk.get(name)) if ok else None
    return row


def results_rows(doc: Mapping[str, Any]) -> list[dict]:
    """Flat rows (one per model, :func:`parquet_row`) of a results document, for ``results.parquet``."""
    as_of = doc["run"]["as_of"]
    return [parquet_row(m, as_of) for m in doc["models"]]


def parquet_bytes(rows: Sequence[Mapping[str, Any]]) -> bytes:
    """``results.parquet`` of the rows (zstd; a table with only ``model_id`` when there are none)."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_pylist(list(rows)) if rows else pa.table({"model_id": pa.array([], pa.string())})
    buf = io.BytesIO()
    pq.write_table(table, buf, compression="zstd")
    return buf.getvalue()


#: The columns of an earlier run's ``results.parquet`` that :func:`history_row` reads.
HISTORY_COLUMNS = ["model_id", "verdict", "production_r_max", "refit_r_max", "production_p_value", "refit_p_value"]


def history_row(row: Mapping[str, Any], as_of: str, run_id: str) -> dict:
    """One earlier audit of a model from its parquet row in run ``run_id`` (as of ``as_of``):
    ``{"as_of", "verdict", "r_max", "p_value", "run_id"}``, the production check's numbers when it
    ran, else the refit check's."""
    use_prod = row.get("production_r_max") is not None
    return {
        "as_of": as_of,
        "verdict": row["verdict"],
        "r_max": row["production_r_max"] if use_prod else row.get("refit_r_max"),
        "p_value": row["production_p_value"] if use_prod else row.get("refit_p_value"),
        "run_id": run_id,
    }
