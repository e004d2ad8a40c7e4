"""Verdicts and their reasons, and the rules applied across a run (docs/method.md §10).

* :func:`decide_verdict`: ``pass``, ``refit`` or ``respecify`` from the two checks, with one
  plain sentence per reason, the reason for the verdict first; ``insufficient`` or ``error`` when
  a check could not run;
* :func:`owner_action`: what the model's owner should do after a verdict, and by when;
* the fleet rules: :func:`adjust_pvalues` (multiplicity adjustment across the checks of a run),
  :func:`escalate_persistent_refit` (a recurring ``refit`` becomes ``respecify``) and
  :func:`apply_fleet_rules`, which applies both to a run's results and re-decides their verdicts.

References
----------
.. [1] Y. Benjamini and Y. Hochberg, "Controlling the false discovery rate: a practical and
       powerful approach to multiple testing", JRSS B 57, 1995, p. 289.
.. [2] Y. Benjamini and D. Yekutieli, "The control of the false discovery rate in multiple
       testing under dependency", Ann. Statist. 29, 2001, p. 1165.
"""

from __future__ import annotations

import dataclasses
import datetime as dt
from collections.abc import Sequence

import numpy as np

from .divergence import CLASSICAL_MEMBER_LABELS, CLASSICAL_MEMBERS
from .exceptions import InputError
from .results import AuditResult, CheckResult
from .vocabulary import ADJUDICATED_VERDICTS, ADJUSTMENT_LABELS, ADJUSTMENTS, VERDICTS, Adjustment

__all__ = [
    "CAUTION_PREFIX",
    "decide_verdict",
    "owner_action",
    "apply_fleet_rules",
    "adjust_pvalues",
    "escalate_persistent_refit",
]


def _fmt_p(p: float) -> str:
    if p is None or np.isnan(p):
        return "n/a"
    return "< 0.001" if p < 0.001 else f"= {p:.3f}"


#: A passing check is *narrow* when its largest standardised statistic is within this share of its
#: critical value (T / critical value at least 0.9).
NARROW_SHARE = 0.10
#: A classical member's own chi-square p-value below this is worth a mention on a passing check
#: (members with alpha from 1 to 2 only: G², Cressie-Read 2/3 and Pearson).
CLASSICAL_NOTE_P = 0.02
#: A McLeod-Li p-value below this is strong evidence of changing variance (reported only).
MCLEOD_LI_NOTE_P = 0.001
#: A spread ratio outside [1 / SPREAD_NOTE, SPREAD_NOTE] or a bias of BIAS_NOTE_SD standard
#: deviations is put into words when a production check fails.
SPREAD_NOTE = 1.25
BIAS_NOTE_SD = 0.2


def _floor(check: CheckResult) -> tuple[float, int] | None:
    """The smallest p-value a simulated calibration can give, ``1 / (B + 1)``, and ``B``."""
    cal = check.calibration or {}
    b = cal.get("replicates")
    if (
        cal.get("method") in ("simulated", "bootstrap")
        and isinstance(b, (int, np.integer))
        and not isinstance(b, bool)
        and b > 0
    ):
        return 1.0 / (int(b) + 1), int(b)
    return None


def _p_gate(check: CheckResult) -> str:
    """The distribution gate's p-value; at the simulation's floor ``p <= 0.002 (the smallest ...)``."""
    p = check.p_distribution
    floor = _floor(check)
    if floor is not None and p is not None and np.isfinite(p) and p <= floor[0] * (1 + 1e-9):
        return f"p ≤ {floor[0]:.3g} (the smallest possible with {floor[1]} simulations)"
    return f"p {_fmt_p(p)}"


