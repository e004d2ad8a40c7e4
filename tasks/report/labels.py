"""The report's words: status symbols, movement, classical members, the labels of lineage,
settings and candidate columns, and the fixed sentences of forecast entries."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

from fitaudit.core.divergence import CLASSICAL_MEMBER_LABELS, CLASSICAL_MEMBERS
from fitaudit.core.vocabulary import ADJUSTMENT_LABELS, VERDICTS

from .text import format_number, user_text, value_text

_SYMBOLS = {"pass": "✓", "refit": "↻", "respecify": "⚑", "insufficient": "◌", "error": "✕"}
#: Status symbol and word for each verdict (colour is never the only signal, WCAG 2.1 SC 1.4.1).
STATUS: dict[str, tuple[str, str]] = {v: (_SYMBOLS[v], v) for v in VERDICTS}

CAUTION = (
    "A passing audit is statistical evidence, not proof that a model is fit for its use. "
    "Decisions to keep, refit or retire a model follow the organisation's model-risk policy, "
    "applicable regulation and the judgement of qualified reviewers."
)

MOVEMENT = {
    "new": "new exception",
    "persisting": "persisting",
    "resolved": "resolved",
    "steady": "still passing",
    "first": "first audit",
}
#: (alpha, beta) of the classical members (model scaling, i.e. beta = 0 on a geometric grid).
MEMBER_POINTS = {name: (alpha, beta) for name, (alpha, beta, _scaling) in CLASSICAL_MEMBERS.items()}


def status_view(verdict: str) -> dict:
    symbol, word = STATUS[verdict]
    return {"key": verdict, "symbol": symbol, "word": word}


def member_label(alpha: float, beta: float) -> str:
    """A gate member in words: its classical name when it has one, else its (alpha, beta)."""
    for name, (a, b, _) in CLASSICAL_MEMBERS.items():
        if math.isclose(a, alpha, abs_tol=1e-9) and math.isclose(b, beta, abs_tol=1e-9):
            return CLASSICAL_MEMBER_LABELS.get(name, name)
    return f"α {format_number(alpha)}, β {format_number(beta)}"


CANDIDATE_COLUMNS = {
    "spec_text": "Specification",
    "noise": "Noise law",
    "verdict": "Verdict",
    "passed": "Map passes",
    "scaled_max": "Largest T / critical value",
    "r_max": "R",
    "p_value": "p",
    "aic": "AIC",
    "reason": "Reason",
}


LINEAGE_LABELS = {
    "source": "Source",
    "series": "Series key",
    "value": "Target column",
    "exogenous": "Input columns",
    "extract_digest": "Extract SHA-256 (all files read)",
    "extract_rows": "Rows in the extract",
    "extract_files": "Files in the extract",
    "rows_loaded": "Observations of this series loaded",
    "first": "First observation used",
    "last": "Last observation used",
    "fit_window": "Fit window (observations)",
    "audit_window": "Audit window (observations)",
    "audit_first": "First observation of the audit window",
}
SETTING_LABELS = {
    "level": "Level of each check",
    "calibration": "Calibration",
    "replicates": "Simulated data sets per null table",
    "bootstrap_replicates": "Bootstrap replicates",
    "seed": "Seed of every simulation",
    "audit_window": "Audit window (observations)",
    "fit_window": "Fit window (observations)",
    "lb_lags": "Ljung-Box lags",
    "change_permutations": "Permutations of the change search",
    "locate_change": "Locate a change when the production check fails",
    "practical_divergence": "Practical threshold of T_max / 2n",
    "practical_acf": "Practical threshold of the largest |autocorrelation|",
    "alphas": "α grid of the map",
    "betas": "β grid of the map",
    "scaling": "Scaling mean",
    "partitions": "Partitions of the distribution gate",
    "gate_members": "Members of the distribution gate",
    "r": "Critical value r of the standardised maximum",
    "days_to_act": "Days to act on an exception",
    "persistence": "Escalation: refits in the last audits",
    "multiple_testing": "p-value adjustment across the run",
    "fdr_q": "Level q of the adjusted p-values",
    "refit_policy": "Promotion of refitted parameters",
    "justification": "Justification",
    "approved_by": "Approved by",
}
_NONE_MEANS = {
    "fit_window": "the whole series loaded",
    "lb_lags": "automatic (min(10, n/5), or twice the season)",
    "r": "simulated for each table",
    "practical_divergence": "none",
    "practical_acf": "none",
}


def labelled_rows(mapping: Mapping[str, Any] | None, labels: Mapping[str, str], skip: Sequence[str] = ()) -> list[dict]:
    """Key-value rows for a reviewer: known keys in words, registry bookkeeping (line numbers) left out."""
    rows = []
    for key, value in (mapping or {}).items():
        if key in skip or key == "line":
            continue
        label = labels.get(key) or user_text(str(key).replace("_", " "), 80).capitalize()
        if key == "gate_members" and isinstance(value, (list, tuple)):
            shown = ", ".join(member_label(float(a), float(b)) for a, b in value)
        elif key == "persistence" and isinstance(value, Mapping):
            shown = f"{value.get('k')} of the last {value.get('n')} audits with a refit escalate to respecify"
        elif key == "days_to_act" and isinstance(value, Mapping):
            shown = ", ".join(f"tier {str(t).rsplit('_', 1)[-1]}: {d} days" for t, d in value.items())
        elif key == "multiple_testing":
            shown = ADJUSTMENT_LABELS.get(value, user_text(value))
        elif value is None and key in _NONE_MEANS:
            shown = _NONE_MEANS[key]
        else:
            shown = value_text(value)
        rows.append({"key": label, "value": shown})
    return rows


#: What a forecast entry's page says first: fitaudit audited stated forecasts and refitted nothing.
NOT_REFITTED_PAGE = (
    "This model was not refitted by fitaudit; its forecasts were audited against their stated uncertainty."
)
#: What the owner of forecasts made elsewhere should do after a failing audit (fitaudit refits nothing).
FORECAST_ACTIONS = {
    "refit": "Re-estimate the model that issues these forecasts so that they match their stated uncertainty again "
    "(fitaudit does not refit it); the next audit checks the new forecasts.",
    "respecify": "The forecasts failed audit after audit: review how they are made "
    "(the method, not only its parameters) and have the change validated.",
}
