"""The audit protocol: production check, refit check, verdict (docs/method.md §1 and §10).

For one series and its model entry, :func:`audit_series`

1. runs the **production check** (when a production parameter version is given): the frozen
   parameters make one-step forecasts over the whole series; the errors of the audit window (the
   tail) go through the PIT of the noise law with the production variance, are counted in
   equiprobable cells and scored by the divergence map; a Ljung-Box test checks independence;
2. runs the **refit check**: the model is re-estimated on the fit window and its in-sample
   innovations are scored the same way, with the noise parameters re-estimated;
3. reaches a **verdict**: with a production version, ``pass`` if the production check passes,
   otherwise ``refit`` if the refit check passes, otherwise ``respecify``; without one, ``pass``
   or ``respecify`` from the refit check; ``insufficient`` (too little data) and ``error`` (with
   the message) when a check cannot run.

A check fails when its distribution gate or its independence gate fails, Bonferroni across the
two: its p-value is ``min(1, 2 min(p_distribution, p_independence))``.  Across a run,
:func:`apply_fleet_rules` adjusts these p-values (Benjamini-Hochberg by default) and escalates a
``refit`` verdict that keeps recurring to ``respecify``.

This module holds the pipeline of one series; the pieces live where their names say:
:mod:`~fitaudit.core.settings` (:class:`AuditSettings`, the gate's defaults),
:mod:`~fitaudit.core.results` (:class:`CheckResult`, :class:`AuditResult`),
:mod:`~fitaudit.core.checks` (the two checks, the scorer, the bootstrap),
:mod:`~fitaudit.core.plotdata` (the report's chart data),
:mod:`~fitaudit.core.verdict` (verdicts, reasons and the fleet rules) and
:func:`~fitaudit.core.calibration.prepare_calibration` (a run's null tables, built once).  Every
name is re-exported here, so ``from fitaudit.core.audit import ...`` keeps working.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Mapping
from typing import Any

import numpy as np

from ._plain import plain_data
from .calibration import CalibrationCache, prepare_calibration
from .change import locate_change
from .checks import MAGNITUDE_RANGE, _check_inputs, _failed_check, _production_steps, _refit_steps, score_frozen
from .exceptions import FitauditError, InputError
from .forecasts import audit_forecasts
from .lockstep import Steps, Waited, lockstep, run_steps
from .models import FitResult, as_model, check_series, exog_matrix
from .noise import as_noise_law
from .plotdata import error_effects, iso_date
from .results import AuditResult, CheckResult
from .settings import DEFAULT_GATE_MEMBERS, DEFAULT_PARTITIONS, AuditSettings
from .verdict import apply_fleet_rules, decide_verdict

__all__ = [
    "AuditSettings",
    "CheckResult",
    "AuditResult",
    "audit_series",
    "audit_series_steps",
    "lockstep",
    "apply_fleet_rules",
    "prepare_calibration",
    "as_model",
    "as_noise_law",
    "audit_forecasts",
    "score_frozen",
    "decide_verdict",
    "DEFAULT_PARTITIONS",
    "DEFAULT_GATE_MEMBERS",
    "MAGNITUDE_RANGE",
]


def audit_series(
    y,
    spec,
    noise="normal",
    exog=None,
    production: Mapping[str, float] | None = None,
    settings: AuditSettings = AuditSettings(),  # noqa: B008 (a frozen dataclass)
    *,
    production_noise: Mapping[str, Any] | None = None,
    cache: CalibrationCache | None = None,
    label: str | None = None,
    timestamps=None,
    fit: FitResult | None = None,
) -> AuditResult:
    """Audit one series: production check, refit check, verdict.

    Parameters
    ----------
    y : array_like, shape (n,)
        The series, oldest first, ending at the as-of date; the audit window is its tail.
    spec : ForecastModel or dict
        The model spec (e.g. ``Arima(order=(1, 0, 1))`` or ``{"family": "arima", ...}``).
    noise : str, dict or NoiseLaw, default "normal"
        The assumed law of the innovations (``{"law": "student-t", "shape": 5}`` fixes a shape).
    exog : mapping of str to array, optional
        Exogenous inputs aligned with ``y``.
    production : dict, optional
        The production version's parameters; None audits the refit only.
    settings : AuditSettings
    production_noise : dict, optional
        Noise parameters stored with the production version (``{"shape": ...}``), used when the
        law's shape is estimated rather than fixed.
    cache : CalibrationCache, optional
        Shared null tables (one per run); a private cache is used when omitted.
    label : str, optional
        Name used in messages (the model id).
    timestamps : array_like, shape (n,), optional
        Timestamps of ``y``; used only to name dates (windows, a located change) in the results
        and reasons (:func:`~fitaudit.core.plotdata.error_effects`).
    fit : FitResult, optional
        The refit of ``spec`` to this ``y`` and ``exog`` (:func:`~fitaudit.core.checks.refit_model`),
        when the caller already has it: used instead of fitting again.  The candidate search
        scores one fit under several noise laws (the model's fit does not depend on the law).

    Returns
    -------
    AuditResult
        Never raises for bad data: problems become ``insufficient`` or ``error`` verdicts with a
        message naming the model and the fix.
    """
    steps = audit_series_steps(
        y,
        spec,
        noise,
        exog,
        production,
        settings,
        production_noise=production_noise,
        cache=cache,
        label=label,
        timestamps=timestamps,
        fit=fit,
    )
    return run_steps(steps)


def audit_series_steps(
    y,
    spec,
    noise="normal",
    exog=None,
    production: Mapping[str, float] | None = None,
    settings: AuditSettings = AuditSettings(),  # noqa: B008 (a frozen dataclass)
    *,
    production_noise: Mapping[str, Any] | None = None,
    cache: CalibrationCache | None = None,
    label: str | None = None,
    timestamps=None,
    fit: FitResult | None = None,
) -> Steps[AuditResult]:
    """:func:`audit_series` as steps (:mod:`fitaudit.core.lockstep`): :func:`~fitaudit.core.lockstep.lockstep`
    runs many audits side by side and scores their checks' maps and gates together, with the
    same results.  The timings count the audit's own work, not its waits for answers."""
    t_start = time.perf_counter()
    waited = Waited()
    cache = cache if cache is not None else CalibrationCache()
    spec_dict: dict = dict(spec) if isinstance(spec, Mapping) else {}
    noise_name = (
        noise
        if isinstance(noise, str)
        else (noise.get("law") if isinstance(noise, Mapping) else getattr(noise, "name", str(noise)))
    )
    try:
        model = as_model(spec)
        spec_dict = model.to_dict()
        label = label or model.describe()
        law = as_noise_law(noise)
        y_arr = check_series(y, label, min_length=2)
        if exog is not None:
            exog_matrix(exog, y_arr.size, label)  # validates lengths and values
            exog = {k: np.asarray(v, dtype=float) for k, v in dict(exog).items()}
        _check_inputs(y_arr, exog, law, label)
    except (FitauditError, ValueError, TypeError) as exc:
        check = _failed_check("refit", exc, label=label)
        return AuditResult(
            verdict=check.status,
            reasons=(f"The audit could not start: {check.message}",),
            production=None,
            refit=check,
            spec=plain_data(spec_dict),
            noise=str(noise_name),
            timings={"total_s": time.perf_counter() - t_start},
        )

    timings = {}
    prod_check = prod_errors = prod_noise = None
    if production is not None:
        t0 = time.perf_counter()
        try:
            shape = (production_noise or {}).get("shape") if law.has_shape else None
            law_prod = as_noise_law(law, shape=shape) if shape is not None else law
            if law_prod.needs_stored_shape:
                raise InputError(
                    f"{label}: the {law.name} law's shape is estimated, but the production version stores none; "
                    "fix the shape in the registry (e.g. df: 5) or store it with the parameter version."
                )
            prod_check, prod_errors, prod_noise = yield from waited.over(
                _production_steps(model, y_arr, exog, dict(production), law_prod, settings, cache, label)
            )
        except FitauditError as exc:
            prod_check = _failed_check("production", exc, label=label)
        timings["production_s"] = time.perf_counter() - t0 - waited.take()

    t0 = time.perf_counter()
    refit_check, fit = yield from waited.over(_refit_steps(model, y_arr, exog, law, settings, cache, label, fit))
    timings["refit_s"] = time.perf_counter() - t0 - waited.take()

    change = None
    if (
        settings.locate_change
        and prod_check is not None
        and prod_check.ok
        and not prod_check.passed(settings.level)
        and prod_errors is not None
        and law.iid_errors
    ):
        try:
            # the errors since the last defined one-step forecast: a break at the start of the
            # audit window is then locatable too (index is a position in the series)
            first = int(np.argmax(~np.isnan(prod_errors)))
            change = locate_change(
                prod_errors[first:],
                noise=law_prod,
                permutations=settings.change_permutations,
                seed=settings.seed,
                cache=cache,
            )
            change = dataclasses.replace(change, index=change.index + first)
        except (FitauditError, ValueError):
            change = None
    times = None if timestamps is None or np.shape(timestamps) != y_arr.shape else np.asarray(timestamps)
    if prod_check is not None and prod_check.ok and prod_errors is not None:
        sigma2 = (production or {}).get("sigma2")
        effects = error_effects(
            prod_errors,
            y_arr,
            prod_check.window["first"],
            sigma2=None if sigma2 is None else float(sigma2),
            change=None if change is None else change.index,
            times=times,
        )
        prod_check = dataclasses.replace(prod_check, effects=effects)
    if refit_check.ok and times is not None and refit_check.window:
        w = refit_check.window
        refit_check = dataclasses.replace(
            refit_check,
            effects={"n": w["length"], "start": iso_date(times[w["first"]]), "end": iso_date(times[w["last"]])},
        )
    verdict, reasons = decide_verdict(prod_check, refit_check, settings.level)
    fitted = {}
    if fit is not None:
        fitted = {
            "params": {k: float(v) for k, v in fit.params.items()},
            "loglik": float(fit.loglik),
            "aic": float(fit.aic),
            "bic": float(fit.bic),
            "sigma2": float(fit.sigma2),
            "nobs": int(fit.nobs),
            "converged": bool(fit.converged),
            "message": str(fit.message),
        }
    timings["total_s"] = time.perf_counter() - t_start - waited.total
    return AuditResult(
        verdict=verdict,
        reasons=reasons,
        production=prod_check,
        refit=refit_check,
        spec=plain_data(spec_dict),
        noise=law.name if law.shape is None or not law.has_shape else f"{law.name}({law.shape:g})",
        fitted=fitted,
        production_params=None if production is None else {k: float(v) for k, v in production.items()},
        change=change,
        timings=timings,
    )