def _rule(check: CheckResult, threshold: float, adjusted: bool) -> str:
    """The check's p-value beside the rule that decided it."""
    if adjusted and check.p_adjusted is not None:
        side = "at or below" if check.p_adjusted <= threshold else "above"
        adj = "< 0.001" if check.p_adjusted < 0.001 else f"{check.p_adjusted:.3f}"
        return f"check p {_fmt_p(check.p_value)}, adjusted across the run to {adj}, {side} q = {threshold:g}"
    return (
        f"check p {_fmt_p(check.p_value)}; each gate fails at p ≤ {threshold / 2:g} (level {threshold:g} split "
        "over the two gates)"
    )


def _window_words(check: CheckResult) -> str:
    eff = check.effects or {}
    n = eff.get("n") or check.window.get("length") or check.n
    if eff.get("start") and eff.get("end"):
        return f"the {n} observations from {eff['start']} to {eff['end']}"
    return f"the last {n} observations" if check.kind == "production" else f"the {n} observations of the fit window"


def _bias_words(sizes: dict, since: str | None) -> str | None:
    """The bias in words when it is large (BIAS_NOTE_SD) and clear of its own noise: the mean error at
    least two standard errors from 0, ``|ebar| / (s / sqrt(m)) >= 2`` (common practice)."""
    bias_sd, pct = sizes.get("bias_sd"), sizes.get("bias_pct")
    if bias_sd is None or abs(bias_sd) < BIAS_NOTE_SD:
        return None
    n, ratio = sizes.get("n") or 0, sizes.get("variance_ratio")
    spread = np.sqrt(ratio) if ratio is not None and ratio > 0 else 1.0
    if n < 2 or abs(bias_sd) * np.sqrt(n) / spread < 2:
        return None
    when = f" since {since}" if since else ""
    side = "high" if bias_sd < 0 else "low"  # e = y - forecast: negative errors are forecasts above the data
    if pct is not None and abs(pct) >= 0.5:
        return (
            f"the forecasts ran {abs(pct):.0f} % {side}{when} ({abs(bias_sd):.1f} standard deviations of the "
            "assumed error)"
        )
    return f"the forecasts ran {abs(bias_sd):.1f} standard deviations of the assumed error too {side}{when}"


def _plain_failure(check: CheckResult, threshold: float, adjusted: bool) -> str:
    """One sentence a reader without statistics understands, with a number and its unit."""
    dist, ind = check.gate_flags(threshold, adjusted)
    eff = check.effects or {}
    noun = "errors" if check.kind == "production" else "residuals"
    parts = []
    since = eff.get("since") or {}
    bias = (_bias_words(since, since.get("date")) if since.get("date") else None) or _bias_words(eff, None)
    ratio = eff.get("variance_ratio")
    spread = None
    if dist and ratio is not None and (ratio >= SPREAD_NOTE or ratio <= 1 / SPREAD_NOTE):
        if ratio >= 1:
            spread = f"the {noun} are {ratio:.1f} times as variable as the model assumes"
        else:
            spread = (
                f"the {noun} are only {ratio:.2f} times as variable as the model assumes (it overstates its "
                "uncertainty)"
            )
    # the larger departure first: the bias in standard deviations against the excess of the spread, |sqrt(ratio) - 1|
    shown = since if since.get("date") and since.get("bias_sd") is not None else eff
    excess = abs(np.sqrt(ratio) - 1) if ratio is not None and ratio > 0 else 0.0
    for text in (bias, spread) if abs(shown.get("bias_sd") or 0.0) > excess else (spread, bias):
        if dist and text:
            parts.append(text)
    if dist and not parts:
        deciding = check.gate.get("deciding") or {}
        sentence = f": {deciding['sentence']}" if deciding.get("sentence") else ""
        parts.append(f"the {noun} are not distributed as the model assumes{sentence}")
    if ind:
        parts.append(
            f"consecutive {noun} are correlated (largest autocorrelation {check.effect_acf:.2f}), so the forecasts "
            "leave predictable structure unused"
        )
    return "; ".join(parts) if parts else "no gate was flagged"


