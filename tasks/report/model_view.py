"""A model page's view (``models/<safe_id>.html``): verdict, reasons and action, the two checks
side by side with their charts, parameters, change point, candidates, history, lineage and
settings; a forecast entry's page in place of the fitted model's where the model states forecasts."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from fitaudit.core.divergence import CLASSICAL_MEMBER_LABELS
from fitaudit.core.vocabulary import ADJUSTMENT_LABELS

from .charts import acf_plot, heatmap, histogram, history_chart, qq_plot
from .labels import (
    CANDIDATE_COLUMNS,
    LINEAGE_LABELS,
    MEMBER_POINTS,
    MOVEMENT,
    NOT_REFITTED_PAGE,
    SETTING_LABELS,
    STATUS,
    labelled_rows,
    member_label,
    status_view,
)
from .text import SHORT_TEXT, count_text, format_number, format_p, kv_rows, to_float, user_text, value_text
from .views import check_ran, deciding_check, record_action

_RESIDUAL_TYPE = {
    "production": "one-step forecast errors of the frozen production parameters over the audit window",
    "refit": "in-sample one-step innovations of the model re-estimated on the fit window",
}


def _rule_view(policy: Mapping[str, Any] | None) -> dict:
    """The run's decision rule in words: how p-values become verdicts under the policy."""
    policy = policy or {}
    method = policy.get("multiple_testing", "bh")
    q = to_float(policy.get("fdr_q"))
    return {
        "method": method,
        "label": ADJUSTMENT_LABELS.get(method, user_text(method)),
        "q": q,
        "adjusted": method != "none",
    }


def _floor_text(c: Mapping[str, Any]) -> str | None:
    cal = c.get("calibration") or {}
    b = cal.get("replicates")
    if cal.get("method") in ("simulated", "bootstrap") and isinstance(b, int) and b > 0:
        return f"p ≥ {format_number(1 / (b + 1))} (1 / ({b} + 1): the smallest possible with {b} simulations)"
    return None


def _p_with_floor(c: Mapping[str, Any]) -> str:
    p = to_float(c.get("p_distribution"))
    cal = c.get("calibration") or {}
    b = cal.get("replicates")
    if (
        p is not None
        and cal.get("method") in ("simulated", "bootstrap")
        and isinstance(b, int)
        and b > 0
        and p <= (1 / (b + 1)) * (1 + 1e-9)
    ):
        return f"{format_p(p)} (the smallest possible with {b} simulations: the true p-value may be smaller)"
    return format_p(p)


def _gate_threshold(c: Mapping[str, Any]) -> str:
    level = to_float(c.get("settings_level"))
    return (
        "n/a"
        if level is None
        else f"fails at p ≤ {format_number(level / 2)} (level {format_number(level)} split over the two gates)"
    )


def _plain_effects(c: Mapping[str, Any]) -> str:
    """The errors' sizes in plain units (production check)."""
    e = c.get("effects") or {}
    parts = []
    ratio = to_float(e.get("variance_ratio"))
    if ratio is not None:
        parts.append(
            f"errors {format_number(ratio, 2)} times as variable as the production model assumes (variance ratio)"
        )
    for sizes, when in ((e, ""), (e.get("since") or {}, (e.get("since") or {}).get("date"))):
        pct, sd = to_float(sizes.get("bias_pct")), to_float(sizes.get("bias_sd"))
        if pct is None and sd is None:
            continue
        since = f" since {user_text(when)}" if when else " over the window"
        if pct is not None:
            side = "high" if pct > 0 else "low"
            parts.append(
                f"forecasts {format_number(abs(pct), 2)} % too {side}{since}"
                + (f" ({format_number(abs(sd), 2)} standard deviations)" if sd is not None else "")
            )
        else:
            side = "high" if sd < 0 else "low"
            parts.append(f"forecasts {format_number(abs(sd), 2)} standard deviations too {side}{since}")
    return "; ".join(parts) or "n/a"


