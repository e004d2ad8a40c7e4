"""Audit settings: everything that fixes how a series is audited, and the gate's defaults.

:class:`AuditSettings` is built once per model entry (from its registry entry and the policy)
and passed to every check; its bounds are validated by the ``_parameter_constraints`` pattern.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

from ._plain import plain_data
from ._validation import Options, check_param
from .calibration import Gate
from .cells import make_partitions
from .divergence import DEFAULT_ALPHAS, DEFAULT_BETAS, SCALINGS
from .exceptions import InputError
from .vocabulary import PARTITION_KINDS, SETTING_BOUNDS, Calibration

__all__ = ["AuditSettings", "DEFAULT_PARTITIONS", "DEFAULT_GATE_MEMBERS"]


#: Partitions of the distribution gate, as chosen by the validation study (docs/validation.md).
DEFAULT_PARTITIONS: tuple[str, ...] = ("terciles", "equiprobable", "tails")
#: Members of the distribution gate: likelihood-ratio G2, Cressie-Read 2/3 and Pearson X2
#: (alpha 1, 5/3, 2 with the model scaling m = q, i.e. beta = 0 of the geometric mean).
DEFAULT_GATE_MEMBERS: tuple[tuple[float, float], ...] = ((1.0, 0.0), (5.0 / 3.0, 0.0), (2.0, 0.0))


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
    season : int, default 1
        The seasonal period of the data's calendar (7 for daily, 5 for business days, 12 for
        monthly data; 1 for none).  The Ljung-Box lag rule uses it when the model itself has no
        seasonal period, so that a non-seasonal model of seasonal data is tested over two
        seasons (docs/method.md §9.2).
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
    season: int = 1
    locate_change: bool = True
    change_permutations: int = 499
    practical_divergence: float | None = None
    practical_acf: float | None = None
    partitions: tuple = DEFAULT_PARTITIONS
    gate_members: tuple | None = DEFAULT_GATE_MEMBERS

    #: Bounds shared with the registry schema (one home: :data:`~fitaudit.core.vocabulary.SETTING_BOUNDS`).
    _parameter_constraints = {
        **{
            name: SETTING_BOUNDS[name]
            for name in (
                "level",
                "calibration",
                "replicates",
                "bootstrap_replicates",
                "seed",
                "audit_window",
                "fit_window",
                "lb_lags",
                "season",
                "change_permutations",
                "practical_divergence",
                "practical_acf",
            )
        },
        "scaling": [Options(SCALINGS)],
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
                f"AuditSettings: partitions must be distinct kinds from {', '.join(PARTITION_KINDS)}; got "
                f"{self.partitions!r}."
            )
        object.__setattr__(self, "partitions", parts)
        if self.gate_members is not None:
            try:
                members = tuple((float(a), float(b)) for a, b in self.gate_members)
            except (TypeError, ValueError):
                raise InputError(
                    f"AuditSettings: gate_members must be (alpha, beta) pairs; got {self.gate_members!r}."
                ) from None
            if not members or any(b < 0 or b > 1 for _, b in members):
                raise InputError(
                    "AuditSettings: gate_members must be non-empty (alpha, beta) pairs with beta in [0, 1]; got "
                    f"{self.gate_members!r}."
                )
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
        return {f.name: plain_data(getattr(self, f.name)) for f in dataclasses.fields(self)}
