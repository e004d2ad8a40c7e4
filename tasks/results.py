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
                 "history": [{"as_of", "verdict", "r_max", "p_value", "run_id"}, ...],
                 "candidates": [...] | null,
                 "forecasts": {...}  (forecast entries only: the statement audited)}, ...]}

A forecast entry (forecasts made elsewhere, :class:`~fitaudit.tasks.registry.ForecastEntry`) has
``spec`` ``{}``, ``spec_text`` like ``forecasts (quantiles 0.05..0.95), 1-step``, ``audit.refit``
null (fitaudit refits nothing) and ``audit.accuracy`` (MASE, CRPS and its skill; reported, never
a verdict); ``results.parquet`` gives it null ``refit_*`` columns.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator, Mapping
from typing import Any

from fitaudit.core.vocabulary import ADJUDICATED_VERDICTS, VERDICTS

__all__ = [
    "SCHEMA",
    "SCHEMA_VERSION",
    "build_results",
    "results_head",
    "results_summary",
    "results_json_chunks",
]

SCHEMA = "fitaudit.results"
SCHEMA_VERSION = 1


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