def _check_rows(
    production: Mapping[str, Any] | None, refit: Mapping[str, Any] | None, policy: Mapping[str, Any] | None = None
) -> list[dict]:
    """The side-by-side table of the two checks: one row per quantity, one cell per check."""
    checks = [production, refit]
    rule = _rule_view(policy)

    def cell(check, fn):
        if check is None:
            return "not run (no production version)"
        if not check_ran(check):
            return "—"
        try:
            return fn(check)
        except (KeyError, TypeError):
            return "n/a"

    def noise_text(c):
        noise = c.get("noise") or {}
        parts = [f"{k} {format_number(noise.get(k), 4)}" for k in ("loc", "scale", "shape") if noise.get(k) is not None]
        est = noise.get("estimated") or []
        return (
            f"{user_text(noise.get('law'))}: "
            + ", ".join(parts)
            + (f" (estimated: {', '.join(map(str, est))})" if est else " (fixed)")
        )

    def lb_text(d):
        return f"Q {format_number(d.get('statistic'))} on {d.get('lags')} lags, df {d.get('df')}"

    def gate_text(c):
        gate = c.get("gate") or {}
        members = ", ".join(member_label(a, b) for a, b in gate.get("members") or [])
        parts = ", ".join(f"{user_text(p.get('kind'))} ({p.get('cells')} cells)" for p in gate.get("partitions") or [])
        return f"{members} on {parts}" if members else "n/a"

    def deciding_text(c):
        d = (c.get("gate") or {}).get("deciding") or {}
        if not d:
            return "n/a"
        sentence = user_text(d.get("sentence"))
        return f"{sentence[:1].upper()}{sentence[1:]} ({user_text(d.get('kind'))} cells)"

    def partition_text(c):
        rows = (c.get("gate") or {}).get("partitions") or []
        return "; ".join(f"{user_text(p.get('kind'))} {format_number(p.get('standardised'))}" for p in rows) or "n/a"

    def window_text(c):
        w, e = c.get("window") or {}, c.get("effects") or {}
        if e.get("start") and e.get("end"):
            return f"{user_text(e['start'])} to {user_text(e['end'])} ({w.get('length', c.get('n'))} observations)"
        return (
            f"observations {w.get('first')}–{w.get('last')} of the series ({w.get('length')} observations)"
            if w
            else "n/a"
        )

    def reference_text(c):
        cal = c.get("calibration") or {}
        method, b = cal.get("method"), cal.get("replicates")
        law = user_text((c.get("noise") or {}).get("law"))
        if method == "simulated":
            how = (
                "with its noise parameters re-estimated in each"
                if c.get("kind") == "refit"
                else "with the frozen production parameters"
            )
            return f"{count_text(b)} simulated data sets of {c.get('n')} residuals from the {law} law, {how}"
        if method == "bootstrap":
            return f"{count_text(b)} parametric bootstrap series of the fitted model, each refitted and rescored"
        return f"chi-square({count_text(c.get('cells'))} − 1) limits (asymptotic screen)"

    def adjusted_text(c):
        if not rule["adjusted"]:
            return "not adjusted (the run's rule: each gate on its own level)"
        p = to_float(c.get("p_adjusted"))
        if p is None or rule["q"] is None:
            return format_p(p)
        verdict = "fails" if p <= rule["q"] else "passes"
        return (
            f"{format_p(p)} (the run's rule: the check fails at ≤ q = {format_number(rule['q'])}, "
            f"{rule['label']}; it {verdict})"
        )

    def status_text(c):
        if c is None:
            return "not run (no production version)"
        if c.get("status") == "ok":
            return "ran"
        return user_text(c.get("status", "n/a")) + (f": {user_text(c.get('message'))}" if c.get("message") else "")

    rows = [
        {"label": "Status", "key": "status", "cells": [status_text(c) for c in checks]},
        {
            "label": "Residual type",
            "key": "residual_type",
            "cells": [("—" if c is None else _RESIDUAL_TYPE.get(c.get("kind"), "n/a")) for c in checks],
        },
    ]
    specs = [
        ("Window", "window", window_text),
        (
            "In plain words",
            "plain",
            lambda c: (
                _plain_effects(c) if c.get("kind") == "production" else "residuals of the model refitted to these data"
            ),
        ),
        ("Residuals n", "n", lambda c: str(c["n"])),
        ("Cells s", "cells", lambda c: str(c["cells"])),
        ("Estimated noise parameters k", "k", lambda c: str(c["k"])),
        ("Noise law", "noise", noise_text),
        ("Calibration", "calibration", lambda c: user_text((c.get("calibration") or {}).get("method"))),
        ("Replicates", "replicates", lambda c: count_text((c.get("calibration") or {}).get("replicates"))),
        ("Null reference", "reference", reference_text),
        ("Distribution gate: members on partitions", "gate", gate_text),
        ("Largest statistic of the map T_max (equiprobable cells)", "t_max", lambda c: format_number(c.get("t_max"))),
        ("Standardised maximum R of the gate", "r_max", lambda c: format_number(c.get("r_max"))),
        ("Largest standardised value per partition", "partitions", partition_text),
        ("Cells that depart most", "deciding", deciding_text),
        (
            "Deciding point (α, β)",
            "argmax",
            lambda c: f"α {format_number(c.get('alpha_max'))}, β {format_number(c.get('beta_max'))}",
        ),
        (
            "T there / its critical value",
            "t_at_max",
            lambda c: f"{format_number(c.get('t_at_max'))} / {format_number(c.get('critical_value'))}",
        ),
        ("p, distribution gate", "p_distribution", _p_with_floor),
        (
            "Smallest possible p of the distribution gate",
            "floor",
            lambda c: _floor_text(c) or "none: the p-value is not simulated",
        ),
        ("Ljung-Box", "ljung_box", lambda c: lb_text(c.get("ljung_box") or {})),
        ("p, independence gate (Ljung-Box)", "p_independence", lambda c: format_p(c.get("p_independence"))),
        ("Threshold of each gate (unadjusted)", "gate_threshold", _gate_threshold),
        (
            "McLeod-Li (squared residuals, reported)",
            "mcleod_li",
            lambda c: lb_text(c.get("mcleod_li") or {}) + f", p {format_p((c.get('mcleod_li') or {}).get('p_value'))}",
        ),
        ("p, check (Bonferroni over the two gates)", "p_value", lambda c: format_p(c.get("p_value"))),
        ("p, adjusted across the run", "p_adjusted", adjusted_text),
        ("Effect: T_max / 2n", "effect_divergence", lambda c: format_number(c.get("effect_divergence"))),
        ("Effect: largest |autocorrelation|", "effect_acf", lambda c: format_number(c.get("effect_acf"))),
    ]
    for label, key, fn in specs:
        rows.append({"label": label, "key": key, "cells": [cell(c, fn) for c in checks]})
    return rows


