"""The results of an audit: one :class:`CheckResult` per check, one :class:`AuditResult` per series.

Both are frozen dataclasses whose ``to_dict`` gives strict JSON (non-finite floats as strings,
grids rounded to 6 decimals), so ``results.json`` is reproducible byte for byte.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np

from ._plain import plain_data
from .change import ChangeResult
from .divergence import DivergenceMap

__all__ = ["CheckResult", "AuditResult"]


@dataclass(frozen=True)
class CheckResult:
    """One check (``production`` or ``refit``) of one series.

    ``status`` is ``ok`` when the check ran; ``insufficient`` or ``error`` carry ``message``.
    For ``ok`` checks: the divergence map, its raw maximum ``t_max`` and its standardised maximum
    ``r_max`` (each member over its own null reference, see
    :class:`~fitaudit.core.calibration.NullTable`) with the deciding member's ``alpha_max``,
    ``beta_max``, ``t_at_max`` and simultaneous ``critical_value``; ``critical_grid`` holds the
    critical value of every grid point and ``scaled_grid`` = T / critical value (the gate fails
    when any point exceeds 1); the calibrated p-value of the distribution gate, the independence
    gate (Ljung-Box) with McLeod-Li reported, the Bonferroni-combined ``p_value`` (``p_adjusted``
    after fleet adjustment), effect sizes, cell counts and the noise parameters; ``plots`` holds
    compact data for the report (standardised-residual histogram, Q-Q points, autocorrelations);
    ``effects`` holds the errors' sizes in plain units and the window's dates
    (:func:`~fitaudit.core.plotdata.error_effects`).
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
    effects: dict = field(default_factory=dict)
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
            out[f.name] = plain_data(v)
        return out


def _rounded(grid: np.ndarray) -> list:
    """A grid as nested lists rounded to 6 decimals, non-finite values as strings or None."""
    return plain_data(np.round(np.asarray(grid, dtype=float), 6))


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
            "spec": plain_data(self.spec),
            "noise": self.noise,
            "fitted": plain_data(self.fitted),
            "production_params": plain_data(self.production_params),
            "change": None if self.change is None else self.change.to_dict(),
            "escalated": self.escalated,
        }
        if self.accuracy:
            out["accuracy"] = plain_data(self.accuracy)
        return out
