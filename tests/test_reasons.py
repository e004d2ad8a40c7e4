"""Reasons and actions per verdict kind: the reason for the verdict first, in plain words with a
number and its unit, statistics beside the rule that decided them, simulation floors said honestly,
narrow passes and strong reported-only diagnostics said, and no advice that contradicts the verdict.

Checks are built by hand (``CheckResult`` with chosen numbers), so every sentence is tested against
known values; the sizes of the errors are checked against numpy by their formulas.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

from fitaudit.core.audit import AuditResult, CheckResult, apply_fleet_rules, decide_verdict
from fitaudit.core.plotdata import error_effects, iso_date
from fitaudit.core.verdict import owner_action

GATE = {
    "deciding": {
        "kind": "tails",
        "sentence": "the highest 1.8 % of the assumed law holds 10 errors where 1.0 were expected",
    }
}


def check(
    kind: str = "production", *, fails: bool = False, ratio: float = 0.5, acf_fails: bool = False, **extra
) -> CheckResult:
    """A check that ran: passing (T / critical = ``ratio``) or failing its distribution gate at the
    floor of 499 simulations."""
    p_dist = 0.002 if fails else 0.4
    p_ind = 0.0004 if acf_fails else 0.6
    values = dict(
        kind=kind,
        status="ok",
        n=56,
        cells=10,
        noise={"law": "normal"},
        t_at_max=27.6 * (4.15 if fails else ratio),
        critical_value=27.6,
        alpha_max=2.0,
        beta_max=0.0,
        p_distribution=p_dist,
        p_independence=p_ind,
        p_value=min(1.0, 2 * min(p_dist, p_ind)),
        calibration={"method": "simulated", "replicates": 499},
        gate=GATE,
        window={"first": 124, "last": 179, "length": 56},
        ljung_box={"statistic": 33.7 if acf_fails else 6.2, "lags": 11, "df": 11},
        mcleod_li={"p_value": 0.5},
        effect_acf=0.39 if acf_fails else 0.1,
        members={"pearson": {"p_value_chi2": 0.4}},
        effects={"n": 56, "start": "2026-10-06", "end": "2026-11-30"},
    )
    values.update(extra)
    return CheckResult(**values)


def failing_production(**extra) -> CheckResult:
    effects = {
        "n": 56,
        "start": "2026-10-06",
        "end": "2026-11-30",
        "variance_ratio": 1.8,
        "bias_sd": -0.05,
        "bias_pct": 0.4,
        "since": {"date": "2026-10-14", "n": 48, "variance_ratio": 1.9, "bias_sd": -0.5, "bias_pct": 6.2},
    }
    return check("production", fails=True, effects=effects, **extra)


# ----------------------------------------------------------------------------------------------
# the sizes of the errors
# ----------------------------------------------------------------------------------------------
def test_error_effects_follow_their_formulas():
    rng = np.random.default_rng(3)
    y = 50 + rng.standard_normal(120)
    e = np.r_[np.nan, 1.5 * rng.standard_normal(119) - 0.8]
    times = np.arange("2026-06-01", "2026-09-29", dtype="datetime64[D]")
    out = error_effects(e, y, 64, sigma2=1.0, change=90, times=times)
    window = e[64:]
    # common practice: sample variance with n - 1, mean error over the assumed sd, mean error over the mean level
    assert out["n"] == 56 and out["variance_ratio"] == pytest.approx(np.var(window, ddof=1) / 1.0, abs=1e-6)
    assert out["bias_sd"] == pytest.approx(window.mean(), abs=1e-6)
    assert out["bias_pct"] == pytest.approx(-100 * window.mean() / y[64:].mean(), abs=1e-6)
    assert out["bias_pct"] > 0  # errors y - forecast below zero: the forecasts ran high
    assert (out["start"], out["end"]) == ("2026-08-04", "2026-09-28")  # 1 June + 64 days, + 119 days
    since = out["since"]
    assert since["date"] == "2026-08-30" and since["n"] == 30
    assert since["variance_ratio"] == pytest.approx(np.var(e[90:], ddof=1), abs=1e-6)
    no_level = error_effects(e, y - 50, 64, sigma2=None)
    assert no_level["bias_pct"] is None and no_level["variance_ratio"] is None and no_level["start"] is None
    assert iso_date(np.datetime64("NaT")) is None and iso_date("2026-10-14T00:00:00") == "2026-10-14"


# ----------------------------------------------------------------------------------------------
# reasons per verdict kind
# ----------------------------------------------------------------------------------------------
def test_refit_leads_with_the_refit_in_plain_words_then_the_statistics():
    verdict, reasons = decide_verdict(failing_production(), check("refit", n=180), 0.05)
    assert verdict == "refit"
    lead = reasons[0]
    assert lead.startswith(
        "Refit: the production parameters no longer fit the 56 observations from 2026-10-06 to 2026-11-30"
    )
    assert (
        "the forecasts ran 6 % high since 2026-10-14" in lead and "1.8 times as variable as the model assumes" in lead
    )
    assert reasons[1].startswith("Production check:") and "10 errors where 1.0 were expected" in reasons[1]
    assert reasons[2].startswith("Refit check")
    assert not any("promote" in r for r in reasons)  # what to do is the action's job, never a reason's


def test_respecify_leads_with_why_the_refit_fails():
    verdict, reasons = decide_verdict(failing_production(), check("refit", n=180, acf_fails=True), 0.05)
    assert verdict == "respecify"
    assert reasons[0].startswith(
        "Respecify: re-estimated on the 56 observations from 2026-10-06 to 2026-11-30, the model still does not "
        "describe"
    )
    assert "consecutive residuals are correlated (largest autocorrelation 0.39)" in reasons[0]
    assert reasons[1].startswith("Refit check") and "Ljung-Box Q 33.7 on 11 lags" in reasons[1]
    assert any(r.startswith("The production parameters also fail") for r in reasons)


def test_an_escalated_refit_leads_with_the_escalation_and_never_says_promote():
    prod, refit = failing_production(), check("refit", n=180)
    result = AuditResult("refit", (), prod, refit, spec={}, noise="normal")
    (out,) = apply_fleet_rules([result], q=0.1, histories=[["pass", "refit"]], k=2, n=3)
    assert out.verdict == "respecify" and out.escalated
    assert out.reasons[0].startswith(
        "Respecify (escalated): a refit was needed in 2 of the last 3 audits, this one included"
    )
    assert out.reasons[1].startswith(
        "On its own, this audit would call for a refit: the production parameters no longer fit"
    )
    assert not any(r.startswith("Refit:") or "promote" in r for r in out.reasons)
    assert out.reasons[-1].startswith("p-values were adjusted across the run's 2 checks (Benjamini-Hochberg, q = 0.1)")


def test_pass_without_notes_and_a_check_that_could_not_run():
    verdict, reasons = decide_verdict(check("production"), check("refit", n=180), 0.05)
    assert (
        verdict == "pass"
        and reasons[0]
        == "Pass: the production parameters still describe the 56 observations from 2026-10-06 to 2026-11-30."
    )
    assert not any(r.startswith("Caution") for r in reasons)
    broken = CheckResult(
        kind="production", status="insufficient", message="model 'm': the audit window is longer than the series"
    )
    verdict, reasons = decide_verdict(broken, check("refit"), 0.05)
    assert verdict == "insufficient" and reasons == (
        "The production check could not run: model 'm': the audit window is longer than the series",
    )


def test_narrow_passes_and_strong_reported_diagnostics_are_said():
    # Neyman's chi-square p-value is not trusted with nearly empty cells: never a caution on its own
    members = {
        "pearson": {"p_value_chi2": 0.009},
        "likelihood-ratio": {"p_value_chi2": 0.019},
        "neyman": {"p_value_chi2": 0.0001},
    }
    narrow = check("refit", n=180, ratio=0.97, members=members, mcleod_li={"p_value": 0.0004})
    verdict, reasons = decide_verdict(failing_production(), narrow, 0.05)
    assert verdict == "refit"
    cautions = [r for r in reasons if r.startswith("Caution, refit check")]
    assert len(cautions) == 3
    assert (
        "passes narrowly: its largest standardised statistic is 0.97 of its critical value (within 10 % of failing)"
        in cautions[0]
    )
    assert "Pearson X², G² (likelihood ratio) would reject on their own (p from 0.009 to 0.019" in cautions[1]
    assert "strong evidence of changing variance (McLeod-Li on squared residuals, p < 0.001" in cautions[2]
    _, reasons = decide_verdict(check("production", ratio=0.89), check("refit"), 0.05)
    assert not any("narrowly" in r for r in reasons)  # 0.89 is more than 10 % away from failing


def test_p_values_stand_beside_their_thresholds_and_floors():
    _, reasons = decide_verdict(failing_production(), check("refit", n=180), 0.05)
    stats = reasons[1]
    assert "distribution gate p ≤ 0.002 (the smallest possible with 499 simulations)" in stats  # 1 / (499 + 1)
    assert "check p = 0.004; each gate fails at p ≤ 0.025 (level 0.05 split over the two gates)" in stats
    adjusted = dataclasses.replace(failing_production(), p_adjusted=0.054)
    _, reasons = decide_verdict(
        adjusted, dataclasses.replace(check("refit", n=180), p_adjusted=1.0), 0.1, adjusted=True
    )
    assert "check p = 0.004, adjusted across the run to 0.054, at or below q = 0.1" in reasons[1]
    assert "adjusted across the run to 1.000, above q = 0.1" in reasons[2]
    off_floor = dataclasses.replace(failing_production(), p_distribution=0.004)
    assert (
        "distribution gate p = 0.004)" in decide_verdict(off_floor, check("refit"), 0.05)[1][1]
    )  # 2 / 500 is not the floor
    asymptotic = dataclasses.replace(failing_production(), calibration={"method": "asymptotic"}, p_distribution=0.002)
    assert "smallest possible" not in decide_verdict(asymptotic, check("refit"), 0.05)[1][1]  # no simulation, no floor


# ----------------------------------------------------------------------------------------------
# actions
# ----------------------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("verdict", "escalated", "policy", "words"),
    [
        ("refit", False, "approval", "approve their promotion"),
        ("refit", False, "automatic", "Confirm the automatic promotion"),
        ("refit", False, "forecasts", "Re-estimate the model that issues these forecasts"),
        ("respecify", False, "approval", "choose a new specification"),
        ("respecify", True, "approval", "rather than approving another refit"),
        ("insufficient", False, "approval", "Provide the data"),
        ("error", False, "approval", "Fix the problem"),
    ],
)
def test_actions_follow_the_verdict_with_a_deadline(verdict, escalated, policy, words):
    forecasts = policy == "forecasts"  # forecasts made elsewhere: fitaudit refits nothing
    action = owner_action(
        verdict,
        escalated=escalated,
        as_of="2026-11-30",
        days=14,
        refit_policy="approval" if forecasts else policy,
        refittable=not forecasts,
    )
    assert words.lower() in action["action"].lower()
    assert action["due"] == "2026-12-14" and action["days"] == 14  # 30 November + 14 days
    if escalated:
        assert "approve their promotion" not in action["action"] and "promot" not in action["action"]


def test_pass_needs_no_action_and_unknown_verdicts_are_refused():
    assert owner_action("pass", as_of="2026-11-30", days=7) == {
        "action": "None: the model passed.",
        "due": None,
        "days": None,
    }
    assert owner_action("refit")["due"] is None
    with pytest.raises(Exception, match="unknown verdict 'stale'"):
        owner_action("stale")


def test_a_bias_is_said_only_when_clear_of_its_noise_and_the_larger_departure_leads():
    lead = decide_verdict(failing_production(), check("refit"), 0.05)[1][0]
    # bias 0.5 sd over 48 errors with spread ratio 1.9: 0.5 * sqrt(48) / sqrt(1.9) = 2.5 standard errors
    # (common practice: at least 2)
    assert lead.index("the forecasts ran 6 % high") < lead.index(
        "1.8 times as variable"
    )  # 0.5 sd > sqrt(1.8) - 1 = 0.34
    few = failing_production()
    few = dataclasses.replace(few, effects={**few.effects, "since": {**few.effects["since"], "n": 6}})
    lead = decide_verdict(few, check("refit"), 0.05)[1][0]
    assert (
        "ran" not in lead and "1.8 times as variable" in lead
    )  # 0.5 * sqrt(6) / sqrt(1.9) = 0.9 standard errors: noise
    wide = failing_production()
    wide = dataclasses.replace(wide, effects={**wide.effects, "variance_ratio": 4.2})
    lead = decide_verdict(wide, check("refit"), 0.05)[1][0]
    assert lead.index("4.2 times as variable") < lead.index(
        "the forecasts ran 6 % high"
    )  # sqrt(4.2) - 1 = 1.05 > 0.5 sd
