"""View pieces shared by the report's pages, and the views of the pages beside the run page.

:func:`page_context` (what every page of a run shows: run metadata, as-of date, registry), links
to model pages, the owner's action and deadline (:func:`record_action`), the method page's view
and the archive index's view.  Views are plain dictionaries; templates only format them.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

from fitaudit.core.exceptions import InputError
from fitaudit.core.verdict import CAUTION_PREFIX, owner_action

from ..outcomes import is_forecast_record
from ..registry import SAFE_ID
from ..registry.schema import DaysToAct
from .charts import HEAT_SCALE_WORDS, heat_legend
from .labels import CAUTION, FORECAST_ACTIONS, SETTING_LABELS, STATUS, labelled_rows, status_view
from .text import SHORT_TEXT, user_text

_REQUIRED_META = ("run_id", "started_utc", "finished_utc", "operator", "tool_version", "prefect_version")
#: Shown for ``code_commit`` when the run's fitaudit is an installed package rather than a git checkout.
NO_COMMIT = "none recorded (an installed package, not a git checkout)"


def deciding_check(audit: Mapping[str, Any] | None) -> Mapping[str, Any] | None:
    """The check whose outcome decides the verdict: production when present, else refit."""
    if not audit:
        return None
    return audit.get("production") if audit.get("production") is not None else audit.get("refit")


def check_ran(check: Mapping[str, Any] | None) -> bool:
    return bool(check) and check.get("status") == "ok"


def meta_view(meta: Mapping[str, Any]) -> dict:
    if not isinstance(meta, Mapping):
        raise InputError(f"render_run: meta must be a dict of run metadata; got {type(meta).__name__}")
    missing = [k for k in _REQUIRED_META if meta.get(k) in (None, "")]
    if missing:
        raise InputError(
            f"render_run: meta lacks {', '.join(missing)}; pass every one of {', '.join(_REQUIRED_META)} "
            "(code_commit, archive_head and previous_run_id are optional)"
        )
    view = {k: user_text(meta[k], SHORT_TEXT) for k in _REQUIRED_META}
    view["code_commit"] = user_text(meta.get("code_commit"), SHORT_TEXT) or NO_COMMIT
    view["archive_head"] = user_text(meta.get("archive_head")) or None
    view["previous_run_id"] = user_text(meta.get("previous_run_id")) or None
    view["previous_as_of"] = user_text(meta.get("previous_as_of")) or None
    scope = meta.get("scope") if isinstance(meta.get("scope"), Mapping) else {}
    view["scope"] = {
        "models_requested": scope.get("models_requested") if isinstance(scope.get("models_requested"), int) else None,
        "registry_models": scope.get("registry_models") if isinstance(scope.get("registry_models"), int) else None,
        "unreadable_sources": [str(u) for u in scope.get("unreadable_sources") or ()],
    }
    view["fleet_trend"] = [
        {"as_of": user_text(t.get("as_of")), "passed": int(t["passed"]), "registered": int(t["registered"])}
        for t in meta.get("fleet_trend") or ()
        if isinstance(t, Mapping)
        and isinstance(t.get("passed"), int)
        and isinstance(t.get("registered"), int)
        and t["registered"] > 0
    ]
    view["history_problems"] = [
        {k: user_text(p.get(k)) for k in ("run_id", "as_of", "problem")}
        for p in meta.get("history_problems") or ()
        if isinstance(p, Mapping)
    ]
    stale = meta.get("stale_sources") if isinstance(meta.get("stale_sources"), Mapping) else {}
    view["stale_sources"] = {str(name): dict(s) for name, s in stale.items() if isinstance(s, Mapping)}
    return view


def model_link(m: Mapping[str, Any], prefix: str = "models/") -> dict:
    return {"id": user_text(m["id"], SHORT_TEXT), "href": f"{prefix}{m['safe_id']}.html", "safe_id": m["safe_id"]}


def days_to_act(policy: Mapping[str, Any] | None) -> DaysToAct:
    """The policy's days to act per tier (the schema's defaults for a policy written without them)."""
    given = (policy or {}).get("days_to_act")
    try:
        return DaysToAct.model_validate(dict(given)) if isinstance(given, Mapping) else DaysToAct()
    except ValueError:
        return DaysToAct()


def record_action(m: Mapping[str, Any], policy: Mapping[str, Any] | None, as_of: str) -> dict:
    """What the owner of a model record should do, and by when (:func:`fitaudit.core.verdict.owner_action`).

    The deadline is the as-of date plus the policy's days to act for the model's tier; a refit
    whose check passes with a caution (narrow, or strong reported-only diagnostics) asks for a
    review before approval.  Forecasts made elsewhere (:data:`FORECAST_ACTIONS`) are re-estimated by
    their owner: fitaudit refitted nothing to approve.
    """
    policy = policy or {}
    action = owner_action(
        m["verdict"],
        escalated=bool(m.get("escalated")),
        as_of=as_of,
        days=days_to_act(policy).for_tier(m.get("tier")),
        refit_policy=str(policy.get("refit_policy", "approval")),
        refittable=not is_forecast_record(m),
    )
    if is_forecast_record(m) and m["verdict"] in FORECAST_ACTIONS:  # forecasts made elsewhere: nothing was refitted
        return {**action, "action": FORECAST_ACTIONS[m["verdict"]]}
    if m["verdict"] == "refit" and any(str(r).startswith(CAUTION_PREFIX) for r in m.get("reasons") or ()):
        action["action"] += " The refit check passes with a caution (see the reasons): review it before approving."
    return action


def page_context(doc: Mapping[str, Any], meta: Mapping[str, Any]) -> dict:
    """What every page of a run shows besides its own content: run metadata, as-of date, registry.

    ``doc`` needs only the document's ``schema``, ``schema_version`` and ``run`` (see
    :func:`render_run`; :func:`fitaudit.tasks.results.results_head`).

    Raises
    ------
    InputError
        When ``meta`` lacks a field.
    """
    return {
        "meta": meta_view(meta),
        "as_of": user_text(doc["run"]["as_of"]),
        "caution": CAUTION,
        "statuses": [status_view(v) for v in STATUS],
        "registry": {
            "path": user_text((doc["run"].get("registry") or {}).get("path")),
            "sha256": user_text((doc["run"].get("registry") or {}).get("sha256")),
        },
        "schema": f"{user_text(doc.get('schema'))} v{user_text(doc.get('schema_version'))}",
        "policy_doc": dict(doc["run"].get("policy") or {}),
    }


def method_view(doc: Mapping[str, Any], context: Mapping[str, Any]) -> dict:
    """What ``method.html`` receives: ``context`` with the run's policy in words and the heat-map legend."""
    return {
        **context,
        "root": "",
        "policy": labelled_rows(doc["run"].get("policy"), SETTING_LABELS),
        "heat_bins": heat_legend(),
        "heat_words": HEAT_SCALE_WORDS,
    }


