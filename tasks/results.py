"""The results document: the machine-readable twin of the report (``results.json``).

One document per audit run, schema-versioned, deterministic (no run id, no clock times, no
timings: those live in the manifest) so that the same registry, extract, as-of date and seed give
byte-identical files.  The HTML report is rendered from exactly this document plus the run's
metadata, and ``results.parquet`` holds one row per model with the same numbers.

Schema (version 1)::

    {"schema": "fitaudit.results", "schema_version": 1,
     "run": {"as_of", "registry": {"path", "sha256"}, "policy": {...}, "tool_version"},
     "summary": {"registered", "audited", "pass", "refit", "respecify", "insufficient", "error",
                 "checks", "expected_false_flags_unadjusted", "adjustment", "movement": {...}},
     "models": [{"id", "safe_id", "owner", "tier", "description", "source", "series",
                 "spec", "spec_text", "noise", "verdict", "severity", "reasons", "escalated",
                 "movement", "exception": {"first_seen", "consecutive"} | null,
                 "production_version": {"version", "sha256", "created_at"} | null,
                 "lineage": {...}, "settings": {...}, "audit": AuditResult.to_dict() | null,
                 "history": [{"as_of", "verdict", "r_max", "p_value"}, ...],
                 "candidates": [...] | null,
                 "forecasts": {...}  (forecast entries only: the statement audited)}, ...]}

A forecast entry (forecasts made elsewhere, :class:`~fitaudit.tasks.registry.ForecastEntry`) has
``spec`` ``{}``, ``spec_text`` like ``forecasts (quantiles 0.05..0.95), 1-step``, ``audit.refit``
null (fitaudit refits nothing) and ``audit.accuracy`` (MASE, CRPS and its skill; reported, never
a verdict); ``results.parquet`` gives it null ``refit_*`` columns.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping, Sequence
from typing import Any

from fitaudit.core.vocabulary import ADJUDICATED_VERDICTS, VERDICTS

__all__ = [
    "SCHEMA",
    "SCHEMA_VERSION",
    "SEVERITY",
    "model_record",
    "build_results",
    "results_head",
    "results_summary",
    "light_record",
    "is_forecast_record",
    "results_json_chunks",
    "results_rows",
    "movement",
]

SCHEMA = "fitaudit.results"
SCHEMA_VERSION = 1
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


def is_forecast_record(record: Mapping[str, Any]) -> bool:
    """Whether a record (or its :func:`light_record` view) is a forecast entry's: forecasts made
    elsewhere, audited against their stated uncertainty and never refitted by fitaudit."""
    return record.get("forecasts") is not None


def results_head(*, as_of: str, registry: Mapping[str, Any], policy: Mapping[str, Any], tool_version: str) -> dict:
    """The document without ``summary`` and ``models``: schema, version and the run's description."""
    return {
        "schema": SCHEMA,
        "schema_version": SCHEMA_VERSION,
        "run": {
            "as_of": as_of,
            "registry": {"path": registry.get("path"), "sha256": registry.get("sha256")},
            "policy": dict(policy),
            "tool_version": tool_version,
        },
    }


def results_summary(models: Iterable[Mapping[str, Any]], policy: Mapping[str, Any]) -> dict:
    """The document's ``summary``: counts per verdict, checks that ran, expected false flags, movement.

    ``models`` are the records (or their :func:`light_record` views).  ``registered`` equals the
    sum of the five verdict counts by construction: every registry entry, accepted or rejected,
    has exactly one record.
    """
    models = list(models)
    counts = {v: sum(1 for m in models if m["verdict"] == v) for v in VERDICTS}
    checks = 0
    for m in models:
        audit = m.get("audit") or {}
        for kind in ("production", "refit"):
            chk = audit.get(kind)
            if chk and chk.get("status") == "ok":
                checks += 1
    level = float(policy.get("level", 0.05))
    moves = {
        k: sum(1 for m in models if m["movement"] == k) for k in ("new", "persisting", "resolved", "steady", "first")
    }
    summary = {
        "registered": len(models),
        "audited": sum(counts[v] for v in ADJUDICATED_VERDICTS),
        **counts,
        "checks": checks,
        "expected_false_flags_unadjusted": checks * level,
        "adjustment": {
            "method": policy.get("multiple_testing", "bh"),
            "q": policy.get("fdr_q"),
            "level": level,
        },
        "movement": moves,
    }
    if summary["registered"] != sum(counts.values()):
        raise AssertionError("results document does not reconcile: registered != sum of verdicts")
    return summary


