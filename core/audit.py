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
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import time
import warnings
from dataclasses import dataclass, field
from typing import Any, Mapping, Sequence

import numpy as np

from ._validation import Interval, Options, check_param
from .calibration import (
    CalibrationCache,
    Gate,
    NullTable,
    describe_key,
    independence_table,
    standardised_maximum,
    bootstrap_table,
    chi2_critical_value,
    chi2_p_value,
    key_rng,
    nrr_term,
    production_table,
    refit_table,
)
from .cells import cell_counts, make_partitions, number_of_cells
from .change import ChangeResult, locate_change
from .diagnostics import acf, acf_band, ljung_box, ljung_box_lags, mcleod_li
from .divergence import DEFAULT_ALPHAS, DEFAULT_BETAS, SCALINGS, DivergenceMap, divergence_map
from .exceptions import ConvergenceWarning, FitauditError, InputError, InsufficientDataError
from .fleet import adjust_pvalues, escalate_persistent_refit
from .models import ForecastModel, check_series, exog_matrix, model_from_dict
from .noise import NoiseLaw, NoiseParams, get_law
from .vocabulary import ADJUDICATED_VERDICTS, ADJUSTMENT_LABELS, PARTITION_KINDS, Calibration

__all__ = [
    "AuditSettings",
    "CheckResult",
    "AuditResult",
    "audit_series",
    "apply_fleet_rules",
    "prepare_calibration",
    "as_model",
    "as_noise_law",
]


#: Partitions of the distribution gate, as chosen by the validation study (docs/validation.md).
DEFAULT_PARTITIONS: tuple[str, ...] = ("terciles", "equiprobable", "tails")
#: Members of the distribution gate: likelihood-ratio G2, Cressie-Read 2/3 and Pearson X2
#: (alpha 1, 5/3, 2 with the model scaling m = q, i.e. beta = 0 of the geometric mean).
DEFAULT_GATE_MEMBERS: tuple[tuple[float, float], ...] = ((1.0, 0.0), (5.0 / 3.0, 0.0), (2.0, 0.0))