def _why_failed(check: CheckResult, threshold: float, adjusted: bool) -> str:
    """The statistics behind a failing check, with the thresholds that decided it."""
    dist, ind = check.gate_flags(threshold, adjusted)
    parts = []
    if dist:
        where = f", at α {check.alpha_max:g}, β {check.beta_max:g}" if np.isfinite(check.alpha_max) else ""
        deciding = check.gate.get("deciding") or {}
        cells = f": {deciding['sentence']}" if deciding.get("sentence") else ""
        on = f" on the {deciding['kind']} cells" if deciding.get("kind") else ""
        parts.append(
            f"the residual distribution departs from the assumed {check.noise.get('law', 'noise')} law{cells} "
            f"(T {check.t_at_max:.1f} against a critical value of {check.critical_value:.1f}{on}{where}; distribution "
            f"gate {_p_gate(check)})"
        )
    if ind:
        lb = check.ljung_box
        parts.append(
            f"the residuals are autocorrelated (Ljung-Box Q {lb.get('statistic', float('nan')):.1f} on "
            f"{lb.get('lags')} lags, p {_fmt_p(check.p_independence)}; largest |autocorrelation| "
            f"{check.effect_acf:.2f})"
        )
    text = " and ".join(parts) if parts else "no gate was flagged"
    return f"{text}; {_rule(check, threshold, adjusted)}"


def _summary_pass(check: CheckResult, threshold: float, adjusted: bool) -> str:
    deciding = check.gate.get("deciding") or {}
    on = f" on the {deciding['kind']} cells" if deciding.get("kind") else ""
    beyond = check.t_at_max > check.critical_value
    return (
        "the distribution gate finds no departure from the assumed law (largest standardised statistic: T "
        f"{check.t_at_max:.1f} against a critical value of {check.critical_value:.1f}{on}, {_p_gate(check)}"
        + (", not significant after the adjustment across the run" if beyond else "")
        + (
            f") and Ljung-Box finds no autocorrelation (p {_fmt_p(check.p_independence)}); "
            f"{_rule(check, threshold, adjusted)}"
        )
    )


def _cautions(check: CheckResult) -> list[str]:
    """What a passing check's numbers say beyond the verdict: a narrow pass, strong reported-only diagnostics."""
    out = []
    share = (
        check.t_at_max / check.critical_value
        if check.critical_value and np.isfinite(check.critical_value)
        else float("nan")
    )
    if np.isfinite(share) and 1 - NARROW_SHARE <= share <= 1:
        out.append(
            f"it passes narrowly: its largest standardised statistic is {share:.2f} of its critical value "
            f"(within {100 * NARROW_SHARE:.0f} % of failing)"
        )
    # only members whose chi-square approximation holds at audit-window sizes: Cressie-Read lambda = alpha - 1 in
    # [0, 1] (G², Cressie-Read 2/3, Pearson); Neyman and Freeman-Tukey reject spuriously when cells are nearly empty
    # (from memory: Read and Cressie 1988, ch. 5, on the small-sample accuracy of the chi-square approximation)
    low = {
        name: m.get("p_value_chi2")
        for name, m in (check.members or {}).items()
        if name in CLASSICAL_MEMBERS
        and 1.0 <= CLASSICAL_MEMBERS[name][0] <= 2.0
        and isinstance(m, dict)
        and m.get("p_value_chi2") is not None
        and np.isfinite(m["p_value_chi2"])
        and m["p_value_chi2"] < CLASSICAL_NOTE_P
    }
    if low:
        names = ", ".join(CLASSICAL_MEMBER_LABELS.get(n, n) for n in low)
        lo, hi = min(low.values()), max(low.values())
        span = (
            f"p {_fmt_p(lo)}"
            if lo == hi
            else f"p from {lo:.3f} to {hi:.3f}"
            if lo >= 0.001
            else f"p from < 0.001 to {hi:.3f}"
        )
        out.append(
            f"the classical statistics {names} would reject on their own ({span} against chi-square; reported only: "
            "the calibrated gate over all members decides)"
        )
    ml = (check.mcleod_li or {}).get("p_value")
    if ml is not None and np.isfinite(ml) and ml < MCLEOD_LI_NOTE_P:
        out.append(
            f"there is strong evidence of changing variance (McLeod-Li on squared residuals, p {_fmt_p(ml)}; reported "
            "only, it does not decide the verdict)"
        )
    return out