def _members_rows(check: Mapping[str, Any]) -> list[dict]:
    rows = []
    for name, entry in (check.get("members") or {}).items():
        a, b = MEMBER_POINTS.get(name, (None, None))
        rows.append(
            {
                "name": CLASSICAL_MEMBER_LABELS.get(name, user_text(name)),
                "alpha": "5/3" if name == "cressie-read-2/3" else format_number(a),
                "beta": format_number(b),
                "statistic": format_number((entry or {}).get("statistic")),
                "p": format_p((entry or {}).get("p_value_chi2")),
            }
        )
    return rows


def _check_view(check: Mapping[str, Any] | None, kind: str, label: str | None = None) -> dict | None:
    if not check_ran(check):
        return None
    label = label or {"production": "Production check", "refit": "Refit check"}[kind]
    n = check.get("n") or 0
    s = check.get("cells") or 0
    counts = check.get("counts") or []
    expected = format_number(n / s if s else None)  # the same for every cell (equiprobable cells)
    return {
        "kind": kind,
        "label": label,
        "map": heatmap(check, f"map-{kind}", label) if check.get("map") else None,
        "hist": histogram(check, f"hist-{kind}", label),
        "qq": qq_plot(check, f"qq-{kind}", label),
        "acf": acf_plot(check, f"acf-{kind}", label),
        "members": _members_rows(check),
        "cells": [{"cell": k + 1, "observed": c, "expected": expected} for k, c in enumerate(counts)],
    }