# --------------------------------------------------------------------------------------------
# Settings
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class AuditSettings:
    """Everything that fixes how a series is audited (hashable, JSON-ready via ``to_dict``).

    Parameters
    ----------
    level : float, default 0.05
        Significance level of a check (Bonferroni-split between its two gates).
    calibration : {"asymptotic", "simulated", "bootstrap"}, default "simulated"
    alphas, betas : tuple of float
        The (alpha, beta) grid of the divergence map.
    scaling : str, default "geometric"
    r : float or None
        Power-mean exponent for ``scaling="power"``.
    replicates : int, default 999
        Simulated data sets per null table.
    bootstrap_replicates : int, default 199
        Refits per model for ``calibration="bootstrap"``.
    seed : int, default 0
        Seed of every simulation (tables are seeded by seed and key).
    audit_window : int, default 56
        Length of the tail scored by the production check.
    fit_window : int or None
        Observations used by the refit (the most recent); None uses the whole series.
    lb_lags : int or None
        Ljung-Box lag; None applies the rule of docs/method.md §9.2.
    locate_change : bool, default True
        Locate the most likely break of a failing production check.
    change_permutations : int, default 499
    practical_divergence, practical_acf : float or None
        Optional effect-size thresholds: a gate is flagged only if its p-value is significant
        *and* its effect (``T_max / 2n``, or the largest absolute residual autocorrelation)
        reaches the threshold.  None (default) flags on the p-value alone.
    partitions : tuple of str
        The cell partitions of the distribution gate (kinds of
        :data:`~fitaudit.core.vocabulary.PARTITION_KINDS`); the default is the set the validation
        study chose (docs/validation.md).
    gate_members : tuple of (alpha, beta) pairs, or None
        The divergences of the distribution gate, scored on every partition; None uses every
        point of the (alpha, beta) grid.  The full grid is always computed on the equiprobable
        cells as the report's picture (``CheckResult.map``).
    """

    level: float = 0.05
    calibration: Calibration = "simulated"
    alphas: tuple = tuple(float(a) for a in DEFAULT_ALPHAS)
    betas: tuple = tuple(float(b) for b in DEFAULT_BETAS)
    scaling: str = "geometric"
    r: float | None = None
    replicates: int = 999
    bootstrap_replicates: int = 199
    seed: int = 0
    audit_window: int = 56
    fit_window: int | None = None
    lb_lags: int | None = None
    locate_change: bool = True
    change_permutations: int = 499
    practical_divergence: float | None = None
    practical_acf: float | None = None
    partitions: tuple = DEFAULT_PARTITIONS
    gate_members: tuple | None = DEFAULT_GATE_MEMBERS

    _parameter_constraints = {
        "level": [Interval(float, 0.0, 0.5, "neither")],
        "calibration": [Options(("asymptotic", "simulated", "bootstrap"))],
        "scaling": [Options(SCALINGS)],
        "replicates": [Interval(int, 19, None)],
        "bootstrap_replicates": [Interval(int, 19, None)],
        "seed": [Interval(int, 0, None)],
        "audit_window": [Interval(int, 1, None)],
        "fit_window": [Interval(int, 1, None), None],
        "lb_lags": [Interval(int, 1, None), None],
        "change_permutations": [Interval(int, 19, None)],
        "practical_divergence": [Interval(float, 0.0, None), None],
        "practical_acf": [Interval(float, 0.0, 1.0), None],
    }

    def __post_init__(self):
        for name, cons in self._parameter_constraints.items():
            check_param("AuditSettings", name, getattr(self, name), *cons)
        object.__setattr__(self, "alphas", tuple(float(a) for a in self.alphas))
        object.__setattr__(self, "betas", tuple(float(b) for b in self.betas))
        if not self.alphas or not self.betas:
            raise InputError("AuditSettings: the (alpha, beta) grid must not be empty.")
        if any(b < 0 or b > 1 for b in self.betas):
            raise InputError(f"AuditSettings: betas must lie in [0, 1]; got {self.betas}.")
        if (self.scaling == "power") != (self.r is not None):
            raise InputError("AuditSettings: give r exactly when scaling='power'.")
        parts = tuple(str(p) for p in self.partitions)
        unknown = [p for p in parts if p not in PARTITION_KINDS]
        if not parts or unknown or len(set(parts)) != len(parts):
            raise InputError(
                f"AuditSettings: partitions must be distinct kinds from {', '.join(PARTITION_KINDS)}; got {self.partitions!r}."
            )
        object.__setattr__(self, "partitions", parts)
        if self.gate_members is not None:
            try:
                members = tuple((float(a), float(b)) for a, b in self.gate_members)
            except (TypeError, ValueError):
                raise InputError(f"AuditSettings: gate_members must be (alpha, beta) pairs; got {self.gate_members!r}.") from None
            if not members or any(b < 0 or b > 1 for _, b in members):
                raise InputError(f"AuditSettings: gate_members must be non-empty (alpha, beta) pairs with beta in [0, 1]; got {self.gate_members!r}.")
            object.__setattr__(self, "gate_members", members)

    def gate(self, n: int, k: int) -> Gate:
        """The distribution gate for ``n`` PIT values and ``k`` estimated noise parameters."""
        if self.gate_members is None:
            alphas = tuple(a for a in self.alphas for _ in self.betas)
            betas = tuple(b for _ in self.alphas for b in self.betas)
        else:
            alphas, betas = zip(*self.gate_members)
        return Gate(make_partitions(self.partitions, n, k), alphas, betas, self.scaling, self.r)

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {f.name: _plain(getattr(self, f.name)) for f in dataclasses.fields(self)}