def archive_view(runs: Iterable[Mapping[str, Any]]) -> dict:
    """What the archive's ``index.html`` receives: one row per run, newest first
    (:func:`~fitaudit.tasks.report.render.render_archive_index` describes the rows)."""
    rows = []
    for r in sorted(runs, key=lambda r: r.get("seq") or 0, reverse=True):
        path = str(r.get("path") or "")
        parts = path.split("/")
        linkable = (
            len(parts) == 3
            and parts[0] == "runs"
            and len(parts[1]) == 4
            and parts[1].isdigit()
            and bool(SAFE_ID.match(parts[2]))
            and not r.get("purged")
        )
        counts = r.get("counts") if isinstance(r.get("counts"), Mapping) else {}
        rows.append(
            {
                "run_id": user_text(r.get("run_id"), SHORT_TEXT),
                "href": f"{path}/index.html" if linkable else None,
                "as_of": user_text(r.get("as_of")),
                "time": user_text(r.get("time")),
                "registered": counts.get("registered"),
                "counts": [counts.get(v) for v in STATUS],
                "purged": bool(r.get("purged")),
                "signoffs": [
                    f"{user_text(s.get('name'), 80)} ({user_text(s.get('role'), 80)}, {user_text(s.get('time'))})"
                    for s in r.get("signoffs") or []
                ],
                "manifest": user_text(r.get("manifest_sha256"))[:16],
            }
        )
    return {"runs": rows, "caution": CAUTION, "statuses": [status_view(v) for v in STATUS], "root": ""}
