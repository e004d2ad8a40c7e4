"""Candidate search for respecification.

When even the refitted model fails (verdict ``respecify``), a person must choose a new
specification.  :func:`search_candidates` helps by refitting a small set of neighbouring
specifications (orders one step up or down, trend and seasonal variants) and other noise laws,
auditing each with the refit check, and listing those that pass, best first: smallest
``max(T / critical value)`` over the divergence map, then lowest AIC.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from .audit import audit_series, audit_series_steps
from .calibration import CalibrationCache
from .checks import refit_model
from .exceptions import FitauditError
from .lockstep import lockstep
from .models import FitResult, ForecastModel, as_model, model_from_dict
from .noise import NOISE_LAWS
from .results import CheckResult
from .settings import AuditSettings

__all__ = ["Candidate", "independence_flagged", "neighbour_specs", "search_candidates"]

#: The laws tried by default for a continuous series: every registered law that is not a count law.
CONTINUOUS_LAWS = tuple(name for name, law in NOISE_LAWS.items() if not law.discrete)


@dataclass(frozen=True)
class Candidate:
    """One scored candidate specification."""

    spec: dict
    spec_text: str
    noise: str
    verdict: str
    passed: bool
    p_value: float
    scaled_max: float
    aic: float
    reason: str

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {
            "spec": self.spec,
            "spec_text": self.spec_text,
            "noise": self.noise,
            "verdict": self.verdict,
            "passed": self.passed,
            "p_value": None if np.isnan(self.p_value) else float(self.p_value),
            "scaled_max": None if not np.isfinite(self.scaled_max) else float(self.scaled_max),
            "aic": None if not np.isfinite(self.aic) else float(self.aic),
            "reason": self.reason,
        }


def _arima_neighbours(d: dict) -> Iterable[dict]:
    p, dd, q = d.get("order", (0, 0, 0))
    P, D, Q, m = d.get("seasonal", (0, 0, 0, 0)) or (0, 0, 0, 0)
    for dp, dq in ((1, 0), (-1, 0), (0, 1), (0, -1), (1, 1)):
        if p + dp >= 0 and q + dq >= 0 and p + dp <= 5 and q + dq <= 5:
            yield {**d, "order": [p + dp, dd, q + dq]}
    if m and m > 1:
        for dP, dQ in ((1, 0), (0, 1), (-1, 0), (0, -1)):
            if P + dP >= 0 and Q + dQ >= 0 and P + dP <= 2 and Q + dQ <= 2:
                yield {**d, "seasonal": [P + dP, D, Q + dQ, m]}
        if D == 0:
            yield {
                **d,
                "seasonal": [P, 1, Q if Q else 1, m],
                "trend": "n" if d.get("trend") in ("c", "n", None) else d.get("trend"),
            }


def _smoothing_neighbours(d: dict) -> Iterable[dict]:
    trend, damped, seasonal, period = d.get("trend"), d.get("damped", False), d.get("seasonal"), d.get("period")
    if trend is None:
        yield {**d, "trend": "add", "damped": False}
    else:
        yield {**d, "damped": not damped}
        yield {**d, "trend": None, "damped": False}
    if period:
        for alt in (None, "add", "mul"):
            if alt != seasonal:
                yield {**d, "seasonal": alt}


def _nonlinear_neighbours(d: dict) -> Iterable[dict]:
    lags = list(d.get("lags") or ())
    if d.get("function") == "setar" and lags:
        yield {**d, "lags": lags + [lags[-1] + 1]}
        if len(lags) > 1:
            yield {**d, "lags": lags[:-1]}


def neighbour_specs(spec: ForecastModel | Mapping[str, Any]) -> list[dict]:
    """Specifications one step away from ``spec`` (as dicts), without duplicates or ``spec`` itself.

    ARIMA: AR/MA orders +-1 (and both +1), seasonal orders +-1, seasonal differencing added;
    exponential smoothing: trend added/removed/damped, seasonal variants; threshold AR: one lag
    more or fewer.  User-defined nonlinear functions have no structural neighbours.
    """
    model = as_model(spec)
    base = model.to_dict()
    family = base["family"]
    gen = {"arima": _arima_neighbours, "smoothing": _smoothing_neighbours, "nonlinear-ar": _nonlinear_neighbours}.get(
        family
    )
    out: list[dict] = []
    seen = {repr(sorted(base.items()))}
    for cand in gen(dict(base)) if gen else ():
        key = repr(sorted(cand.items()))
        if key in seen:
            continue
        try:
            model_from_dict(cand)
        except Exception:  # an invalid neighbour (e.g. trend eliminated by differencing) is skipped
            continue
        seen.add(key)
        out.append(cand)
    return out


def _spec_fit(y, model: ForecastModel, exog, settings: AuditSettings) -> FitResult | None:
    """The failing specification's refit, shared by the trials that change only its noise law
    (a model's fit does not depend on the law); None when it fails: each trial then fits and
    reports the failure itself."""
    try:
        x = None if exog is None else {k: np.asarray(v, dtype=float) for k, v in dict(exog).items()}
        return refit_model(model, np.asarray(y, dtype=float), x, settings)
    except (FitauditError, ValueError, TypeError, FloatingPointError, np.linalg.LinAlgError, ArithmeticError):
        return None


def independence_flagged(check: CheckResult | None) -> bool:
    """Whether a refit check ran and flags its independence gate (at the check's own level): what
    the candidate search asks first of the failing specification (see ``skip_futile``)."""
    return check is not None and check.ok and check.gate_flags()[1]


def _independence_rejects(
    y, model: ForecastModel, noise, exog, settings: AuditSettings, cache, fit: FitResult | None = None
) -> bool:
    """Whether the refit check of ``model`` (with its own law) flags the independence gate."""
    res = audit_series(
        y, model.to_dict(), noise=noise, exog=exog, production=None, settings=settings, cache=cache, fit=fit
    )
    return independence_flagged(res.refit)


def search_candidates(
    y,
    spec: ForecastModel | Mapping[str, Any],
    noise: str | Mapping[str, Any] = "normal",
    exog=None,
    settings: AuditSettings | None = None,
    *,
    specs: Sequence[Mapping[str, Any]] | None = None,
    laws: Sequence[str] | None = None,
    cache: CalibrationCache | None = None,
    skip_futile: bool = True,
    independence: bool | None = None,
) -> list[Candidate]:
    """Score neighbouring specifications and other noise laws; return the passing ones, best first.

    Parameters
    ----------
    y, exog : the series and its exogenous inputs (as for :func:`audit_series`).
    spec, noise : the failing specification and its noise law.
    settings : AuditSettings, optional
        The refit check's settings (the production check is not run); default ``AuditSettings()``.
    specs : list of dict, optional
        Candidate specifications; default :func:`neighbour_specs` of ``spec``.
    laws : list of str, optional
        Other noise laws tried with the original spec; default the continuous laws.
    skip_futile : bool, default True
        Do not try other laws when the original spec's independence gate rejects: the laws share
        the spec's residuals and the Ljung-Box gate looks only at them (docs/method.md §9), so no
        law can pass and the list returned is the same; it saves their fits and, for a law whose
        shape is estimated, its null table.
    independence : bool, optional
        Whether the refit check of ``spec`` with ``noise`` flags its independence gate
        (:func:`independence_flagged`), when the caller's audit of the same series with the same
        settings already holds that check; the search then neither checks it again nor, when it
        flags, refits the spec.  None: the search refits the spec and checks it itself.

    Returns
    -------
    list of Candidate
        Only candidates whose refit check passes, sorted by ``max(T / critical value)`` then AIC.
    """
    model = as_model(spec)
    noise_name = noise if isinstance(noise, str) else str(dict(noise).get("law"))
    cache = cache if cache is not None else CalibrationCache()
    settings = settings if settings is not None else AuditSettings()
    trials: list[tuple[dict, Any, FitResult | None]] = [
        (s_, noise, None) for s_ in (specs if specs is not None else neighbour_specs(model))
    ]
    other_laws = [law for law in (laws if laws is not None else CONTINUOUS_LAWS) if law != noise_name]
    if other_laws and skip_futile and independence:
        other_laws = []
    spec_fit = _spec_fit(y, model, exog, settings) if other_laws else None
    if other_laws and skip_futile and independence is None:
        if _independence_rejects(y, model, noise, exog, settings, cache, spec_fit):
            other_laws = []
    trials += [(model.to_dict(), law, spec_fit) for law in other_laws]
    audits = [
        audit_series_steps(
            y, dict(cand_spec), noise=cand_noise, exog=exog, production=None, settings=settings, cache=cache, fit=fit
        )
        for cand_spec, cand_noise, fit in trials
    ]
    scored = []
    # side by side: the trials' maps and gates are computed together (the same results as one by one)
    for (cand_spec, cand_noise, _), res in zip(trials, lockstep(audits)):
        chk = res.refit
        scaled = (
            float(np.nanmax(chk.scaled_grid))
            if chk.ok and chk.scaled_grid is not None and np.isfinite(chk.scaled_grid).any()
            else float("inf")
        )
        cand_model = as_model(cand_spec)
        scored.append(
            Candidate(
                spec=cand_model.to_dict(),
                spec_text=cand_model.describe(),
                noise=cand_noise if isinstance(cand_noise, str) else str(dict(cand_noise).get("law")),
                verdict=res.verdict,
                passed=res.verdict == "pass",
                p_value=float(chk.p_value) if chk.ok else float("nan"),
                scaled_max=scaled,
                aic=float(res.fitted.get("aic", float("inf"))) if res.fitted else float("inf"),
                reason=res.reasons[0] if res.reasons else "",
            )
        )
    passing = [c for c in scored if c.passed]
    return sorted(passing, key=lambda c: (c.scaled_max, c.aic))