# --------------------------------------------------------------------------------------------
# Results
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class CheckResult:
    """One check (``production`` or ``refit``) of one series.

    ``status`` is ``ok`` when the check ran; ``insufficient`` or ``error`` carry ``message``.
    For ``ok`` checks: the divergence map, its raw maximum ``t_max`` and its standardised maximum
    ``r_max`` (each member over its own null reference, see
    :class:`~fitaudit.core.calibration.NullTable`) with the deciding member's ``alpha_max``,
    ``beta_max``, ``t_at_max`` and simultaneous ``critical_value``; ``critical_grid`` holds the
    critical value of every grid point and ``scaled_grid`` = T / critical value (the gate fails
    when any point exceeds 1); the calibrated p-value of the distribution gate, the independence gate (Ljung-Box) with McLeod-Li
    reported, the Bonferroni-combined ``p_value`` (``p_adjusted`` after fleet adjustment), effect
    sizes, cell counts and the noise parameters; ``plots`` holds compact data for the report
    (standardised-residual histogram, Q-Q points, autocorrelations).
    """

    kind: str
    status: str
    message: str = ""
    n: int = 0
    cells: int = 0
    k: int = 0
    noise: dict = field(default_factory=dict)
    map: DivergenceMap | None = None
    t_max: float = float("nan")
    r_max: float = float("nan")
    alpha_max: float = float("nan")
    beta_max: float = float("nan")
    t_at_max: float = float("nan")
    critical_value: float = float("nan")
    critical_grid: np.ndarray | None = None
    scaled_grid: np.ndarray | None = None
    p_distribution: float = float("nan")
    calibration: dict = field(default_factory=dict)
    members: dict = field(default_factory=dict)
    ljung_box: dict = field(default_factory=dict)
    mcleod_li: dict = field(default_factory=dict)
    p_independence: float = float("nan")
    p_value: float = float("nan")
    p_adjusted: float | None = None
    effect_divergence: float = float("nan")
    effect_acf: float = float("nan")
    counts: tuple = ()
    gate: dict = field(default_factory=dict)
    window: dict = field(default_factory=dict)
    plots: dict = field(default_factory=dict)
    settings_level: float = 0.05
    practical: tuple = (None, None)

    @property
    def ok(self) -> bool:
        """True when the check ran."""
        return self.status == "ok"

    def gate_flags(self, threshold: float | None = None, adjusted: bool = False) -> tuple[bool, bool]:
        """(distribution gate fails, independence gate fails) at ``threshold`` (default: level).

        Each gate is tested at ``threshold / 2`` (Bonferroni); with ``adjusted`` the fleet-adjusted
        p-value of the check decides and the gate with the smaller raw p-value is the one flagged.
        A gate whose effect is below its practical threshold (when set) is not flagged.
        """
        if not self.ok:
            return (False, False)
        thr = self.settings_level if threshold is None else threshold
        pd_, pi_ = self.p_distribution, self.p_independence
        if adjusted and self.p_adjusted is not None:
            significant = self.p_adjusted <= thr
            dist = significant and (np.isnan(pi_) or pd_ <= pi_)
            ind = significant and not dist
        else:
            dist = pd_ <= thr / 2
            ind = (not np.isnan(pi_)) and pi_ <= thr / 2
        pdiv, pacf = self.practical
        if pdiv is not None:
            dist = dist and self.effect_divergence >= pdiv
        if pacf is not None:
            ind = ind and self.effect_acf >= pacf
        return bool(dist), bool(ind)

    def passed(self, threshold: float | None = None, adjusted: bool = False) -> bool:
        """True when the check ran and neither gate is flagged."""
        return self.ok and not any(self.gate_flags(threshold, adjusted))

    def to_dict(self) -> dict:
        """JSON-ready view (the map as its own ``to_dict``; infinities as strings).

        Grids are rounded to 6 decimals: enough for every figure the report prints, and it keeps a
        thousand-model results file compact.
        """
        out = {}
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            if f.name == "map":
                v = None if v is None else dict(v.to_dict(), statistic=_rounded(v.statistic))
            elif f.name in ("critical_grid", "scaled_grid"):
                v = None if v is None else _rounded(v)
            elif isinstance(v, tuple):
                v = list(v)
            out[f.name] = _plain(v)
        return out


def _rounded(grid: np.ndarray) -> list:
    """A grid as nested lists rounded to 6 decimals, non-finite values as strings or None."""
    return _plain(np.round(np.asarray(grid, dtype=float), 6))