def _params_rows(audit: Mapping[str, Any]) -> list[dict]:
    prod = audit.get("production_params") or {}
    fitted = (audit.get("fitted") or {}).get("params") or {}
    names = list(prod) + [k for k in fitted if k not in prod]
    rows = []
    for name in names:
        a, b = to_float(prod.get(name)), to_float(fitted.get(name))
        rows.append(
            {
                "name": user_text(name, SHORT_TEXT),
                "production": format_number(a, 4) if name in prod else "—",
                "refit": format_number(b, 4) if name in fitted else "—",
                "change": format_number(b - a, 3)
                if a is not None and b is not None and math.isfinite(a) and math.isfinite(b)
                else "—",
            }
        )
    return rows


def _change_view(audit: Mapping[str, Any]) -> dict | None:
    change = audit.get("change")
    if not change:
        return None
    before, after = change.get("before") or [], change.get("after") or []
    production = audit.get("production") or {}
    return {
        "index": change.get("index"),
        "statistic": format_number(change.get("statistic")),
        "p": format_p(change.get("p_value")),
        "permutations": change.get("permutations"),
        "cells": change.get("cells"),
        "window": production.get("window") or {},
        "date": user_text(((production.get("effects") or {}).get("since") or {}).get("date")) or None,
        "window_dates": (
            user_text((production.get("effects") or {}).get("start")) or None,
            user_text((production.get("effects") or {}).get("end")) or None,
        ),
        "rows": [
            {"cell": k + 1, "before": format_number(b), "after": format_number(a)}
            for k, (b, a) in enumerate(zip(before, after))
        ],
    }


def _candidate_cell(key: str, value: Any) -> str:
    if key == "verdict" and value in STATUS:
        return " ".join(STATUS[value])
    if key == "p_value":
        return format_p(value)
    return value_text(value)


def _candidates_view(candidates: Sequence[Mapping[str, Any]] | None) -> dict | None:
    """The candidate list as a table: known fields first, in a fixed order, then any others."""
    if candidates is None:
        return None
    present = {k for c in candidates for k in c}
    keys = [k for k in CANDIDATE_COLUMNS if k in present]
    keys += sorted(k for k in present if k not in CANDIDATE_COLUMNS and not (k == "spec" and "spec_text" in present))
    return {
        "columns": [CANDIDATE_COLUMNS.get(k) or user_text(k.replace("_", " "), 60) for k in keys],
        "rows": [[_candidate_cell(k, c.get(k)) for k in keys] for c in candidates],
    }


def _history_view(m: Mapping[str, Any], as_of: str) -> dict:
    points = []
    for h in m.get("history") or []:
        if h.get("verdict") in STATUS:
            points.append(
                {
                    "as_of": user_text(h.get("as_of")),
                    "status": status_view(h["verdict"]),
                    "r": to_float(h.get("r_max")),
                    "p": h.get("p_value"),
                    "current": False,
                }
            )
    check = deciding_check(m.get("audit"))
    ok = check_ran(check)
    points.append(
        {
            "as_of": user_text(as_of),
            "status": status_view(m["verdict"]),
            "r": to_float(check.get("r_max")) if ok else None,
            "p": check.get("p_value") if ok else None,
            "current": True,
        }
    )
    return {"points": points, "chart": history_chart(points, "history-r")}


def _noise_text(noise: Any) -> str:
    """``normal`` or ``student-t (shape 5)`` from the registry's ``{"law", "shape"}``."""
    if isinstance(noise, Mapping):
        shape = noise.get("shape")
        return user_text(noise.get("law")) + ("" if shape is None else f" (shape {format_number(shape, 4)})")
    return user_text(noise)


def _tier_text(tier: Any) -> str:
    if isinstance(tier, int) and not isinstance(tier, bool):
        return f"{tier} (materiality: 1 most material, 3 least)"
    return "not recorded"


_FORECAST_CHECK = "Forecast check"
_FORECAST_RESIDUALS = (
    "normal scores of the PIT values: each actual of the audit window under the predictive distribution stated "
    "for it before it was observed"
)