#: How a reason that adds a caution to a passing check begins (the report lists such passes).
CAUTION_PREFIX = "Caution, "


def _caution_reasons(check: CheckResult, which: str) -> list[str]:
    return [f"{CAUTION_PREFIX}{which}: {c}." for c in _cautions(check)]


def decide_verdict(
    production: CheckResult | None, refit: CheckResult | None, threshold: float, adjusted: bool = False
) -> tuple[str, tuple]:
    """Verdict and plain-language reasons from the two checks (docs/method.md §10.2).

    With a production check: ``pass`` if it passes, else ``refit`` if the refit check passes,
    else ``respecify``; without one, ``pass`` or ``respecify`` from the refit check.  A check
    that could not run makes the verdict ``insufficient`` or ``error`` with its message.  Without
    a refit check (a forecast audit) the verdict is
    :func:`fitaudit.core.forecasts.forecast_verdict` of the production check.

    The first reason says why the verdict is what it is, in plain words with a number and its
    unit (the errors' spread against the assumed variance, the forecasts' bias since a located
    change, :func:`~fitaudit.core.plotdata.error_effects`); the next give the statistics of each
    check beside the rule that decided it, with a simulation's floor named when a p-value sits on
    it; a passing check that passes narrowly or whose reported-only diagnostics are strong
    carries a caution.  Reasons give no advice: what to do follows from the verdict
    (:func:`owner_action`).

    Parameters
    ----------
    production, refit : CheckResult or None
        The two checks (production None without a production version, refit None for a
        forecast audit).
    threshold : float
        The level a check is tested at (each gate at ``threshold / 2``), or with ``adjusted`` the
        level of the fleet-adjusted p-value.
    adjusted : bool, default False
        Decide on the fleet-adjusted p-values (:func:`apply_fleet_rules`).

    Returns
    -------
    verdict : str
        One of :data:`~fitaudit.core.vocabulary.VERDICTS`.
    reasons : tuple of str
        One plain sentence each, the reason for the verdict first.
    """
    if refit is None:
        from .forecasts import forecast_verdict

        return forecast_verdict(production, threshold, adjusted)
    if production is not None:
        if not production.ok:
            return production.status, (f"The production check could not run: {production.message}",)
        window = _window_words(production)
        if production.passed(threshold, adjusted):
            reasons = [
                f"Pass: the production parameters still describe {window}.",
                f"Production check: {_summary_pass(production, threshold, adjusted)}.",
                *_caution_reasons(production, "production check"),
            ]
            if not refit.ok:
                reasons.append(f"The refit check could not run ({refit.status}): {refit.message}")
            return "pass", tuple(reasons)
        plain = _plain_failure(production, threshold, adjusted)
        stats = f"Production check: {_why_failed(production, threshold, adjusted)}."
        if not refit.ok:
            return refit.status, (
                "The refit check could not run, so the failing production check cannot be told apart from a model "
                f"that no longer fits: {refit.message}",
                f"The production parameters no longer fit {window}: {plain}.",
                stats,
            )
        if refit.passed(threshold, adjusted):
            return "refit", (
                f"Refit: the production parameters no longer fit {window}, while the same model re-estimated does: "
                f"{plain}.",
                stats,
                f"Refit check ({_window_words(refit)}): {_summary_pass(refit, threshold, adjusted)}.",
                *_caution_reasons(refit, "refit check"),
            )
        return "respecify", (
            f"Respecify: re-estimated on {_window_words(refit)}, the model still does not describe the series, so the "
            f"model class no longer fits: {_plain_failure(refit, threshold, adjusted)}.",
            f"Refit check ({_window_words(refit)}): {_why_failed(refit, threshold, adjusted)}.",
            f"The production parameters also fail on {window}: {plain}.",
            stats,
        )
    if not refit.ok:
        return refit.status, (f"The refit check could not run: {refit.message}",)
    window = _window_words(refit)
    if refit.passed(threshold, adjusted):
        return "pass", (
            f"Pass: the model re-estimated on {window} describes the series (no production version was checked).",
            f"Refit check: {_summary_pass(refit, threshold, adjusted)}.",
            *_caution_reasons(refit, "refit check"),
        )
    return "respecify", (
        f"Respecify: the model re-estimated on {window} does not describe the series: "
        f"{_plain_failure(refit, threshold, adjusted)}.",
        f"Refit check: {_why_failed(refit, threshold, adjusted)}.",
    )