def build_results(
    *,
    as_of: str,
    registry: Mapping[str, Any],
    policy: Mapping[str, Any],
    records: Iterable[Mapping[str, Any]],
    tool_version: str,
) -> dict:
    """Assemble the results document; models sorted by id, summary counts reconciled
    (:func:`results_summary`)."""
    models = sorted((dict(r) for r in records), key=lambda r: r["id"])
    head = results_head(as_of=as_of, registry=registry, policy=policy, tool_version=tool_version)
    return {**head, "summary": results_summary(models, policy), "models": models}


#: Per-check numbers kept by :func:`light_record` (those of :func:`results_rows`, the report's run
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

    Enough for :func:`results_summary`, :func:`results_rows`, the run page and the events, at a
    few per cent of the record's size; the full record goes to ``results.json`` and the model's
    page as soon as it is made.
    """
    out = {k: v for k, v in record.items() if k not in _BULKY}
    audit = record.get("audit")
    if audit is not None:
        audit = {
            kind: None if audit.get(kind) is None else _light_check(audit[kind]) for kind in ("production", "refit")
        }
    out["audit"] = audit
    return out


def results_json_chunks(
    head: Mapping[str, Any], summary: Mapping[str, Any], records: Iterable[bytes]
) -> Iterator[bytes]:
    """``canonical_json`` of the document, in pieces, from the models' records already in canonical JSON.

    The bytes joined equal ``canonical_json(doc)`` of the document with those models (in that
    order): keys are sorted at every level, so the document is its other fields around the
    ``"models"`` list, and each element of the list is the canonical JSON of its record.
    """
    from ._io import canonical_json

    shell = canonical_json({**head, "summary": summary, "models": []})
    marker = b'"models":['
    cut = shell.index(marker + b"]") + len(marker)
    yield shell[:cut]
    for i, rec in enumerate(records):
        yield rec if i == 0 else b"," + rec
    yield shell[cut:]


def _num(x: Any) -> float | None:
    if x is None:
        return None
    if isinstance(x, str):
        return float(x) if x in ("inf", "-inf", "nan") else None
    return float(x)


def results_rows(doc: Mapping[str, Any]) -> list[dict]:
    """Flat rows (one per model) with the headline numbers, for ``results.parquet``."""
    rows = []
    as_of = doc["run"]["as_of"]
    for m in doc["models"]:
        audit = m.get("audit") or {}
        row = {
            "as_of": as_of,
            "model_id": m["id"],
            "owner": m.get("owner"),
            "tier": m.get("tier"),
            "spec": m.get("spec_text"),
            "verdict": m["verdict"],
            "movement": m["movement"],
            "escalated": m["escalated"],
            "reason": m["reasons"][0] if m["reasons"] else "",
        }
        for kind in ("production", "refit"):
            chk = audit.get(kind) or {}
            ok = chk.get("status") == "ok"
            row[f"{kind}_status"] = chk.get("status")
            row[f"{kind}_partition"] = ((chk.get("gate") or {}).get("deciding") or {}).get("kind") if ok else None
            for field in _CHECK_FIELDS[1:]:  # the numbers (status is above)
                row[f"{kind}_{field}"] = _num(chk.get(field)) if ok else None
        rows.append(row)
    return rows
