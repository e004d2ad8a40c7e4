"""The two checks of an audit and how a check is scored (docs/method.md §1, §7 and §9).

* the **production check** (:func:`_production_steps`): frozen production parameters make
  one-step forecasts; the errors of the audit window go through the noise law's PIT and are
  scored with an exact simulated null (:func:`score_frozen`, shared with forecast audits);
* the **refit check** (:func:`_refit_steps`): the model is re-estimated on the fit window, the
  noise parameters too, and its residuals are scored against the null of re-estimated
  parameters (simulated, parametric bootstrap or asymptotic with the Nikulin-Rao-Robson term).

:func:`_score_steps` is the shared scorer: partitions and the gate's members, the divergence
map, calibration, the Ljung-Box independence gate, effect sizes and the report's plot data.  The
checks are steps (generators, :mod:`fitaudit.core.lockstep`): they pause for their cell counts,
map and gate statistics, which a batch of audits has computed together.
"""

from __future__ import annotations

import hashlib
import warnings
from collections.abc import Mapping
from typing import Any

import numpy as np

from .calibration import (
    CalibrationCache,
    Gate,
    NullTable,
    bootstrap_table,
    chi2_critical_value,
    chi2_p_value,
    describe_key,
    independence_table,
    key_rng,
    nrr_term,
    settings_production_table,
    settings_refit_table,
    standardised_maximum,
)
from .cells import cell_counts, number_of_cells
from .diagnostics import acf, ljung_box, ljung_box_lags, mcleod_li
from .divergence import divergence_map
from .exceptions import ConvergenceWarning, FitauditError, InputError, InsufficientDataError
from .lockstep import MapRequest, Steps, run_steps
from .noise import NoiseLaw, NoiseParams
from .plotdata import plot_data
from .results import CheckResult, _rounded
from .settings import AuditSettings

__all__ = ["score_frozen", "score_frozen_steps", "MAGNITUDE_RANGE"]


def _digest(*arrays: np.ndarray) -> str:
    h = hashlib.sha256()
    for a in arrays:
        h.update(np.ascontiguousarray(a, dtype=float).tobytes())
    return h.hexdigest()[:16]


def _slice_exog(exog: Mapping[str, np.ndarray] | None, sl: slice) -> dict | None:
    if exog is None:
        return None
    return {k: np.asarray(v, dtype=float)[sl] for k, v in exog.items()}


def _deciding_partition(part, obs: np.ndarray) -> dict:
    """The cell of ``part`` whose count ``obs`` departs most from its expectation, in plain words.

    The departure is measured by the Pearson residual ``(O - E) / sqrt(E)``; the sentence reads
    e.g. "the lowest 0.5 % of the assumed law holds 6 errors where 1.0 were expected".
    """
    exp = part.probs * obs.sum()
    j = int(np.argmax(np.abs(obs - exp) / np.sqrt(exp)))
    return {
        "kind": part.kind,
        "cells": part.s,
        "cell": j,
        "observed": int(obs[j]),
        "expected": round(float(exp[j]), 2),
        "sentence": (
            f"{part.describe_cell(j)} of the assumed law holds {int(obs[j])} errors where {exp[j]:.1f} were expected"
        ),
    }