def _accuracy_rows(acc: Mapping[str, Any]) -> list[dict]:
    """A forecast audit's accuracy figures in words (reported beside calibration, never a verdict)."""
    if not acc:
        return []
    rows = []
    if acc.get("error"):
        rows.append({"key": "Accuracy", "value": user_text(acc["error"], 600)})
    if "mase" in acc:
        value = (
            format_number(acc.get("mase"))
            if acc.get("mase") is not None
            else f"n/a ({user_text(acc.get('mase_note'), 400)})"
        )
        rows.append(
            {
                "key": "Mean absolute scaled error (MASE)",
                "value": (
                    f"{value}: mean absolute error of the point forecast ({user_text(acc.get('point'))}) "
                    "over that of the one-step seasonal naive forecast in the "
                    f"{user_text(acc.get('mase_scale_from'))}; below 1 is better than the naive forecast "
                    "(Hyndman and Koehler 2006)"
                ),
            }
        )
    if "mae" in acc:
        rows.append({"key": "Mean absolute error", "value": format_number(acc.get("mae"), 4)})
    if "crps" in acc:
        rows.append(
            {
                "key": "Continuous ranked probability score (CRPS, mean)",
                "value": (
                    f"{format_number(acc.get('crps'), 4)} ({user_text(acc.get('crps_method'))}; "
                    "smaller is better, in the units of the series)"
                ),
            }
        )
    if "crps_naive" in acc:
        rows.append(
            {
                "key": "CRPS of the naive forecast",
                "value": (
                    f"{format_number(acc.get('crps_naive'), 4)} ({user_text(acc.get('naive'), 600)})"
                    if acc.get("crps_naive") is not None
                    else f"n/a ({user_text(acc.get('naive'), 600)})"
                ),
            }
        )
    if "crps_skill" in acc:
        rows.append(
            {
                "key": "CRPS skill",
                "value": (
                    f"{format_number(acc.get('crps_skill'))} (1 − CRPS / CRPS of the naive forecast: "
                    "above 0 the stated distributions "
                    "beat the naive one, 0 ties, below 0 loses)"
                ),
            }
        )
    return rows


def _forecast_rows(check: Mapping[str, Any]) -> dict[str, str]:
    """What some rows of the checks table mean for a forecast check, by row key."""
    noise = check.get("noise") or {}
    mean, sd = to_float(noise.get("score_mean")), to_float(noise.get("score_sd"))
    scores = (
        f"mean {format_number(mean, 2)} and standard deviation {format_number(sd, 2)} "
        "(0 and 1 when the stated laws are "
        "right: a positive mean means forecasts too low, a standard deviation above 1 a stated uncertainty too narrow)"
        if mean is not None and sd is not None
        else "n/a"
    )
    cal = check.get("calibration") or {}
    return {
        "residual_type": _FORECAST_RESIDUALS,
        "plain": f"the normal scores have {scores}",
        "k": "0 (nothing is estimated: the predictive laws were stated before the data)",
        "noise": f"standard normal scores of the PIT values (stated: {user_text(noise.get('stated'))})",
        "reference": (
            f"{count_text(cal.get('replicates'))} simulated sets of {check.get('n')} independent uniform PIT values "
            "(the stated laws "
            "are fixed before the data, so this null is exact)"
            if cal.get("method") == "simulated"
            else user_text(cal.get("method"))
        ),
    }