def owner_action(
    verdict: str,
    *,
    escalated: bool = False,
    as_of: dt.date | str | None = None,
    days: int | None = None,
    refit_policy: str = "approval",
    refittable: bool = True,
) -> dict:
    """What a model's owner should do after a verdict, and by when (docs/method.md §10.2).

    The deadline is ``as_of + days`` (the policy's days to act for the model's tier).

    * ``refit``: check the refitted parameters and approve their promotion (with ``refit_policy``
      ``automatic`` they are promoted when they pass: confirm the promotion); for forecasts made
      elsewhere (``refittable`` False) re-estimate the model that issues them;
    * ``respecify`` (escalated or not): choose a new specification, helped by the candidates,
      and have it validated; for an escalated model, rather than approving another refit;
    * ``insufficient``: provide the data the reason names (or shorten the windows);
    * ``error``: fix the problem the reason names;
    * ``pass``: nothing.

    Returns
    -------
    dict
        ``action`` (one sentence), ``due`` (``YYYY-MM-DD`` or None) and ``days``.

    Examples
    --------
    >>> owner_action("refit", as_of="2026-11-30", days=14)["due"]
    '2026-12-14'
    """
    if verdict not in VERDICTS:
        raise InputError(
            f"owner_action: unknown verdict {verdict!r}; valid verdicts are {', '.join(repr(v) for v in VERDICTS)}."
        )
    if verdict == "pass":
        return {"action": "None: the model passed.", "due": None, "days": None}
    if not refittable:
        refit = (
            "Re-estimate the model that issues these forecasts (fitaudit does not refit it) and restate their "
            "uncertainty."
        )
    elif refit_policy != "automatic":
        refit = "Check the refitted parameters and approve their promotion (fitaudit promote), or say why not."
    else:
        refit = "Confirm the automatic promotion of the refitted parameters (see the refit run)."
    texts = {
        "refit": refit,
        "respecify": (
            "Refits keep recurring: choose a new specification (see the candidates) and have it validated, rather than "
            "approving another refit."
            if escalated
            else "Choose a new specification (see the candidates) and have it validated."
        ),
        "insufficient": (
            "Provide the data the reason names (or shorten the windows in the registry) so the model can be audited."
        ),
        "error": "Fix the problem the reason names so the model can be audited.",
    }
    due = None
    if as_of is not None and days is not None:
        start = as_of if isinstance(as_of, dt.date) else dt.date.fromisoformat(str(as_of))
        due = (start + dt.timedelta(days=int(days))).isoformat()
    return {"action": texts[verdict], "due": due, "days": None if days is None else int(days)}