def _score_steps(
    kind: str,
    e: np.ndarray,
    u: np.ndarray,
    law: NoiseLaw,
    nparams: NoiseParams,
    k: int,
    model_df: int,
    period: int,
    settings: AuditSettings,
    table_for: Any,
    window: dict,
    cache: CalibrationCache | None = None,
) -> Steps[CheckResult]:
    """Score residuals ``e`` with PIT values ``u``: partitions, map, calibration, independence.

    The distribution gate is the standardised maximum of the gate's members over its partitions
    (:meth:`AuditSettings.gate`); the full (alpha, beta) map on the equiprobable cells is the
    report's picture of where the law fails, with its own simultaneous boundary.  The cell
    counts, the map and the gate's statistics are requested (:mod:`fitaudit.core.lockstep`), so
    that many checks have them computed together.
    """
    n = e.size
    s = number_of_cells(n, k)
    gate = settings.gate(n, k)
    lags = settings.lb_lags or ljung_box_lags(n, period if period > 1 else settings.season, model_df)
    lags = min(lags, n - 1)
    plot_lags = max(lags, min(2 * period, n // 4) if period > 1 else lags)
    scored = yield MapRequest(
        u,
        s,
        gate,
        settings.alphas,
        settings.betas,
        settings.scaling,
        settings.r,
        errors=e,
        lags=plot_lags if lags >= 1 else None,  # else the gates below say what is wrong, as alone
    )
    counts, dmap, g_obs = scored.counts, scored.map, scored.gate_statistics  # g_obs: (P, G)
    part_counts = scored.partition_counts
    cov, cov_sq = scored.autocovariances, scored.square_autocovariances
    t_obs = dmap.t_max
    calib: dict = {"method": settings.calibration}
    half = settings.level / 2
    if settings.calibration == "asymptotic" or table_for is None:
        # chi-square(s_p - 1) per partition, with the Nikulin-Rao-Robson term for estimated noise
        # parameters; Bonferroni over the partitions (a fast screen: liberal, docs/validation.md)
        extras = np.zeros(len(gate.partitions))
        if kind == "refit" and law.has_fisher_information and k > 0:
            info = law.fisher_information(nparams)
            for i, part in enumerate(gate.partitions):
                grad = law.cell_probability_gradient(
                    np.asarray(part.boundaries) if not part.equiprobable else part.s, nparams
                )
                extras[i] = nrr_term(part_counts[i], info, grad, part.probs)
            calib["nrr_terms"] = [float(x) for x in extras]
        dfs = np.array([p.s - 1 for p in gate.partitions])
        crit = np.array([chi2_critical_value(half, int(d)) for d in dfs])
        with np.errstate(invalid="ignore"):
            g_tot = g_obs + extras[:, None]
        gate_reference = np.repeat(crit[:, None], g_obs.shape[1], axis=1)
        finite = np.where(np.isfinite(g_tot), g_tot, -np.inf).max(axis=1)
        p_parts = [chi2_p_value(float(t), int(d)) if np.isfinite(t) else 1.0 for t, d in zip(finite, dfs)]
        p_dist = float(min(1.0, len(p_parts) * min(p_parts)))
        gate_crit = gate_reference
        r_obs = float(standardised_maximum(g_tot, gate_reference))
        map_extra = 0.0
        if kind == "refit" and law.has_fisher_information and k > 0:
            map_extra = nrr_term(counts, law.fisher_information(nparams), law.cell_probability_gradient(s, nparams))
            calib["nrr_term"] = map_extra
        c = chi2_critical_value(half, s - 1)
        reference = np.full(dmap.statistic.shape, c)
        crit_grid = reference - map_extra
        calib.update(
            {"method": "asymptotic", "reference": "chi-square(s - 1) per partition, Bonferroni over partitions"}
        )
        g_ratio_src = g_tot
    else:
        table: NullTable = table_for(n, s, gate)
        reference = table.reference
        crit_grid = reference * table.critical_value(half)
        gate_reference = table.gate_reference
        r_obs = float(standardised_maximum(g_obs, gate_reference))
        p_dist = table.gate_p_value(r_obs)
        gate_crit = gate_reference * table.gate_critical_value(half)
        calib.update({"method": table.method, "replicates": table.replicates, "table": describe_key(table.key)})
        g_ratio_src = g_obs
    with np.errstate(invalid="ignore", divide="ignore"):
        scaled = np.where(np.isfinite(dmap.statistic) & np.isfinite(crit_grid), dmap.statistic / crit_grid, np.nan)
        ratio = np.where(np.isfinite(g_ratio_src) & np.isfinite(gate_reference), g_ratio_src / gate_reference, -np.inf)
    deciding: dict = {}
    if np.isfinite(ratio).any():
        ip, ig = np.unravel_index(int(np.argmax(ratio)), ratio.shape)
        a_max, b_max = gate.alphas[ig], gate.betas[ig]
        t_at, crit_at = float(g_obs[ip, ig]), float(gate_crit[ip, ig])
        deciding = _deciding_partition(gate.partitions[ip], part_counts[ip])
    else:
        a_max = b_max = t_at = crit_at = float("nan")
    partitions = []
    for i, part in enumerate(gate.partitions):
        row = part.to_dict()
        row["counts"] = [int(c) for c in part_counts[i]]
        with np.errstate(invalid="ignore", divide="ignore"):
            row["standardised"] = (
                float(np.max(np.where(np.isfinite(ratio[i]), ratio[i], -np.inf)))
                if np.isfinite(ratio[i]).any()
                else None
            )
        partitions.append(row)
    gate_info = {
        "members": [[float(a), float(b)] for a, b in zip(gate.alphas, gate.betas)],
        "statistics": _rounded(g_obs),
        "critical": _rounded(gate_crit),
        "partitions": partitions,
        "deciding": deciding,
    }
    lb = ljung_box(e, lags, model_df=model_df if kind == "refit" else 0, given=cov)
    ml = mcleod_li(e, lags, given=cov_sq)
    r = acf(e, lags, given=cov)
    effect_acf = float(np.max(np.abs(r[1:]))) if lags >= 1 else float("nan")
    lb_dict = lb.to_dict()
    p_ind = lb.p_value
    if kind == "production" and settings.calibration != "asymptotic" and law.iid_errors:
        # frozen parameters: the errors are i.i.d. under the null, so the statistic's exact null is simulated
        table_lb = independence_table(n, lags, settings.replicates, settings.seed, cache)
        p_ind = table_lb.p_value(lb.statistic)
        lb_dict = dict(
            lb_dict, p_value=p_ind, p_value_chi2=lb.p_value, reference=f"simulated (R={table_lb.replicates})"
        )
    p_comb = float(min(1.0, 2.0 * min(p_dist, p_ind)))
    members = {}
    for name, value in dmap.members.items():
        members[name] = {"statistic": float(value), "p_value_chi2": chi2_p_value(float(value), s - 1)}
    return CheckResult(
        kind=kind,
        status="ok",
        n=n,
        cells=s,
        k=k,
        noise=nparams.to_dict(),
        map=dmap,
        t_max=float(t_obs),
        r_max=float(r_obs),
        alpha_max=float(a_max),
        beta_max=float(b_max),
        t_at_max=t_at,
        critical_value=crit_at,
        critical_grid=crit_grid,
        scaled_grid=scaled,
        p_distribution=float(p_dist),
        calibration=calib,
        members=members,
        ljung_box=lb_dict,
        mcleod_li=ml.to_dict(),
        p_independence=float(p_ind),
        p_value=p_comb,
        effect_divergence=float(t_obs / (2.0 * n)) if np.isfinite(t_obs) else float("inf"),
        effect_acf=effect_acf,
        counts=tuple(int(c) for c in counts),
        gate=gate_info,
        window=window,
        plots=plot_data(e, law, nparams, plot_lags, autocovariances=cov),
        settings_level=settings.level,
        practical=(settings.practical_divergence, settings.practical_acf),
    )


def score_frozen(
    e: np.ndarray,
    u: np.ndarray,
    law: NoiseLaw,
    nparams: NoiseParams,
    period: int,
    settings: AuditSettings,
    cache: CalibrationCache | None,
    window: dict,
    kind: str = "production",
) -> CheckResult:
    """Score PIT values ``u`` of errors ``e`` whose law was fixed before the data were seen.

    The production check (frozen parameters) and forecast audits (stated predictive laws) share
    this path: nothing is estimated from ``u``, so its null is exact (i.i.d. U(0, 1) PIT values,
    docs/method.md §7.2) and one table per window length serves a whole run.

    Parameters
    ----------
    e : ndarray, shape (n,)
        The errors (for the independence gate, effect sizes and plots).
    u : ndarray, shape (n,)
        Their PIT values under the fixed law.
    law : NoiseLaw
    nparams : NoiseParams
        The fixed noise parameters (reported with the check).
    period : int
        Seasonal period (Ljung-Box lags, docs/method.md §9.2).
    settings : AuditSettings
    cache : CalibrationCache or None
        Shared null tables.
    window : dict
        The window scored (``first``, ``last``, ``length``), reported with the check.
    kind : str, default "production"
        The check's name.

    Returns
    -------
    CheckResult
    """
    return run_steps(score_frozen_steps(e, u, law, nparams, period, settings, cache, window, kind))


def score_frozen_steps(
    e: np.ndarray,
    u: np.ndarray,
    law: NoiseLaw,
    nparams: NoiseParams,
    period: int,
    settings: AuditSettings,
    cache: CalibrationCache | None,
    window: dict,
    kind: str = "production",
) -> Steps[CheckResult]:
    """:func:`score_frozen` as steps (:mod:`fitaudit.core.lockstep`)."""
    table_for = None
    if settings.calibration != "asymptotic":

        def table_for(n, s, gate):
            return settings_production_table(settings, n, s, gate, cache)

    return (yield from _score_steps(kind, e, u, law, nparams, 0, 0, period, settings, table_for, window, cache))


def _failed_check(kind: str, exc: BaseException, window: dict | None = None, label: str | None = None) -> CheckResult:
    status = "insufficient" if isinstance(exc, InsufficientDataError) else "error"
    msg = str(exc) or type(exc).__name__
    if not isinstance(exc, FitauditError):
        msg = f"{type(exc).__name__}: {msg}"
    if label and label not in msg:  # messages raised by a model or law name the spec, not the model entry
        msg = f"{label}: {msg}"
    return CheckResult(kind=kind, status=status, message=msg, window=window or {})


#: Magnitudes the fits accept: squares (and sums of squares) outside this range overflow or underflow float64.
MAGNITUDE_RANGE = (1e-150, 1e150)


def _check_inputs(y: np.ndarray, exog: Mapping[str, np.ndarray] | None, law: NoiseLaw, label: str) -> None:
    """Refuse data the numerics cannot handle, with the fix.

    Magnitudes outside :data:`MAGNITUDE_RANGE` and non-counts under a count law are refused.
    """
    low, high = MAGNITUDE_RANGE
    columns = [("the series", y)] + [
        (f"exogenous column {k!r}", np.asarray(v, dtype=float)) for k, v in (exog or {}).items()
    ]
    for i, (name, values) in enumerate(columns):
        big = float(np.max(np.abs(values))) if values.size else 0.0
        if big > high or (i == 0 and 0.0 < big < low):
            side = (
                f"as large as {big:.3g}; above {high:g}" if big > high else f"no larger than {big:.3g}; below {low:g}"
            )
            raise InputError(
                f"{label}: {name} holds values {side} their squares leave the range of double precision and no fit "
                "can run. Rescale the column in the extract (e.g. record thousands, millions or millionths of the "
                "unit)."
            )
    law.check_observations(y, label)


def _production_steps(
    model, y, exog, params, law_prod: NoiseLaw, settings, cache, label
) -> Steps[tuple[CheckResult, np.ndarray | None, NoiseParams | None]]:
    """The production check (its steps): the check, the one-step errors of the whole series and
    the frozen noise parameters (None for both when the check failed)."""
    n_all = y.size
    w = settings.audit_window
    window = {"first": n_all - w, "last": n_all - 1, "length": w}
    try:
        if w > n_all:
            raise InsufficientDataError(
                f"{label}: the audit window ({w} observations) is longer than the series ({n_all}); "
                "shorten the audit window or load more history."
            )
        errors = model.production_errors(y, params, exog)
        tail = np.asarray(errors[-w:], dtype=float)
        if np.isnan(tail).any():
            raise InsufficientDataError(
                f"{label}: {int(np.isnan(tail).sum())} of the {w} audit-window errors are undefined "
                "(lost to differencing or lags); load more history before the audit window."
            )
        if not np.isfinite(tail).all():
            raise InputError(
                f"{label}: the production parameters give infinite forecast errors; check the parameter version."
            )
        nparams = law_prod.frozen_params(params, tail, y=y[-w:], label=label)
        # the generator is used by count laws only (the randomised PIT), seeded by the data
        u = law_prod.pit(tail, nparams, key_rng(settings.seed, "pit", "production", _digest(y)), y=y[-w:])
        check = yield from score_frozen_steps(
            tail, u, law_prod, nparams, model.seasonal_period(), settings, cache, window
        )
        return check, np.asarray(errors, dtype=float), nparams
    except (FitauditError, ValueError, FloatingPointError, np.linalg.LinAlgError, ArithmeticError) as exc:
        return _failed_check("production", exc, window, label), None, None


def fit_window(n_all: int, settings) -> slice:
    """The refit check's fit window of a series of ``n_all`` values: its last ``settings.fit_window``
    values (all of them when unset or longer)."""
    return slice(n_all - min(settings.fit_window or n_all, n_all), n_all)


def refit_model(model, y: np.ndarray, exog, settings):
    """:meth:`ForecastModel.fit` on the fit window (:func:`fit_window`), convergence warnings
    silenced (the refit check reports ``fit.converged`` itself), without standard errors (the
    audit reads none)."""
    sl = fit_window(y.size, settings)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        return model.fit(y[sl], _slice_exog(exog, sl), standard_errors=False)


def _refit_steps(model, y, exog, law: NoiseLaw, settings, cache, label, fit=None) -> Steps[tuple[CheckResult, Any]]:
    """The refit check (its steps) and the fit; ``fit``, when given, is :func:`refit_model`'s result
    for the same model and data (the candidate search scores one fit under several noise laws)
    and is not made again."""
    n_all = y.size
    sl = fit_window(n_all, settings)
    window = {"first": sl.start, "last": n_all - 1, "length": n_all - sl.start}
    try:
        yf = y[sl]
        xf = _slice_exog(exog, sl)
        if fit is None:
            fit = refit_model(model, y, exog, settings)
        if not fit.converged:
            detail = fit.message or "no message from the optimiser"
            raise FitauditError(
                f"{label}: the refit of {model.describe()} did not converge ({detail}). "
                "Check the series for level shifts or outliers, or simplify the orders."
            )
        e_all = np.asarray(fit.residuals, dtype=float)
        defined = ~np.isnan(e_all)
        e = e_all[defined]
        if not np.isfinite(e).all():
            raise InputError(f"{label}: the refit produced infinite residuals; the series may contain extreme values.")
        location = model.has_location()
        nparams = law.fit_errors(e, location, y=yf[defined])
        k = len(nparams.estimated)
        u = law.pit(e, nparams, key_rng(settings.seed, "pit", "refit", _digest(y)), y=yf[defined])
        table_for = None
        if not law.pivotal:
            # no pivotal null after re-estimation (a count law's depends on the means): the
            # randomised PIT values are scored against the exact null of frozen parameters
            if settings.calibration != "asymptotic":

                def table_for(n, s, gate):
                    return settings_production_table(settings, n, s, gate, cache)
        else:
            if settings.calibration == "simulated":

                def table_for(n, s, gate):
                    return settings_refit_table(settings, law, n, s, location, gate, shape=nparams.shape, cache=cache)
            elif settings.calibration == "bootstrap":

                def table_for(n, s, gate):
                    simulated = settings_refit_table(
                        settings, law, n, s, location, gate, shape=nparams.shape, cache=cache
                    )
                    return _bootstrap(model, fit, law, nparams, yf, xf, n, s, location, settings, simulated, gate)

        check = yield from _score_steps(
            "refit",
            e,
            u,
            law,
            nparams,
            k,
            model.n_dynamic_params(),
            model.seasonal_period(),
            settings,
            table_for,
            window,
        )
        return check, fit
    except (FitauditError, ValueError, FloatingPointError, np.linalg.LinAlgError, ArithmeticError) as exc:
        return _failed_check("refit", exc, window, label), fit


def _bootstrap(
    model,
    fit,
    law: NoiseLaw,
    nparams: NoiseParams,
    yf,
    xf,
    n: int,
    s: int,
    location: bool,
    settings: AuditSettings,
    simulated: NullTable,
    gate: Gate,
) -> NullTable:
    """Parametric bootstrap of the refit check: simulate the fitted model, refit, rescore."""
    rng = key_rng(settings.seed, "bootstrap", _digest(yf))

    def score(r: np.random.Generator) -> float:
        innov = law.sample(yf.size, r, nparams) - nparams.loc
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                ystar = model.simulate(fit.params, yf.size, r, exog=xf, innovations=innov)
                f2 = model.fit(ystar, xf, standard_errors=False)
            e2 = np.asarray(f2.residuals, dtype=float)
            e2 = e2[~np.isnan(e2)]
            p2 = law.fit_errors(e2, location)
            u2 = law.pit(e2, p2)
            counts = cell_counts(u2, s)
            grid = divergence_map(
                counts,
                np.full(s, 1.0 / s),
                settings.alphas,
                settings.betas,
                settings.scaling,
                settings.r,
                members=False,
            ).statistic
            return grid, gate.statistics(u2)
        except (FitauditError, ValueError, np.linalg.LinAlgError, ArithmeticError):
            return None

    key = ("bootstrap", f"data={_digest(yf)}", f"n={n}", f"s={s}", f"R={settings.bootstrap_replicates}", gate.key())
    return bootstrap_table(
        score, settings.bootstrap_replicates, rng, simulated.reference, key=key, gate_reference=simulated.gate_reference
    )