def _forecast_view(m: Mapping[str, Any], view: dict) -> dict | None:
    """A forecast entry's page (forecasts made elsewhere): the statement audited, the accuracy, one
    check in place of two, and what the model's identity rows mean for it; None for a fitted model.

    Adjusts ``view`` (from :func:`model_page_view`) in place: the identity rows name the statement and
    the stated law, and the checks table has one column (:func:`model_page_view` labels the charts
    as the forecast check).
    """
    stated = m.get("forecasts")
    if stated is None:
        return None
    audit = m.get("audit") or {}
    levels = sorted(float(k) for k in (stated.get("quantiles") or {}))
    law = (
        "predictive quantiles at levels " + ", ".join(format_number(x) for x in levels)
        if levels
        else _noise_text(stated.get("noise") or {"law": "normal", "shape": None})
    )
    replace = {
        "Model spec": ("Forecasts stated", user_text(m.get("spec_text"))),
        "Noise law": ("Stated predictive law", law),
        "Production version": (
            "Production version",
            "none: the forecasts are made elsewhere and fitaudit holds no parameters of the model",
        ),
    }
    view["identity"] = [
        {"key": replace[r["key"]][0], "value": replace[r["key"]][1]} if r["key"] in replace else r
        for r in view["identity"]
    ]
    if view.get("audit"):
        production = audit.get("production")
        said = _forecast_rows(production) if check_ran(production) else {}
        rows = []
        for r in view["audit"]["check_rows"]:
            cells = r["cells"][:1]
            if r["key"] in said:
                cells = [said[r["key"]]]
            rows.append({**r, "cells": cells})
        view["audit"]["check_rows"] = rows
    return {
        "note": NOT_REFITTED_PAGE,
        "statement": kv_rows(stated),
        "accuracy": _accuracy_rows(audit.get("accuracy") or {}),
        "label": _FORECAST_CHECK,
    }


def model_page_view(m: Mapping[str, Any], as_of: str, policy: Mapping[str, Any] | None = None) -> dict:
    audit = m.get("audit")
    pv = m.get("production_version")
    exc = m.get("exception")
    view = {
        "id": user_text(m["id"]),
        "id_short": user_text(m["id"], SHORT_TEXT),
        "safe_id": m["safe_id"],
        "status": status_view(m["verdict"]),
        "reasons": [user_text(r, 4000) for r in m.get("reasons") or []],
        "escalated": bool(m.get("escalated")),
        "movement": MOVEMENT.get(m.get("movement"), user_text(m.get("movement"))),
        "exception": {"first_seen": user_text(exc.get("first_seen")), "consecutive": exc.get("consecutive")}
        if exc
        else None,
        "identity": [
            {"key": "Model id", "value": user_text(m["id"])},
            {"key": "Owner", "value": user_text(m.get("owner"))},
            {"key": "Tier", "value": _tier_text(m.get("tier"))},
            {"key": "Description", "value": user_text(m.get("description"))},
            {"key": "Source / series", "value": f"{user_text(m.get('source'))} / {user_text(m.get('series'))}"},
            {"key": "Model spec", "value": user_text(m.get("spec_text"))},
            {"key": "Noise law", "value": _noise_text(m.get("noise"))},
            {
                "key": "Production version",
                "value": (
                    f"{user_text(pv.get('version'))} (SHA-256 {user_text(pv.get('sha256'))}, "
                    f"created {user_text(pv.get('created_at'))})"
                    if pv
                    else "none"
                ),
            },
            {"key": "Last validated", "value": user_text(m.get("last_validated")) or "—"},
        ],
        "action": record_action(m, policy, as_of) if m["verdict"] != "pass" else None,
        "lineage": labelled_rows(m.get("lineage"), LINEAGE_LABELS),
        "settings": labelled_rows(m.get("settings"), SETTING_LABELS),
        "history": _history_view(m, as_of),
        "candidates": _candidates_view(m.get("candidates")),
        "audit": None,
    }
    if audit:
        production, refit = audit.get("production"), audit.get("refit")
        checks = (
            (_check_view(production, "production", _FORECAST_CHECK),)  # forecasts made elsewhere: one check
            if m.get("forecasts") is not None
            else (_check_view(production, "production"), _check_view(refit, "refit"))
        )
        view["audit"] = {
            "has_production": production is not None,
            "check_rows": _check_rows(production, refit, policy),
            "checks": [c for c in checks if c],
            "params": _params_rows(audit),
            "fitted": {k: (audit.get("fitted") or {}).get(k) for k in ("loglik", "aic", "bic", "nobs", "converged")},
            "fit_message": user_text((audit.get("fitted") or {}).get("message")).rstrip("."),
            "change": _change_view(audit),
        }
    view["forecast"] = _forecast_view(m, view)
    return view