def adjust_pvalues(p, method: Adjustment = "bh") -> np.ndarray:
    """Multiplicity-adjusted p-values across the models of an audit run.

    With the m non-NaN p-values sorted, ``p_(1) <= ... <= p_(m)``:

    * ``"bh"`` (Benjamini-Hochberg step-up [1]_): ``p~_(i) = min_{j >= i} min(1, m p_(j) / j)``;
      rejecting ``p~ <= q`` controls the false discovery rate at q for independent tests;
    * ``"by"`` (Benjamini-Yekutieli [2]_): as ``"bh"`` with ``m`` replaced by ``m c_m``,
      ``c_m = sum_{i=1..m} 1/i``, valid under any dependence;
    * ``"bonferroni"``: ``min(1, m p)``, family-wise error control;
    * ``"none"``: the p-values unchanged.

    These equal statsmodels' ``multipletests`` with ``fdr_bh``, ``fdr_by`` and ``bonferroni``.

    Parameters
    ----------
    p : array_like
        Raw p-values in [0, 1], any shape; NaN marks a model without a p-value (e.g. an
        ``insufficient`` or ``error`` verdict) and passes through untouched, not counted in m.
    method : {"bh", "by", "bonferroni", "none"}, default "bh"

    Returns
    -------
    ndarray
        Adjusted p-values, shaped like ``p``.

    Examples
    --------
    >>> adjust_pvalues([0.01, 0.04, float("nan"), 0.03]).round(3).tolist()
    [0.03, 0.04, nan, 0.04]
    """
    if method not in ADJUSTMENTS:
        raise InputError(
            f"Unknown p-value adjustment {method!r}; valid methods are {', '.join(repr(m) for m in ADJUSTMENTS)}."
        )
    try:
        p = np.array(p, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"adjust_pvalues: p-values must be numeric; {exc}.") from None
    flat = p.reshape(-1)
    present = ~np.isnan(flat)
    values = flat[present]
    if ((values < 0) | (values > 1)).any():
        bad = values[(values < 0) | (values > 1)][:3].tolist()
        raise InputError(f"adjust_pvalues: p-values must lie in [0, 1] (NaN for none); got {bad}.")
    m = values.size
    if method == "none" or m == 0:
        return p
    if method == "bonferroni":
        adjusted = np.minimum(1.0, m * values)
    else:
        factor = m * (np.sum(1.0 / np.arange(1, m + 1)) if method == "by" else 1.0)
        order = np.argsort(values, kind="stable")
        stepped = values[order] * (factor / np.arange(1, m + 1))  # factor / j >= 1 keeps p~ >= p exactly
        stepped = np.minimum.accumulate(stepped[::-1])[::-1]
        adjusted = np.empty(m)
        adjusted[order] = np.minimum(1.0, stepped)
    flat[present] = adjusted
    return flat.reshape(p.shape)