@dataclass(frozen=True)
class AuditResult:
    """The outcome of auditing one series.

    Attributes
    ----------
    verdict : str
        One of ``pass``, ``refit``, ``respecify``, ``insufficient``, ``error``.
    reasons : tuple of str
        One plain sentence each, with the numbers behind the verdict.
    production : CheckResult or None
        The production check (None without a production version).
    refit : CheckResult or None
        The refit check; None for a forecast audit (:func:`audit_forecasts`), where fitaudit refits
        nothing and ``production`` holds the check of the stated forecasts.
    spec : dict
        The model spec audited.
    noise : str
        The noise law.
    fitted : dict
        The refit's parameters, log-likelihood, AIC and optimiser status.
    production_params : dict or None
        The frozen parameters that were checked.
    change : ChangeResult or None
        The most likely break of a failing production check.
    escalated : bool
        True when a recurring ``refit`` was escalated to ``respecify``.
    timings : dict
        Seconds per stage (kept out of :meth:`to_dict`, so results are reproducible byte for byte).
    accuracy : dict
        Accuracy figures of a forecast audit (MASE, CRPS and its skill; reported, never a verdict);
        empty for fitted models, and then left out of :meth:`to_dict`.
    """

    verdict: str
    reasons: tuple
    production: CheckResult | None
    refit: CheckResult | None
    spec: dict
    noise: str
    fitted: dict = field(default_factory=dict)
    production_params: dict | None = None
    change: ChangeResult | None = None
    escalated: bool = False
    timings: dict = field(default_factory=dict)
    accuracy: dict = field(default_factory=dict)

    @property
    def deciding_check(self) -> CheckResult:
        """The check whose outcome the verdict reports first (production when present)."""
        return self.production if self.production is not None else self.refit

    def to_dict(self) -> dict:
        """JSON-ready view without timings (``accuracy`` only when there is one)."""
        out = {
            "verdict": self.verdict,
            "reasons": list(self.reasons),
            "production": None if self.production is None else self.production.to_dict(),
            "refit": None if self.refit is None else self.refit.to_dict(),
            "spec": _plain(self.spec),
            "noise": self.noise,
            "fitted": _plain(self.fitted),
            "production_params": _plain(self.production_params),
            "change": None if self.change is None else self.change.to_dict(),
            "escalated": self.escalated,
        }
        if self.accuracy:
            out["accuracy"] = _plain(self.accuracy)
        return out


