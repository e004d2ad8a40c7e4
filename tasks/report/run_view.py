"""The run page's view (``index.html``): summary counts and the expected false flags, the
exceptions with their actions, passes to watch, the fleet's trend, movement and every model's
status over its last audits."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from fitaudit.core.exceptions import InputError
from fitaudit.core.verdict import CAUTION_PREFIX
from fitaudit.core.vocabulary import ADJUSTMENT_LABELS

from ..outcomes import SEVERITY
from ..registry import SAFE_ID
from .charts import Scale, new_chart
from .labels import MOVEMENT, STATUS, status_view
from .text import SHORT_TEXT, coord, format_number, to_float, user_text
from .views import check_ran, days_to_act, deciding_check, model_link, record_action

_HISTORY_CELLS = 8
_STALE_MODELS_SHOWN = 5  # model ids named per stale source; the exceptions table lists them all


def _check_models(models: Sequence[Mapping[str, Any]]) -> None:
    seen: dict[str, str] = {}
    for k, m in enumerate(models):
        safe = m.get("safe_id")
        if not isinstance(safe, str) or not SAFE_ID.match(safe):
            raise InputError(
                f"render_run: model #{k} (id {str(m.get('id'))[:80]!r}) has safe_id {str(safe)[:80]!r}, "
                f"which is not a safe file name (pattern {SAFE_ID.pattern}); build the record with "
                "fitaudit.tasks.outcomes.model_record from the registry's safe_id"
            )
        if safe.lower() in seen:
            raise InputError(
                f"render_run: models {seen[safe.lower()]!r} and {str(m.get('id'))[:80]!r} share the file name "
                f"{safe!r} (case-insensitively); safe ids must be unique"
            )
        if m.get("verdict") not in STATUS:
            raise InputError(
                f"render_run: model {str(m.get('id'))[:80]!r} has verdict {m.get('verdict')!r}; "
                f"expected one of {', '.join(STATUS)}"
            )
        seen[safe.lower()] = str(m.get("id"))[:80]


def _summary_view(doc: Mapping[str, Any]) -> dict:
    s = doc["summary"]
    counts = [{"key": v, "status": status_view(v), "value": s[v]} for v in STATUS]
    total = sum(c["value"] for c in counts)
    registered = s["registered"]
    width = 640.0
    segments, x0 = [], 0.0
    for c in counts:
        if c["value"] and registered:
            w = width * c["value"] / registered
            segments.append({"x": x0, "w": w, "cls": f"f-{c['key']}", "key": c["key"]})
            x0 += w
    adj = s.get("adjustment") or {}
    method = ADJUSTMENT_LABELS.get(adj.get("method"), user_text(adj.get("method")))
    bar = new_chart(
        "summary-bar",
        width,
        28.0,
        "Verdicts of the registered models",
        "Share of each verdict among the registered models: "
        + "; ".join(f"{c['status']['word']} {c['value']}" for c in counts)
        + ".",
    )
    bar["cls"] = "stack"
    for seg in segments:
        bar["rects"].append({"x": seg["x"], "y": 2.0, "w": max(seg["w"] - 1.5, 0.5), "h": 24.0, "cls": seg["cls"]})
    return {
        "false_flags": _false_flag_sentence(
            s["checks"],
            to_float(s.get("expected_false_flags_unadjusted")),
            to_float(adj.get("level")),
            adj.get("method"),
            method,
            to_float(adj.get("q")),
        ),
        "counts": counts,
        "registered": registered,
        "audited": s["audited"],
        "reconciles": total == registered,
        "checks": s["checks"],
        "expected_false_flags": to_float(s.get("expected_false_flags_unadjusted")),
        "level": to_float(adj.get("level")),
        "method": method,
        "method_key": adj.get("method"),
        "q": to_float(adj.get("q")),
        "bar": bar,
    }


def _false_flag_sentence(
    checks: int, expected: float | None, level: float | None, key: str | None, method: str, q: float | None
) -> str:
    """The expected number of false flags if every model were healthy, and what the adjustment does."""
    text = (
        f"This run scored {checks} checks (the production and refit checks that ran). If every model were healthy, "
        f"about {format_number(expected)} of them would still fail at the {format_number(level)} level "
        "before any adjustment."
    )
    if key in ("bh", "by"):
        text += (
            f" Verdicts use p-values adjusted across the run with the {method} procedure at q = {format_number(q)}, "
            "which keeps the expected share of false flags among the flagged checks at or below "
            f"{format_number(None if q is None else 100 * q)} %"
            + (
                ", whatever the dependence between the tests."
                if key == "by"
                else " (for independent or positively dependent tests)."
            )
        )
    elif key == "bonferroni":
        text += (
            f" Verdicts use Bonferroni-adjusted p-values at {format_number(q)}, which keeps the chance of any "
            f"false flag in the run at or below {format_number(q)}."
        )
    else:
        text += (
            " Verdicts use unadjusted p-values, so about that many false flags are to be expected among the exceptions."
        )
    return text


def _tier_legend(policy: Mapping[str, Any] | None) -> str:
    days = days_to_act(policy)
    return (
        "Tier is the model's materiality under the policy, from 1 (most material) to 3. The owner has "
        f"{days.tier_1} days to act on an exception of a tier-1 model, {days.tier_2} of tier 2 "
        f"and {days.tier_3} of tier 3, "
        "counted from the as-of date; an entry the registry rejected (no tier) gets the shortest."
    )


def _exceptions_view(
    models: Sequence[Mapping[str, Any]], policy: Mapping[str, Any] | None = None, as_of: str = ""
) -> list[dict]:
    rows = []
    for m in sorted(
        (m for m in models if m["verdict"] != "pass"),
        key=lambda m: (m.get("severity", SEVERITY[m["verdict"]]), m["id"]),
    ):
        exc = m.get("exception") or {}
        action = record_action(m, policy, as_of) if as_of else {"action": "", "due": None}
        rows.append(
            {
                "action": user_text(action["action"]),
                "due": user_text(action["due"]) or None,
                "link": model_link(m),
                "status": status_view(m["verdict"]),
                "owner": user_text(m.get("owner"), SHORT_TEXT),
                "tier": user_text(m.get("tier")),
                "since": user_text(exc.get("first_seen")),
                "consecutive": exc.get("consecutive"),
                "movement": MOVEMENT.get(m.get("movement"), user_text(m.get("movement"))),
                "escalated": bool(m.get("escalated")),
                "reason": user_text(m["reasons"][0], 600) if m.get("reasons") else "No reason was recorded.",
            }
        )
    return rows


def _watch_view(models: Sequence[Mapping[str, Any]]) -> list[dict]:
    """Passing models whose reasons carry a caution (a narrow pass, strong reported-only diagnostics)."""
    rows = []
    for m in models:
        notes = [str(r) for r in m.get("reasons") or () if str(r).startswith(CAUTION_PREFIX)]
        if m["verdict"] == "pass" and notes:
            rows.append(
                {
                    "link": model_link(m),
                    "owner": user_text(m.get("owner"), SHORT_TEXT),
                    "notes": [user_text(n, 600) for n in notes],
                }
            )
    return rows


def _trend_view(trend: Sequence[Mapping[str, Any]], summary: Mapping[str, Any], as_of: str) -> dict | None:
    """The share of passing models at the last audits and now, as one line of text and a small chart."""
    registered = summary.get("registered") or 0
    points = [dict(t) for t in trend] + (
        [{"as_of": as_of, "passed": summary.get("pass", 0), "registered": registered}] if registered else []
    )
    if len(points) < 2:
        return None
    for p in points:
        p["share"] = 100.0 * p["passed"] / p["registered"]
    text = " → ".join(f"{p['as_of']} {p['share']:.0f} %" for p in points)
    width, height, pad = 180.0, 28.0, 4.0
    x = Scale(0, len(points) - 1, pad, width - pad)
    y = Scale(0.0, 100.0, height - pad, pad)
    chart = new_chart(
        "fleet-trend",
        width,
        height,
        "Share of passing models over the last audits",
        "Share of the registered models that passed, per audit: "
        + "; ".join(f"{p['as_of']}: {p['passed']} of {p['registered']} ({p['share']:.0f} %)" for p in points)
        + ".",
    )
    chart["cls"] = "spark"
    chart["lines"].append({"x1": pad, "y1": y(100.0), "x2": width - pad, "y2": y(100.0), "cls": "gl"})
    chart["polylines"].append(
        {"points": " ".join(f"{coord(x(k))},{coord(y(p['share']))}" for k, p in enumerate(points)), "cls": "line"}
    )
    chart["circles"].extend({"cx": x(k), "cy": y(p["share"]), "r": 2.2, "cls": "pt"} for k, p in enumerate(points))
    first, last = points[0], points[-1]
    change = last["share"] - first["share"]
    direction = (
        "unchanged" if abs(change) < 0.5 else f"{'up' if change > 0 else 'down'} {abs(change):.0f} percentage points"
    )
    return {"text": text, "chart": chart, "summary": f"{direction} since {first['as_of']}", "count": len(points)}


def _scope_view(meta: Mapping[str, Any], summary: Mapping[str, Any]) -> str | None:
    """A sentence when p-values were adjusted over a partial run (some models only, or unreadable sources)."""
    scope = meta.get("scope") or {}
    requested, total, unreadable = (
        scope.get("models_requested"),
        scope.get("registry_models"),
        list(scope.get("unreadable_sources") or ()),
    )
    if not requested and not unreadable:
        return None
    parts = []
    if requested:
        parts.append(
            f"only {requested} of the registry's {total} models were audited (--models)"
            if total
            else f"only {requested} models were audited (--models)"
        )
    if unreadable:
        parts.append(
            "the models of the source(s) "
            + ", ".join(user_text(u, 80) for u in unreadable)
            + " have no checks, because the sources could not be read"
        )
    return (
        f"This is a partial run: {' and '.join(parts)}. The p-values were adjusted over the "
        f"{summary.get('checks', 0)} checks that ran, "
        "not over a full run's, so the same model can pass in the full run and be flagged in this one (or the reverse)."
    )


def _history_problems_view(meta: Mapping[str, Any]) -> list[str]:
    """One sentence per earlier audit run whose results could not be used as history."""
    out = []
    for p in meta.get("history_problems") or ():
        if isinstance(p, Mapping):
            out.append(
                f"The audit of {user_text(p.get('as_of'), 40)} (run {user_text(p.get('run_id'), 80)}) "
                "was left out of the models' "
                f"history: {user_text(p.get('problem'), 300)}"
            )
    return out


def _stale_sources_view(meta: Mapping[str, Any]) -> list[str]:
    """One sentence per source whose last observation was too old to audit its models (listed once,
    however many of its models it made insufficient)."""
    out = []
    stale = meta.get("stale_sources") or {}
    for name in sorted(stale):
        s = stale[name]
        if not isinstance(s, Mapping):
            continue
        models = [user_text(m, 80) for m in s.get("models") or ()]
        shown = ", ".join(models[:_STALE_MODELS_SHOWN]) + (
            f" and {len(models) - _STALE_MODELS_SHOWN} more" if len(models) > _STALE_MODELS_SHOWN else ""
        )
        last = user_text(str(s["last"])[:10], 40) if s.get("last") else "unknown"  # the date of a UTC timestamp
        out.append(
            f"Source {user_text(name, 80)} ({user_text(s.get('uri'), 200)}) was last observed on {last}, more than "
            f"{user_text(s.get('allowed'), 10)} period(s) of frequency {user_text(s.get('frequency'), 10)} before the "
            f"as-of date {user_text(s.get('as_of'), 20)}: {len(models)} model(s) had no recent data to audit "
            f"({shown}). Refresh the extract, or raise the source's max_staleness or the policy's max_staleness_days "
            "if the delay is expected."
        )
    return out


def _movement_view(doc: Mapping[str, Any], models: Sequence[Mapping[str, Any]]) -> dict:
    moves = doc["summary"].get("movement") or {}
    groups = []
    for key in ("new", "persisting", "resolved"):
        members = [dict(model_link(m), status=status_view(m["verdict"])) for m in models if m.get("movement") == key]
        groups.append({"key": key, "label": MOVEMENT[key], "count": moves.get(key, len(members)), "models": members})
    return {"groups": groups, "steady": moves.get("steady", 0), "first": moves.get("first", 0)}


def _status_row(m: Mapping[str, Any], as_of: str) -> dict:
    past = [h for h in (m.get("history") or []) if h.get("verdict") in STATUS][-(_HISTORY_CELLS - 1) :]
    cells = [None] * (_HISTORY_CELLS - 1 - len(past))
    cells += [{"status": status_view(h["verdict"]), "as_of": user_text(h.get("as_of"))} for h in past]
    cells.append({"status": status_view(m["verdict"]), "as_of": user_text(as_of)})
    check = deciding_check(m.get("audit"))
    ok = check_ran(check)
    return {
        "link": model_link(m),
        "owner": user_text(m.get("owner"), 60),
        "status": status_view(m["verdict"]),
        "movement": MOVEMENT.get(m.get("movement"), user_text(m.get("movement"))),
        "cells": cells,
        "r_max": check.get("r_max") if ok else None,
        "p_value": check.get("p_value") if ok else None,
        "p_adjusted": check.get("p_adjusted") if ok else None,
    }


def index_view(doc: Mapping[str, Any], context: Mapping[str, Any]) -> dict:
    """What ``index.html`` receives: ``context`` (:func:`~fitaudit.tasks.report.views.page_context`)
    with the summary, scope, exceptions, watch list, trend, movement and one status row per model.

    Raises
    ------
    InputError
        When a model's ``safe_id`` is not a safe, unique file name or its verdict is unknown.
    """
    models = doc["models"]
    _check_models(models)
    as_of = context["as_of"]
    return {
        **context,
        "root": "",
        "summary": _summary_view(doc),
        "scope": _scope_view(context["meta"], doc["summary"]),
        "history_problems": _history_problems_view(context["meta"]),
        "stale_sources": _stale_sources_view(context["meta"]),
        "exceptions": _exceptions_view(models, doc["run"].get("policy"), as_of),
        "tier_legend": _tier_legend(doc["run"].get("policy")),
        "watch": _watch_view(models),
        "trend": _trend_view(context["meta"]["fleet_trend"], doc["summary"], as_of),
        "movement": _movement_view(doc, models),
        "rows": [_status_row(m, as_of) for m in models],
        "history_cells": _HISTORY_CELLS,
    }