def escalate_persistent_refit(history: Sequence[str], current: str, k: int = 2, n: int = 3) -> bool:
    """Whether a ``refit`` verdict has persisted long enough to become ``respecify`` (docs/method.md §10.4).

    True when ``current == "refit"`` and ``"refit"`` occurs in at least ``k`` of the last ``n``
    audits counting the current one, i.e. among ``history[-(n - 1):] + [current]``.

    Parameters
    ----------
    history : sequence of str
        Earlier verdicts of the model entry, oldest first.
    current : str
        This audit's verdict before escalation.
    k, n : int, default 2 and 3
        ``1 <= k <= n``.

    Returns
    -------
    bool

    Examples
    --------
    >>> escalate_persistent_refit(["pass", "refit"], "refit")
    True
    >>> escalate_persistent_refit(["refit", "pass", "pass"], "refit")
    False
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise InputError(f"escalate_persistent_refit: n must be an int >= 1; got {n!r}.")
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 1 <= k <= n:
        raise InputError(f"escalate_persistent_refit: k must be an int in [1, n={n}]; got {k!r}.")
    if isinstance(history, str):
        raise InputError("escalate_persistent_refit: history must be a sequence of verdicts, not one string.")
    verdicts = [*history, current]
    unknown = sorted({v for v in verdicts if v not in VERDICTS}, key=str)
    if unknown:
        raise InputError(
            f"escalate_persistent_refit: unknown verdict(s) {unknown}; valid verdicts are "
            f"{', '.join(repr(v) for v in VERDICTS)}."
        )
    if current != "refit":
        return False
    return verdicts[-n:].count("refit") >= k


def apply_fleet_rules(
    results: Sequence[AuditResult],
    *,
    q: float = 0.10,
    method: str = "bh",
    histories: Sequence[Sequence[str]] | None = None,
    k: int = 2,
    n: int = 3,
) -> list[AuditResult]:
    """Adjust p-values across a run, re-decide verdicts, escalate recurring refits.

    Every check that ran contributes its Bonferroni-combined p-value to one family, adjusted with
    ``method`` (``bh`` Benjamini-Hochberg, ``by`` Benjamini-Yekutieli, ``bonferroni``, ``none``);
    a check then fails when its adjusted p-value is at most ``q`` (for ``none``: the raw p-value
    at each result's own level).  A ``refit`` verdict that occurs in at least ``k`` of the last
    ``n`` audits (this one included; ``histories[i]`` lists model i's earlier verdicts, oldest
    first) becomes ``respecify`` (:func:`escalate_persistent_refit`).  Raw and adjusted p-values
    are both kept.

    Parameters
    ----------
    results : sequence of AuditResult
        The run's results, one per model.
    q : float, default 0.10
        The level of the adjusted p-values (the false discovery rate for ``bh`` and ``by``).
    method : {"bh", "by", "bonferroni", "none"}, default "bh"
        See :func:`adjust_pvalues` [1]_ [2]_.
    histories : sequence of sequences of str, optional
        Each model's earlier verdicts, oldest first; none by default.
    k, n : int, default 2 and 3
        The persistence rule: ``refit`` in at least k of the last n audits.

    Returns
    -------
    list of AuditResult
        The results with ``p_adjusted`` set on every check that ran, verdicts and reasons
        re-decided, and ``escalated`` marking escalations.
    """
    histories = histories if histories is not None else [()] * len(results)
    if len(histories) != len(results):
        raise InputError(f"apply_fleet_rules: {len(results)} results but {len(histories)} histories.")
    slots = []
    pvals = []
    for i, res in enumerate(results):
        for kind in ("production", "refit"):
            chk = getattr(res, kind)
            if chk is not None and chk.ok:
                slots.append((i, kind))
                pvals.append(chk.p_value)
    adjusted = adjust_pvalues(np.asarray(pvals, dtype=float), method=method) if pvals else np.array([])
    updated: list[dict] = [dict() for _ in results]
    for (i, kind), p_adj in zip(slots, adjusted):
        updated[i][kind] = dataclasses.replace(getattr(results[i], kind), p_adjusted=float(p_adj))
    out = []
    for i, res in enumerate(results):
        res = dataclasses.replace(res, **updated[i]) if updated[i] else res
        if res.verdict in ADJUDICATED_VERDICTS:
            use_adjusted = method != "none"
            threshold = q if use_adjusted else None
            verdict, reasons = decide_verdict(
                res.production,
                res.refit,
                threshold if threshold is not None else res.deciding_check.settings_level,
                adjusted=use_adjusted,
            )
            if use_adjusted:
                reasons = reasons + (
                    f"p-values were adjusted across the run's {len(pvals)} checks "
                    f"({ADJUSTMENT_LABELS.get(method, method)}, q = {q:g}).",
                )
            escalated = False
            if verdict == "refit" and escalate_persistent_refit(list(histories[i]), verdict, k=k, n=n):
                verdict, escalated = "respecify", True
                recent = [*list(histories[i])[-(n - 1) :], "refit"] if n > 1 else ["refit"]
                lead = reasons[0].removeprefix("Refit: ")
                reasons = (
                    f"Respecify (escalated): a refit was needed in {recent.count('refit')} of the last {len(recent)} "
                    f"audits, this one included (the policy escalates {k} in {n}), so re-estimating no longer keeps "
                    "the model fit and its specification needs review.",
                    f"On its own, this audit would call for a refit: {lead[:1].lower()}{lead[1:]}",
                    *reasons[1:],
                )
            res = dataclasses.replace(res, verdict=verdict, reasons=reasons, escalated=escalated)
        out.append(res)
    return out
