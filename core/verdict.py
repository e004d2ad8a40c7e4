"""Verdicts and their reasons, and the rules applied across a run (docs/method.md §10).

* :func:`decide_verdict`: ``pass``, ``refit`` or ``respecify`` from the two checks, with one
  plain sentence per reason; ``insufficient`` or ``error`` when a check could not run;
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
from collections.abc import Sequence

import numpy as np

from .exceptions import InputError
from .results import AuditResult, CheckResult
from .vocabulary import ADJUDICATED_VERDICTS, ADJUSTMENT_LABELS, ADJUSTMENTS, VERDICTS, Adjustment

__all__ = ["decide_verdict", "apply_fleet_rules", "adjust_pvalues", "escalate_persistent_refit"]


def _fmt_p(p: float) -> str:
    if p is None or np.isnan(p):
        return "n/a"
    return "< 0.001" if p < 0.001 else f"= {p:.3f}"


def _why_failed(check: CheckResult, threshold: float, adjusted: bool) -> str:
    dist, ind = check.gate_flags(threshold, adjusted)
    parts = []
    if dist:
        where = f" (largest at alpha {check.alpha_max:g}, beta {check.beta_max:g})" if np.isfinite(check.alpha_max) else ""
        deciding = check.gate.get("deciding") or {}
        cells = f": {deciding['sentence']}" if deciding.get("sentence") else ""
        on = f" on the {deciding['kind']} cells" if deciding.get("kind") else ""
        parts.append(
            f"the residual distribution departs from the assumed {check.noise.get('law', 'noise')} law{cells} "
            f"(T {check.t_at_max:.1f} against a critical value of {check.critical_value:.1f}{on}{where}, p {_fmt_p(check.p_distribution)})"
        )
    if ind:
        lb = check.ljung_box
        parts.append(
            f"the residuals are autocorrelated (Ljung-Box Q {lb.get('statistic', float('nan')):.1f} on {lb.get('lags')} lags, "
            f"p {_fmt_p(check.p_independence)}; largest |autocorrelation| {check.effect_acf:.2f})"
        )
    return " and ".join(parts) if parts else "no gate was flagged"


def _summary_pass(check: CheckResult) -> str:
    deciding = check.gate.get("deciding") or {}
    on = f" on the {deciding['kind']} cells" if deciding.get("kind") else ""
    beyond = check.t_at_max > check.critical_value
    return (
        f"the distribution gate finds no departure from the assumed law (largest standardised statistic: T {check.t_at_max:.1f} "
        f"against a critical value of {check.critical_value:.1f}{on}, p {_fmt_p(check.p_distribution)}"
        + (", not significant after the adjustment across the run" if beyond else "")
        + f") and Ljung-Box finds no autocorrelation (p {_fmt_p(check.p_independence)})"
    )


def decide_verdict(production: CheckResult | None, refit: CheckResult | None, threshold: float, adjusted: bool = False) -> tuple[str, tuple]:
    """Verdict and plain-language reasons from the two checks (docs/method.md §10.2).

    With a production check: ``pass`` if it passes, else ``refit`` if the refit check passes,
    else ``respecify``; without one, ``pass`` or ``respecify`` from the refit check.  A check
    that could not run makes the verdict ``insufficient`` or ``error`` with its message.  Without
    a refit check (a forecast audit) the verdict is
    :func:`fitaudit.core.forecasts.forecast_verdict` of the production check.

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
        One plain sentence each, with the numbers behind the verdict.
    """
    if refit is None:
        from .forecasts import forecast_verdict

        return forecast_verdict(production, threshold, adjusted)
    if production is not None:
        if not production.ok:
            return production.status, (f"The production check could not run: {production.message}",)
        if production.passed(threshold, adjusted):
            reasons = [f"The production parameters still describe the audit window of {production.n} observations: {_summary_pass(production)}."]
            if not refit.ok:
                reasons.append(f"The refit check could not run ({refit.status}): {refit.message}")
            return "pass", tuple(reasons)
        first = f"The production parameters no longer fit the audit window of {production.n} observations: {_why_failed(production, threshold, adjusted)}."
        if not refit.ok:
            return refit.status, (first, f"The refit check could not run: {refit.message}")
        if refit.passed(threshold, adjusted):
            return "refit", (first, f"Re-estimating the same model fixes it: {_summary_pass(refit)}; promote the refitted parameters.")
        return "respecify", (first, f"Refitting does not help: {_why_failed(refit, threshold, adjusted)}; the model class no longer describes the series and needs a person to choose a new specification.")
    if not refit.ok:
        return refit.status, (f"The refit check could not run: {refit.message}",)
    if refit.passed(threshold, adjusted):
        return "pass", (f"The refitted model describes the series ({refit.n} residuals): {_summary_pass(refit)}.",)
    return "respecify", (f"The refitted model does not describe the series: {_why_failed(refit, threshold, adjusted)}; the model class needs a person to choose a new specification.",)


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
        raise InputError(f"Unknown p-value adjustment {method!r}; valid methods are {', '.join(repr(m) for m in ADJUSTMENTS)}.")
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
            f"escalate_persistent_refit: unknown verdict(s) {unknown}; valid verdicts are {', '.join(repr(v) for v in VERDICTS)}."
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
            verdict, reasons = decide_verdict(res.production, res.refit, threshold if threshold is not None else res.deciding_check.settings_level, adjusted=use_adjusted)
            if use_adjusted:
                reasons = reasons + (f"p-values were adjusted across the run's {len(pvals)} checks ({ADJUSTMENT_LABELS.get(method, method)}, q = {q:g}).",)
            escalated = False
            if verdict == "refit" and escalate_persistent_refit(list(histories[i]), verdict, k=k, n=n):
                verdict, escalated = "respecify", True
                reasons = reasons + (f"A refit was also needed in earlier audits ({k} of the last {n} including this one), so the model is escalated for respecification.",)
            res = dataclasses.replace(res, verdict=verdict, reasons=reasons, escalated=escalated)
        out.append(res)
    return out