def _plain(v: Any) -> Any:
    """numpy -> Python, non-finite floats -> strings (strict JSON)."""
    if isinstance(v, dict):
        return {str(k): _plain(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, np.ndarray):
        if v.dtype.kind in "biu" or (v.dtype.kind == "f" and np.isfinite(v).all()):
            return v.tolist()  # already plain: Python ints, bools or finite floats
        return _plain(v.tolist())
    if isinstance(v, (np.floating, float)):
        f = float(v)
        if math.isnan(f):
            return None
        if math.isinf(f):
            return "inf" if f > 0 else "-inf"
        return f
    if isinstance(v, (np.integer,)):
        return int(v)
    if isinstance(v, (np.bool_,)):
        return bool(v)
    return v


# --------------------------------------------------------------------------------------------
# Helpers
# --------------------------------------------------------------------------------------------
def as_model(spec: ForecastModel | Mapping[str, Any]) -> ForecastModel:
    """A model spec object from a spec or its dict form."""
    if isinstance(spec, ForecastModel):
        return spec
    if isinstance(spec, Mapping):
        return model_from_dict(spec)
    raise InputError(f"audit_series: spec must be a model spec or a dict with a 'family'; got {type(spec).__name__}.")


def as_noise_law(noise: str | Mapping[str, Any] | NoiseLaw, shape: float | None = None) -> NoiseLaw:
    """A noise law from its name, ``{"law": name, "shape": value}`` or an instance."""
    if isinstance(noise, NoiseLaw):
        return noise if shape is None else get_law(noise.name, shape=shape)
    if isinstance(noise, Mapping):
        return get_law(str(noise.get("law")), shape=noise.get("shape", shape))
    return get_law(str(noise), shape=shape)


def _digest(*arrays: np.ndarray) -> str:
    h = hashlib.sha256()
    for a in arrays:
        h.update(np.ascontiguousarray(a, dtype=float).tobytes())
    return h.hexdigest()[:16]


def _slice_exog(exog: Mapping[str, np.ndarray] | None, sl: slice) -> dict | None:
    if exog is None:
        return None
    return {k: np.asarray(v, dtype=float)[sl] for k, v in exog.items()}


def _plot_data(e: np.ndarray, law: NoiseLaw, params: NoiseParams, lags: int) -> dict:
    """Compact data for the report: histogram of standardised residuals with the noise density,
    Q-Q points and autocorrelations with their band."""
    if law.discrete:
        z = e / (np.std(e) or 1.0)
        density = None
    else:
        z = (e - params.loc) / params.scale
    lo, hi = -5.0, 5.0
    edges = np.linspace(lo, hi, 26)
    counts, _ = np.histogram(np.clip(z, lo, hi - 1e-9), bins=edges)
    centres = 0.5 * (edges[1:] + edges[:-1])
    if not law.discrete:
        std = NoiseParams(law=params.law, loc=0.0, scale=1.0, shape=params.shape, estimated=())
        density = law.pdf(centres, std)
    k = min(z.size, 80)
    probs = (np.arange(1, k + 1) - 0.5) / k
    sample_q = np.quantile(z, probs)
    theory_q = law.ppf(probs, NoiseParams(law=params.law, loc=0.0, scale=1.0, shape=params.shape, estimated=())) if not law.discrete else np.quantile(np.random.default_rng(0).standard_normal(4000), probs)
    r = acf(e, lags)
    return {
        "hist_edges": edges.round(6).tolist(),
        "hist_counts": counts.astype(int).tolist(),
        "hist_density": None if density is None else np.asarray(density).round(6).tolist(),
        "qq_theoretical": np.asarray(theory_q).round(6).tolist(),
        "qq_sample": np.asarray(sample_q).round(6).tolist(),
        "acf": np.asarray(r[1:]).round(6).tolist(),
        "acf_band": float(acf_band(e.size)),
    }


def _deciding_partition(part, u: np.ndarray) -> dict:
    """The cell of ``part`` whose count departs most from its expectation, in plain words.

    The departure is measured by the Pearson residual ``(O - E) / sqrt(E)``; the sentence reads
    e.g. "the lowest 0.5 % of the assumed law holds 6 errors where 1.0 were expected".
    """
    obs = part.counts(u)
    exp = part.probs * obs.sum()
    j = int(np.argmax(np.abs(obs - exp) / np.sqrt(exp)))
    return {
        "kind": part.kind,
        "cells": part.s,
        "cell": j,
        "observed": int(obs[j]),
        "expected": round(float(exp[j]), 2),
        "sentence": f"{part.describe_cell(j)} of the assumed law holds {int(obs[j])} errors where {exp[j]:.1f} were expected",
    }


def _score(
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
) -> CheckResult:
    """Score residuals ``e`` with PIT values ``u``: partitions, map, calibration, independence.

    The distribution gate is the standardised maximum of the gate's members over its partitions
    (:meth:`AuditSettings.gate`); the full (alpha, beta) map on the equiprobable cells is the
    report's picture of where the law fails, with its own simultaneous boundary.
    """
    n = e.size
    s = number_of_cells(n, k)
    counts = cell_counts(u, s)
    dmap = divergence_map(counts, np.full(s, 1.0 / s), settings.alphas, settings.betas, settings.scaling, settings.r)
    gate = settings.gate(n, k)
    g_obs = gate.statistics(u)  # (P, G)
    t_obs = dmap.t_max
    calib: dict = {"method": settings.calibration}
    half = settings.level / 2
    if settings.calibration == "asymptotic" or table_for is None:
        # chi-square(s_p - 1) per partition, with the Nikulin-Rao-Robson term for estimated noise
        # parameters; Bonferroni over the partitions (a fast screen: liberal, docs/validation.md)
        extras = np.zeros(len(gate.partitions))
        if kind == "refit" and not law.discrete and k > 0:
            info = law.fisher_information(nparams)
            for i, part in enumerate(gate.partitions):
                grad = law.cell_probability_gradient(np.asarray(part.boundaries) if not part.equiprobable else part.s, nparams)
                extras[i] = nrr_term(part.counts(u), info, grad, part.probs)
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
        if kind == "refit" and not law.discrete and k > 0:
            map_extra = nrr_term(counts, law.fisher_information(nparams), law.cell_probability_gradient(s, nparams))
            calib["nrr_term"] = map_extra
        c = chi2_critical_value(half, s - 1)
        reference = np.full(dmap.statistic.shape, c)
        crit_grid = reference - map_extra
        calib.update({"method": "asymptotic", "reference": "chi-square(s - 1) per partition, Bonferroni over partitions"})
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
        deciding = _deciding_partition(gate.partitions[ip], u)
    else:
        a_max = b_max = t_at = crit_at = float("nan")
    partitions = []
    for i, part in enumerate(gate.partitions):
        row = part.to_dict()
        row["counts"] = [int(c) for c in part.counts(u)]
        with np.errstate(invalid="ignore", divide="ignore"):
            row["standardised"] = float(np.max(np.where(np.isfinite(ratio[i]), ratio[i], -np.inf))) if np.isfinite(ratio[i]).any() else None
        partitions.append(row)
    gate_info = {
        "members": [[float(a), float(b)] for a, b in zip(gate.alphas, gate.betas)],
        "statistics": _rounded(g_obs),
        "critical": _rounded(gate_crit),
        "partitions": partitions,
        "deciding": deciding,
    }
    lags = settings.lb_lags or ljung_box_lags(n, period, model_df)
    lags = min(lags, n - 1)
    lb = ljung_box(e, lags, model_df=model_df if kind == "refit" else 0)
    ml = mcleod_li(e, lags)
    r = acf(e, lags)
    effect_acf = float(np.max(np.abs(r[1:]))) if lags >= 1 else float("nan")
    lb_dict = lb.to_dict()
    p_ind = lb.p_value
    if kind == "production" and settings.calibration != "asymptotic" and not law.discrete:
        # frozen parameters: the errors are i.i.d. under the null, so the statistic's exact null is simulated
        table_lb = independence_table(n, lags, settings.replicates, settings.seed, cache)
        p_ind = table_lb.p_value(lb.statistic)
        lb_dict = dict(lb_dict, p_value=p_ind, p_value_chi2=lb.p_value, reference=f"simulated (R={table_lb.replicates})")
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
        plots=_plot_data(e, law, nparams, max(lags, min(2 * period, n // 4) if period > 1 else lags)),
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
    """
    table_for = None
    if settings.calibration != "asymptotic":
        def table_for(n, s, gate):
            return production_table(n, s, settings.alphas, settings.betas, settings.scaling, settings.r, settings.replicates, settings.seed, cache, gate=gate)
    return _score(kind, e, u, law, nparams, 0, 0, period, settings, table_for, window, cache)


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
    """Refuse data the numerics cannot handle, with the fix: magnitudes outside :data:`MAGNITUDE_RANGE`, non-counts under a count law."""
    low, high = MAGNITUDE_RANGE
    columns = [("the series", y)] + [(f"exogenous column {k!r}", np.asarray(v, dtype=float)) for k, v in (exog or {}).items()]
    for i, (name, values) in enumerate(columns):
        big = float(np.max(np.abs(values))) if values.size else 0.0
        if big > high or (i == 0 and 0.0 < big < low):
            side = f"as large as {big:.3g}; above {high:g}" if big > high else f"no larger than {big:.3g}; below {low:g}"
            raise InputError(
                f"{label}: {name} holds values {side} their squares leave the range of double precision and no fit "
                "can run. Rescale the column in the extract (e.g. record thousands, millions or millionths of the unit)."
            )
    if law.discrete:
        bad = np.flatnonzero((y < 0) | (y != np.round(y)))
        if bad.size:
            raise InputError(
                f"{label}: the {law.name} noise law needs counts (non-negative integers), but {bad.size} value(s) are not, "
                f"first at position {int(bad[0])} ({y[bad[0]]:g}). Register a continuous noise law (normal, student-t, "
                "laplace, logistic) for this series, or correct the extract."
            )


# --------------------------------------------------------------------------------------------
# The two checks
# --------------------------------------------------------------------------------------------
def _production_check(model, y, exog, params, law_prod: NoiseLaw, settings, cache, label) -> tuple[CheckResult, np.ndarray | None, NoiseParams | None]:
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
            raise InputError(f"{label}: the production parameters give infinite forecast errors; check the parameter version.")
        if law_prod.discrete:
            mean = y[-w:] - tail
            nparams = law_prod.fit_counts(y[-w:], mean)
            u = law_prod.randomized_pit(y[-w:], mean, nparams, key_rng(settings.seed, "pit", "production", _digest(y)))
        else:
            sigma2 = float(params["sigma2"])
            if not (np.isfinite(sigma2) and sigma2 > 0):
                raise InputError(
                    f"{label}: the production parameter version's sigma2 = {sigma2:g} is not a positive variance; "
                    "refit the model and promote a new parameter version."
                )
            nparams = law_prod.from_variance(sigma2)
            u = law_prod.cdf(tail, nparams)
        check = score_frozen(tail, u, law_prod, nparams, model.seasonal_period(), settings, cache, window)
        return check, np.asarray(errors, dtype=float), nparams
    except (FitauditError, ValueError, FloatingPointError, np.linalg.LinAlgError, ArithmeticError) as exc:
        return _failed_check("production", exc, window, label), None, None


def _refit_check(model, y, exog, law: NoiseLaw, settings, cache, label) -> tuple[CheckResult, Any]:
    n_all = y.size
    fw = settings.fit_window or n_all
    fw = min(fw, n_all)
    sl = slice(n_all - fw, n_all)
    window = {"first": n_all - fw, "last": n_all - 1, "length": fw}
    fit = None
    try:
        yf = y[sl]
        xf = _slice_exog(exog, sl)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)  # reported through fit.converged below
            fit = model.fit(yf, xf)
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
        if law.discrete:
            mean = yf[defined] - e
            nparams = law.fit_counts(yf[defined], mean)
            k = len(nparams.estimated)
            u = law.randomized_pit(yf[defined], mean, nparams, key_rng(settings.seed, "pit", "refit", _digest(y)))
            table_for = None
            if settings.calibration != "asymptotic":
                def table_for(n, s, gate):
                    return production_table(n, s, settings.alphas, settings.betas, settings.scaling, settings.r, settings.replicates, settings.seed, cache, gate=gate)
        else:
            nparams = law.fit(e, location=location)
            k = law.n_estimated(location)
            u = law.cdf(e, nparams)
            table_for = None
            if settings.calibration == "simulated":
                def table_for(n, s, gate):
                    return refit_table(law, n, s, location, settings.alphas, settings.betas, settings.scaling, settings.r, settings.replicates, settings.seed, shape=nparams.shape, cache=cache, gate=gate)
            elif settings.calibration == "bootstrap":
                def table_for(n, s, gate):
                    simulated = refit_table(law, n, s, location, settings.alphas, settings.betas, settings.scaling, settings.r, settings.replicates, settings.seed, shape=nparams.shape, cache=cache, gate=gate)
                    return _bootstrap(model, fit, law, nparams, yf, xf, n, s, location, settings, simulated, gate)
        check = _score("refit", e, u, law, nparams, k, model.n_dynamic_params(), model.seasonal_period(), settings, table_for, window)
        return check, fit
    except (FitauditError, ValueError, FloatingPointError, np.linalg.LinAlgError, ArithmeticError) as exc:
        return _failed_check("refit", exc, window, label), fit


def _bootstrap(model, fit, law: NoiseLaw, nparams: NoiseParams, yf, xf, n: int, s: int, location: bool, settings: AuditSettings, simulated: NullTable, gate: Gate) -> NullTable:
    """Parametric bootstrap of the refit check: simulate the fitted model, refit, rescore."""
    rng = key_rng(settings.seed, "bootstrap", _digest(yf))

    def score(r: np.random.Generator) -> float:
        innov = law.sample(yf.size, r, nparams) - nparams.loc
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                ystar = model.simulate(fit.params, yf.size, r, exog=xf, innovations=innov)
                f2 = model.fit(ystar, xf)
            e2 = np.asarray(f2.residuals, dtype=float)
            e2 = e2[~np.isnan(e2)]
            p2 = law.fit(e2, location=location)
            u2 = law.cdf(e2, p2)
            counts = cell_counts(u2, s)
            grid = divergence_map(counts, np.full(s, 1.0 / s), settings.alphas, settings.betas, settings.scaling, settings.r).statistic
            return grid, gate.statistics(u2)
        except (FitauditError, ValueError, np.linalg.LinAlgError, ArithmeticError):
            return None

    key = ("bootstrap", f"data={_digest(yf)}", f"n={n}", f"s={s}", f"R={settings.bootstrap_replicates}", gate.key())
    return bootstrap_table(score, settings.bootstrap_replicates, rng, simulated.reference, key=key, gate_reference=simulated.gate_reference)


# --------------------------------------------------------------------------------------------
# Verdicts and reasons
# --------------------------------------------------------------------------------------------
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


# --------------------------------------------------------------------------------------------
# Public entry points
# --------------------------------------------------------------------------------------------
def audit_series(
    y,
    spec,
    noise="normal",
    exog=None,
    production: Mapping[str, float] | None = None,
    settings: AuditSettings = AuditSettings(),
    *,
    production_noise: Mapping[str, Any] | None = None,
    cache: CalibrationCache | None = None,
    label: str | None = None,
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

    Returns
    -------
    AuditResult
        Never raises for bad data: problems become ``insufficient`` or ``error`` verdicts with a
        message naming the model and the fix.
    """
    t_start = time.perf_counter()
    cache = cache if cache is not None else CalibrationCache()
    spec_dict: dict = dict(spec) if isinstance(spec, Mapping) else {}
    noise_name = noise if isinstance(noise, str) else (noise.get("law") if isinstance(noise, Mapping) else getattr(noise, "name", str(noise)))
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
            verdict=check.status, reasons=(f"The audit could not start: {check.message}",), production=None, refit=check,
            spec=_plain(spec_dict), noise=str(noise_name), timings={"total_s": time.perf_counter() - t_start},
        )

    timings = {}
    prod_check = prod_errors = prod_noise = None
    if production is not None:
        t0 = time.perf_counter()
        try:
            shape = (production_noise or {}).get("shape") if law.has_shape else None
            law_prod = as_noise_law(law, shape=shape) if shape is not None else law
            if law_prod.has_shape and getattr(law_prod, "shape", None) is None and not law_prod.discrete:
                raise InputError(
                    f"{label}: the {law.name} law's shape is estimated, but the production version stores none; "
                    "fix the shape in the registry (e.g. df: 5) or store it with the parameter version."
                )
            prod_check, prod_errors, prod_noise = _production_check(model, y_arr, exog, dict(production), law_prod, settings, cache, label)
        except FitauditError as exc:
            prod_check = _failed_check("production", exc, label=label)
        timings["production_s"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    refit_check, fit = _refit_check(model, y_arr, exog, law, settings, cache, label)
    timings["refit_s"] = time.perf_counter() - t0

    verdict, reasons = decide_verdict(prod_check, refit_check, settings.level)
    change = None
    if (
        settings.locate_change
        and prod_check is not None
        and prod_check.ok
        and not prod_check.passed(settings.level)
        and prod_errors is not None
        and not law.discrete
    ):
        try:
            # the errors since the last defined one-step forecast: a break at the start of the
            # audit window is then locatable too (index is a position in the series)
            first = int(np.argmax(~np.isnan(prod_errors)))
            change = locate_change(prod_errors[first:], noise=law_prod, permutations=settings.change_permutations, seed=settings.seed)
            change = dataclasses.replace(change, index=change.index + first)
        except (FitauditError, ValueError):
            change = None
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
    timings["total_s"] = time.perf_counter() - t_start
    return AuditResult(
        verdict=verdict,
        reasons=reasons,
        production=prod_check,
        refit=refit_check,
        spec=_plain(spec_dict),
        noise=law.name if law.shape is None or not law.has_shape else f"{law.name}({law.shape:g})",
        fitted=fitted,
        production_params=None if production is None else {k: float(v) for k, v in production.items()},
        change=change,
        timings=timings,
    )


def prepare_calibration(
    entries: Sequence[tuple[Any, Any, AuditSettings, int, bool]],
    cache: CalibrationCache | None = None,
) -> CalibrationCache:
    """Build, once, the simulated null tables a run's models will need.

    ``entries`` holds ``(spec, noise, settings, n_observations, has_production)`` per model: the
    production table depends on the audit window only, the refit table on the number of
    residuals (``n_observations - spec.presample()``), the noise law and whether the location is
    estimated.  Tables of laws whose shape is estimated are keyed by the estimate and built on
    demand during the audit; so are bootstrap tables.  The returned cache is passed to every batch
    (also to other processes), so no table is built twice.
    """
    cache = cache if cache is not None else CalibrationCache()
    for spec, noise, settings, n_obs, has_production in entries:
        if settings.calibration == "asymptotic":
            continue
        try:
            model, law = as_model(spec), as_noise_law(noise)
            if has_production and n_obs >= settings.audit_window:
                n = settings.audit_window
                production_table(n, number_of_cells(n, 0), settings.alphas, settings.betas, settings.scaling, settings.r, settings.replicates, settings.seed, cache, gate=settings.gate(n, 0))
            if settings.calibration == "simulated" and not law.discrete and not (law.has_shape and law.shape is None):
                n = (settings.fit_window or n_obs) - model.presample()
                location = model.has_location()
                s = number_of_cells(n, law.n_estimated(location))
                k = law.n_estimated(location)
                refit_table(law, n, s, location, settings.alphas, settings.betas, settings.scaling, settings.r, settings.replicates, settings.seed, shape=law.shape, cache=cache, gate=settings.gate(n, k))
        except (FitauditError, ValueError):
            continue  # the model's own audit reports the problem
    return cache


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
    first) becomes ``respecify``.  Raw and adjusted p-values are both kept.
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


def __getattr__(name: str):
    """``audit_forecasts`` lives in :mod:`fitaudit.core.forecasts`, which imports this module; it is
    re-exported here lazily (PEP 562), so either module can be imported first."""
    if name == "audit_forecasts":
        from .forecasts import audit_forecasts

        return audit_forecasts
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
