"""Calibration: turning the maximum of a divergence map into a p-value.

Three methods (docs/method.md §7; the theory behind them in §5):

``asymptotic``
    Production check: ``T_max`` against chi-square(s - 1) (every member with ``m(q, q) = q`` is
    asymptotically Pearson's X2, docs/method.md §5.6).  Refit check: ``T_max`` plus the
    Nikulin-Rao-Robson quadratic term (docs/method.md §5.4), against chi-square(s - 1).  Fast, liberal
    at small n (docs/validation.md).
``simulated``
    Production check: counts drawn from multinomial(n, 1/s), the exact null for frozen
    parameters.  Refit check: n i.i.d. draws of the noise law, its parameters re-estimated with
    the same estimator, PIT, cells.  For location-scale laws with equiprobable cells both nulls are
    pivotal, so one :class:`NullTable` per key (n, s, law, shape, location, grid, scaling) serves
    every model of a run; tables live in an explicit :class:`CalibrationCache`.
``bootstrap``
    Simulate the whole fitted model, refit, rescore (see :func:`bootstrap_table`; the audit
    protocol supplies the per-replicate scorer).

The calibrated summary is the standardised maximum ``R = max_g T_g / c_g`` (each member divided by
its own simulated 95 % null point; see :class:`NullTable`); with the asymptotic method every
``c_g`` is the same chi-square point and ``R`` orders data sets exactly as the raw maximum
``T_max`` does.  Every simulated data set applies the same rule as the observed one: grid points
that are infinite on it are left out of its maximum.  Tables are seeded from the run's seed and the table
key only, so p-values do not depend on which models share a batch or in what order tables are
built.  p = (1 + #{T* >= T_obs}) / (R + 1).
"""

from __future__ import annotations

import hashlib
import threading
from collections.abc import Callable, Hashable, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np

from ._scipy import stats
from .cells import CountsBelow, boundary_union, cell_counts, number_of_cells
from .diagnostics import chi2_sf
from .divergence import divergence_map, partition_statistics
from .exceptions import FitauditError, InputError
from .models import as_model
from .noise import as_noise_law

if TYPE_CHECKING:  # settings.py imports this module (Gate)
    from .settings import AuditSettings

__all__ = [
    "Gate",
    "NullTable",
    "CalibrationCache",
    "TableStore",
    "key_rng",
    "production_table",
    "settings_production_table",
    "settings_refit_table",
    "refit_table",
    "bootstrap_table",
    "standardised_maximum",
    "reference_values",
    "StatisticTable",
    "independence_table",
    "monte_carlo_p_value",
    "monte_carlo_critical_value",
    "describe_key",
    "REFERENCE_QUANTILE",
    "chi2_p_value",
    "chi2_critical_value",
    "nrr_term",
    "prepare_calibration",
    "table_jobs",
    "table_job_key",
    "build_tables",
]


def key_rng(seed: int, *key: Hashable) -> np.random.Generator:
    """A generator seeded by ``seed`` and a stable digest of ``key`` (independent of call order)."""
    digest = hashlib.sha256(repr((int(seed),) + tuple(key)).encode()).digest()
    return np.random.default_rng([int.from_bytes(digest[i : i + 4], "little") for i in range(0, 16, 4)])


REFERENCE_QUANTILE = 0.95
"""Each member is scaled by its own simulated null quantile at this probability."""


@dataclass(frozen=True)
class Gate:
    """The members of the distribution gate: divergences at ``(alpha, beta)`` pairs on partitions.

    The gate's statistic is the standardised maximum over every (partition, member) pair, each
    statistic divided by its own simulated 95 % null point (docs/method.md, "Cells and
    partitions").  All partitions score the same PIT values, and the null tables score the same
    simulated samples on every partition, so the maximum's null distribution is the joint one.

    Attributes
    ----------
    partitions : tuple of Partition
    alphas, betas : tuple of float
        The members as pairs ``(alphas[g], betas[g])``.
    scaling : str
    r : float or None
    """

    partitions: tuple
    alphas: tuple
    betas: tuple
    scaling: str = "geometric"
    r: float | None = None

    def __post_init__(self):
        if not self.partitions:
            raise InputError("Gate: give at least one partition.")
        if len(self.alphas) != len(self.betas) or not self.alphas:
            raise InputError("Gate: alphas and betas must be non-empty and of equal length (one pair per member).")
        object.__setattr__(self, "alphas", tuple(float(a) for a in self.alphas))
        object.__setattr__(self, "betas", tuple(float(b) for b in self.betas))

    def key(self) -> tuple:
        """Hashable identity, part of every null table's key."""
        members = tuple(zip(np.round(self.alphas, 12).tolist(), np.round(self.betas, 12).tolist()))
        return ("gate", tuple(p.key() for p in self.partitions), members, self.scaling, self.r)

    def statistics(self, u: np.ndarray | CountsBelow) -> np.ndarray:
        """``2 n B`` of every member on every partition, shape (P, G) for u of shape (n,), (R, P, G) for (R, n)
        (or for rows known by their counts below every partition's boundaries)."""
        return self.statistics_of_counts(self.counts(u))

    def counts(self, u: np.ndarray | CountsBelow) -> list[np.ndarray]:
        """Each partition's cell counts of ``u``, shape (s_p,) or (R, s_p)."""
        return [part.counts(u) for part in self.partitions]

    def statistics_of_counts(self, partition_counts: Sequence[np.ndarray]) -> np.ndarray:
        """:meth:`statistics` from the partitions' counts (:meth:`counts`)."""
        ua, ia = np.unique(self.alphas, return_inverse=True)
        ub, ib = np.unique(self.betas, return_inverse=True)
        counts = np.concatenate(partition_counts, axis=-1)
        probs = np.concatenate([part.probs for part in self.partitions])
        sizes = [part.s for part in self.partitions]
        return partition_statistics(counts, probs, sizes, ua, ub, self.scaling, self.r)[..., ia, ib]


@dataclass(frozen=True)
class NullTable:
    """Simulated null distribution of the standardised maximum of a divergence map.

    Members of the map differ wildly in their finite-sample null spread (an alpha = 3 member
    scaled by the data can be ten times as large as Pearson's X2 on the same counts), so the raw
    maximum would be decided by a few heavy-tailed members.  Each member ``g`` is therefore
    divided by its own null reference value ``c_g`` (the 95 % point of its simulated null
    distribution), and the summary ``R = max_g T_g / c_g`` over the finite points is calibrated by
    simulation.  The reference values come from a second, independent set of simulated data sets:
    estimated from the calibrating replicates themselves they would make those replicates
    non-exchangeable with the observed data and bias the p-values.

    Attributes
    ----------
    key : tuple
        What the table depends on.
    reference : ndarray, shape (len(alphas), len(betas))
        ``c_g``; ``+inf`` for a member that is infinite in more than 5 % of the simulated sets.
    r_max : ndarray
        Sorted simulated ``R*`` (``+inf`` where a simulated data set had no finite grid point).
    method : str
        ``"simulated"`` or ``"bootstrap"``.
    """

    key: tuple
    reference: np.ndarray
    r_max: np.ndarray
    method: str = "simulated"
    gate_reference: np.ndarray | None = None
    gate_max: np.ndarray | None = None

    @classmethod
    def from_replicates(
        cls,
        key: tuple,
        statistics: np.ndarray,
        reference: np.ndarray,
        method: str = "simulated",
        gate_statistics: np.ndarray | None = None,
        gate_reference: np.ndarray | None = None,
    ) -> NullTable:
        """Build a table from the maps of R simulated data sets, ``statistics`` of shape (R, A, B),
        and reference values ``c_g`` obtained independently of them (see :func:`reference_values`);
        with a :class:`Gate`, also from its statistics (R, P, G) and their reference values."""
        stats_ = np.asarray(statistics, dtype=float)
        gate_max = None
        if gate_statistics is not None:
            gate_reference = np.asarray(gate_reference, dtype=float)
            gate_max = np.sort(standardised_maximum(np.asarray(gate_statistics, dtype=float), gate_reference))
        return cls(
            tuple(key),
            np.asarray(reference, dtype=float),
            np.sort(standardised_maximum(stats_, reference)),
            method,
            gate_reference,
            gate_max,
        )

    @property
    def has_gate(self) -> bool:
        """True when the table also calibrates a :class:`Gate`."""
        return self.gate_max is not None

    def gate_p_value(self, r_obs: float) -> float:
        """Monte Carlo p-value of the gate's standardised maximum (the distribution gate)."""
        return monte_carlo_p_value(self.gate_max, r_obs)

    def gate_critical_value(self, level: float) -> float:
        """Simultaneous critical value of the gate's standardised maximum at ``level``."""
        return monte_carlo_critical_value(self.gate_max, level)

    @property
    def replicates(self) -> int:
        """Number of simulated data sets R."""
        return int(self.r_max.size)

    def p_value(self, r_obs: float) -> float:
        """Monte Carlo p-value ``(1 + #{R* >= r_obs}) / (R + 1)`` (Davison and Hinkley 1997, eq. 4.11)."""
        return monte_carlo_p_value(self.r_max, r_obs)

    def critical_value(self, level: float) -> float:
        """Smallest c such that ``r_obs > c`` implies ``p_value(r_obs) <= level`` (an order statistic)."""
        return monte_carlo_critical_value(self.r_max, level)

    def to_dict(self) -> dict:
        """Summary (key, method, R, selected quantiles of R*)."""
        finite = self.r_max[np.isfinite(self.r_max)]
        return {
            "key": describe_key(self.key),
            "method": self.method,
            "replicates": self.replicates,
            "quantiles": {str(q): float(np.quantile(finite, q)) for q in (0.5, 0.9, 0.95, 0.99)} if finite.size else {},
        }


def monte_carlo_p_value(sorted_values: np.ndarray, observed: float) -> float:
    """``(1 + #{T* >= observed}) / (R + 1)`` for sorted simulated values T* (Davison and Hinkley 1997, eq. 4.11)."""
    exceed = sorted_values.size - np.searchsorted(sorted_values, observed, side="left")
    return float((1 + exceed) / (sorted_values.size + 1))


def monte_carlo_critical_value(sorted_values: np.ndarray, level: float) -> float:
    """Smallest c such that ``observed > c`` implies a Monte Carlo p-value at most ``level``."""
    m = int(np.floor(level * (sorted_values.size + 1))) - 1
    if m < 0:
        return float("inf")
    return float(sorted_values[sorted_values.size - m - 1])


@dataclass(frozen=True)
class StatisticTable:
    """Sorted simulated null values of one scalar statistic (e.g. Ljung-Box on frozen-parameter errors)."""

    key: tuple
    values: np.ndarray
    method: str = "simulated"

    @property
    def replicates(self) -> int:
        """Number of simulated data sets R."""
        return int(self.values.size)

    def p_value(self, observed: float) -> float:
        """Monte Carlo p-value (see :func:`monte_carlo_p_value`)."""
        return monte_carlo_p_value(self.values, observed)


def independence_table(
    n: int, lags: int, replicates: int, seed: int, cache: CalibrationCache | None = None
) -> StatisticTable:
    """Simulated null of the Ljung-Box statistic of ``n`` i.i.d. errors at ``lags`` lags.

    With frozen production parameters the one-step errors of a correct model are i.i.d., so this
    null is exact (the statistic is location- and scale-free; normal draws are used, and for other
    finite-variance laws the difference is of higher order).  The chi-square(h) reference is liberal
    at audit-window lengths: about 0.04 instead of 0.025 for n = 56 (docs/validation.md).
    """
    from .diagnostics import ljung_box_batch

    key = ("independence", "ljung-box", f"n={int(n)}", f"h={int(lags)}", f"R={int(replicates)}", f"seed={int(seed)}")

    def build() -> StatisticTable:
        x = key_rng(seed, *key).standard_normal((replicates, n))
        q, _ = ljung_box_batch(x, lags)
        return StatisticTable(key, np.sort(q))

    return (cache if cache is not None else CalibrationCache()).get(key, build)


def reference_values(statistics: np.ndarray) -> np.ndarray:
    """Per-member 95 % points of simulated null maps (R, A, B); +inf for a member that is
    infinite in more than 5 % of the sets (it then never enters the standardised maximum)."""
    s = statistics.reshape(statistics.shape[0], -1)
    with np.errstate(invalid="ignore"):
        ref = np.quantile(s, REFERENCE_QUANTILE, axis=0, method="higher")
    ref = np.where(np.isfinite(ref) & (ref > 0), ref, np.inf)
    return ref.reshape(statistics.shape[1:])


def standardised_maximum(statistics: np.ndarray, reference: np.ndarray) -> np.ndarray | float:
    """``max_g T_g / c_g`` over the grid points finite in ``statistics`` (``+inf`` if none is).

    ``statistics`` has shape (..., A, B) and ``reference`` (A, B).  Members with an infinite
    reference value never enter the maximum.
    """
    t = np.asarray(statistics, dtype=float)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(np.isfinite(t) & np.isfinite(reference), t / reference, -np.inf)
    flat = ratio.reshape(ratio.shape[:-2] + (-1,))
    out = flat.max(axis=-1)
    out = np.where(np.isneginf(out), np.inf, out)
    return out[()] if np.ndim(out) == 0 else out


class TableStore(Protocol):
    """Where a :class:`CalibrationCache` keeps simulated tables between runs (core does no I/O:
    the caller supplies the store, e.g. ``fitaudit.tasks.table_store.FolderTableStore``).

    ``load(key)`` returns the table kept under ``key``, or None when there is none or it cannot be
    used (unreadable, or made by other code); ``save(key, table)`` keeps a table just built, and
    ``release(key)`` is told when that build failed.  None of them raises because the store
    cannot be read or written: a store only saves work, since
    a table is a deterministic function of its key and the seed (docs/method.md §7.7).
    """

    def load(self, key: tuple) -> NullTable | StatisticTable | None: ...

    def save(self, key: tuple, table: NullTable | StatisticTable) -> None: ...

    def release(self, key: tuple) -> None:
        """The build of ``key``, for which ``load`` returned None, failed (a store that makes other
        processes wait for a table it let this one build tells them to stop waiting)."""


@dataclass
class CalibrationCache:
    """Explicit store of null tables shared by all models of a run (no hidden globals).

    ``get(key, build)`` returns the table for ``key``, building it once with ``build()``.  Tables
    are deterministic functions of their key and the run seed, so caches built in different
    batches or processes hold identical tables and can be merged.  With a ``store`` (see
    :class:`TableStore`), a table missing here is first looked up there, and one built here is
    saved there, so later runs reuse it; ``reused`` holds the keys of the tables taken from the
    store (also those of a merged cache).  ``draws(key, make)`` keeps the random draws every model
    uses alike (change location's permutations) for this process only.
    """

    tables: dict = field(default_factory=dict)
    hits: int = 0
    builds: int = 0
    store: TableStore | None = field(default=None, compare=False)
    reused: frozenset = frozenset()
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False, compare=False)
    _draws: dict = field(default_factory=dict, repr=False, compare=False)

    def get(self, key: tuple, build: Callable[[], NullTable]) -> NullTable:
        """The table for ``key``; ``build`` runs only when the key is new here and in the store
        (thread-safe)."""
        with self._lock:
            table = self.tables.get(key)
            if table is not None:
                self.hits += 1
                return table
            table = self.store.load(key) if self.store is not None else None
            if table is None:
                try:
                    table = build()
                except BaseException:
                    if self.store is not None:
                        self.store.release(key)
                    raise
                self.builds += 1
                if self.store is not None:
                    self.store.save(key, table)
            else:
                self.reused = self.reused | {key}
            # a new dict, not an insertion: another thread may be iterating the tables (Prefect
            # walks a task's parameters while batches in other task threads add tables)
            self.tables = {**self.tables, key: table}
            return table

    def draws(self, key: tuple, make: Callable[[], np.ndarray]) -> np.ndarray:
        """Random draws that every model of a run uses alike (the permutations of change location),
        made once in this process with ``make()`` and returned read-only (thread-safe).

        Unlike the tables they are kept only in this process: never stored, merged or pickled, since
        they are a function of ``key`` and the seed and cost less to make than to move.
        """
        with self._lock:
            drawn = self._draws.get(key)
            if drawn is None:
                drawn = make()
                drawn.flags.writeable = False
                self._draws = {**self._draws, key: drawn}
            return drawn

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state.pop("_lock", None)
        state.pop("_draws", None)
        return state

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state)
        self._lock = threading.Lock()
        self._draws = {}

    def merge(self, other: CalibrationCache) -> None:
        """Add the tables of ``other`` that this cache lacks (a new dict, as in :meth:`get`), and
        which of them ``other`` took from its store."""
        with self._lock:
            new = {k: v for k, v in other.tables.items() if k not in self.tables}
            if new:
                self.tables = {**self.tables, **new}
                self.reused = self.reused | (other.reused & new.keys())

    def __len__(self) -> int:
        return len(self.tables)


def describe_key(key: tuple) -> str:
    """Readable form of a table key, e.g. ``refit normal n=400 s=22 grid 17x9 geometric R=999``."""
    parts = []
    for item in key:
        if isinstance(item, tuple) and item and item[0] == "gate":
            _, parts_, members, scaling, _r = item
            parts.append(f"gate {'+'.join(p[0] for p in parts_)} x {len(members)} member(s) {scaling}")
        elif isinstance(item, tuple) and len(item) == 4 and isinstance(item[0], tuple):
            alphas, betas, scaling, r = item
            parts.append(f"grid {len(alphas)}x{len(betas)} {scaling}" + (f" r={r:g}" if r is not None else ""))
        else:
            parts.append(str(item))
    return " ".join(parts)


def _grid_key(alphas, betas, scaling: str, r) -> tuple:
    return (
        tuple(float(a) for a in np.round(np.asarray(alphas, float), 12)),
        tuple(float(b) for b in np.round(np.asarray(betas, float), 12)),
        scaling,
        r,
    )


def _map_statistics(counts: np.ndarray, s: int, alphas, betas, scaling, r) -> np.ndarray:
    """Divergence maps of simulated count vectors, shape (R, A, B)."""
    m = divergence_map(np.atleast_2d(counts), np.full(s, 1.0 / s), alphas, betas, scaling, r, members=False)
    return m.statistic


def _with_gate(
    key: tuple, maps: np.ndarray, replicates: int, gate: Gate | None, u: np.ndarray | CountsBelow | None
) -> NullTable:
    """A table from 2R simulated maps (first R calibrate, last R give reference values) and, with
    a gate, the gate's statistics of the same simulated PIT values ``u``."""
    if gate is None:
        return NullTable.from_replicates(key, maps[:replicates], reference_values(maps[replicates:]))
    g = gate.statistics(u)
    return NullTable.from_replicates(
        key,
        maps[:replicates],
        reference_values(maps[replicates:]),
        gate_statistics=g[:replicates],
        gate_reference=reference_values(g[replicates:]),
    )


def production_table(
    n: int,
    s: int,
    alphas,
    betas,
    scaling: str,
    r,
    replicates: int,
    seed: int,
    cache: CalibrationCache | None = None,
    gate: Gate | None = None,
) -> NullTable:
    """Null table for frozen parameters: PIT values i.i.d. U(0, 1).

    Exact for the production check (and for forecast audits): with the law fixed before the data
    are seen, the PIT values of a correct model are i.i.d. U(0, 1).  Without a ``gate`` the counts
    are drawn directly from multinomial(n, 1/s); with one, ``2R`` samples of ``n`` uniforms are
    scored on the map's ``s`` equiprobable cells and on every partition of the gate.
    """
    key = (
        "production",
        f"n={int(n)}",
        f"s={int(s)}",
        _grid_key(alphas, betas, scaling, r),
        f"R={int(replicates)}",
        f"seed={int(seed)}",
    )
    if gate is not None:
        key = key + (gate.key(),)

    def build() -> NullTable:
        rng = key_rng(seed, *key)
        if gate is None:
            counts = rng.multinomial(n, np.full(s, 1.0 / s), size=2 * replicates).astype(float)
            return _with_gate(key, _map_statistics(counts, s, alphas, betas, scaling, r), replicates, None, None)
        u = rng.random((2 * replicates, n))
        return _with_gate(key, _map_statistics(cell_counts(u, s), s, alphas, betas, scaling, r), replicates, gate, u)

    return (cache if cache is not None else CalibrationCache()).get(key, build)


def settings_production_table(
    settings, n: int, s: int, gate: Gate | None, cache: CalibrationCache | None = None
) -> NullTable:
    """:func:`production_table` with the grid, replicates and seed of ``settings`` (an ``AuditSettings``)."""
    grid = (settings.alphas, settings.betas, settings.scaling, settings.r)
    return production_table(n, s, *grid, settings.replicates, settings.seed, cache, gate=gate)


def settings_refit_table(
    settings,
    law,
    n: int,
    s: int,
    location: bool,
    gate: Gate | None,
    shape: float | None = None,
    cache: CalibrationCache | None = None,
) -> NullTable:
    """:func:`refit_table` with the grid, replicates and seed of ``settings`` (an ``AuditSettings``)."""
    grid = (settings.alphas, settings.betas, settings.scaling, settings.r)
    return refit_table(
        law, n, s, location, *grid, settings.replicates, settings.seed, shape=shape, cache=cache, gate=gate
    )


#: Rows of simulated residuals fitted at a time when a refit table is built.
_FIT_BLOCK_ROWS = 256

#: Step of the grid in ``1 / nu`` on which the null of a student-t law with estimated degrees of
#: freedom is simulated (docs/method.md §7.3).
INVERSE_SHAPE_STEP = 0.02


def shape_key(shape: float | None, estimated: bool = False) -> float | None:
    """Shape value at which a table is simulated and by which it is keyed.

    A fixed shape is used as given.  An estimated student-t degrees of freedom ``nu`` is moved to
    the nearest point of a grid uniform in ``1 / nu`` with step :data:`INVERSE_SHAPE_STEP`,
    ``nu_key = 1 / (k h)`` with ``k = max(1, round(1 / (nu h)))``: the t density differs from the
    normal by a term of order ``1 / nu`` (``f_nu(z) = phi(z) (1 + (z^4 - 2 z^2 - 1) / (4 nu) +
    O(nu^-2))``, Johnson, Kotz and Balakrishnan 1995, ch. 28; from memory), so equal steps in
    ``1 / nu`` are equal steps in distance from the normal, and every estimate above
    ``2 / (3 h)`` (about 33) shares the table at ``nu = 1 / h`` (50).  The step is far below the
    estimate's own error and the tables' Monte Carlo error (docs/method.md §7.3).

    >>> shape_key(7.3), shape_key(7.3, estimated=True), shape_key(180.0, estimated=True)
    (7.3, 7.142857142857142, 50.0)
    """
    if shape is None:
        return None
    if not estimated:
        return float(shape)
    k = max(1, round(1.0 / (float(shape) * INVERSE_SHAPE_STEP)))
    return 1.0 / (k * INVERSE_SHAPE_STEP)


def refit_table(
    law,
    n: int,
    s: int,
    location: bool,
    alphas,
    betas,
    scaling: str,
    r,
    replicates: int,
    seed: int,
    shape: float | None = None,
    cache: CalibrationCache | None = None,
    gate: Gate | None = None,
) -> NullTable:
    """Null table for residuals whose noise parameters were re-estimated.

    Simulates ``2R`` samples of ``n`` i.i.d. standard draws of ``law`` (at ``shape`` when the law
    has one), re-estimates location (if ``location``), scale (and the shape, if the law estimates
    it) with :meth:`NoiseLaw.fit_batch` - the same estimator as for the observed residuals - and
    scores the PIT values in ``s`` equiprobable cells and, with a ``gate``, on its partitions.
    Pivotal for location-scale laws (the table does not depend on the true location and scale).
    """
    if not law.pivotal:
        raise InputError(
            f"refit_table: the {law.name} law has no pivotal null after re-estimation (its law depends on the "
            "predictive means); count checks use production_table."
        )
    shape_free = law.has_shape and law.shape is None
    skey = shape_key(shape, estimated=shape_free)
    estimated = "shape estimated" if shape_free else "shape fixed"
    key = (
        "refit",
        f"law={law.name}",
        f"shape={skey}",
        estimated,
        f"location={'estimated' if location else 'zero'}",
        f"n={int(n)}",
        f"s={int(s)}",
        _grid_key(alphas, betas, scaling, r),
        f"R={int(replicates)}",
        f"seed={int(seed)}",
    )
    if gate is not None:
        key = key + (gate.key(),)

    def build() -> NullTable:
        rng = key_rng(seed, *key)
        x = law.sample_standard((2 * replicates, n), rng, shape=skey)
        # only cell counts are scored: each row's values are counted below the quantiles of its
        # fitted law at the cells' boundaries (the same counts as the PIT values', far cheaper)
        bounds = boundary_union(s, *(p.boundaries for p in (gate.partitions if gate is not None else ())))
        below = np.empty((len(x), bounds.size), dtype=np.int64)
        # rows are fitted independently, so blocks give the same values with a fraction of the
        # Newton iterations' temporary arrays (about ten of the block's size)
        for start in range(0, len(x), _FIT_BLOCK_ROWS):
            block = x[start : start + _FIT_BLOCK_ROWS]
            fitted = law.fit_batch(block, location=location)
            below[start : start + _FIT_BLOCK_ROWS] = law.counts_below_batch(block, *fitted, bounds).below
        pit = CountsBelow(bounds, below, n)
        maps = _map_statistics(cell_counts(pit, s), s, alphas, betas, scaling, r)
        return _with_gate(key, maps, replicates, gate, pit)

    return (cache if cache is not None else CalibrationCache()).get(key, build)


def bootstrap_table(
    score_replicate: Callable[[np.random.Generator], np.ndarray | tuple | None],
    replicates: int,
    rng: np.random.Generator,
    reference: np.ndarray,
    key: tuple = ("bootstrap",),
    gate_reference: np.ndarray | None = None,
) -> NullTable:
    """Parametric-bootstrap table from ``replicates`` data sets simulated from the fitted model.

    ``score_replicate(rng)`` must simulate one series from the fitted model, refit it with the
    same procedure and return the replicate's divergence map statistics (shape (A, B)), or None
    when its refit fails; failed replicates are dropped (docs/method.md §7.4).  ``reference`` are the
    members' reference values, taken from the matching simulated table (independent of these
    replicates).  With ``gate_reference`` (the gate's reference values from that table),
    ``score_replicate`` returns a pair (map statistics, gate statistics of shape (P, G)).
    """
    scored = [m for m in (score_replicate(rng) for _ in range(replicates)) if m is not None]
    if not scored:
        raise InputError("bootstrap_table: every bootstrap refit failed; use calibration='simulated' for this model.")
    if gate_reference is None:
        return NullTable.from_replicates(tuple(key), np.stack(scored), reference, method="bootstrap")
    maps, gates = zip(*scored)
    return NullTable.from_replicates(
        tuple(key),
        np.stack(maps),
        reference,
        method="bootstrap",
        gate_statistics=np.stack(gates),
        gate_reference=gate_reference,
    )


def chi2_p_value(statistic: float, df: int) -> float:
    """Upper-tail chi-square probability ``P(chi2_df >= statistic)`` (``+inf`` gives 0)."""
    if np.isinf(statistic):
        return 0.0
    return float(chi2_sf(statistic, df))


def chi2_critical_value(level: float, df: int) -> float:
    """Upper ``level`` point of chi-square(df): ``chi2.ppf(1 - level, df)``."""
    return float(stats.chi2.isf(level, df))


def nrr_term(
    counts: np.ndarray, information: np.ndarray, gradient: np.ndarray, probs: np.ndarray | None = None
) -> float:
    """Nikulin-Rao-Robson correction ``V' B (J - J*)^-1 B' V`` for fixed cells.

    With cell probabilities ``q_j`` (``1/s`` unless ``probs`` is given),
    ``V_j = (N_j - n q_j) / sqrt(n q_j)``, ``B_ji = (dq_j/dtheta_i)/sqrt(q_j)``,
    ``J`` the per-observation Fisher information of the estimated noise parameters and
    ``J* = B'B``: adding this term to ``X2`` (or to any member of the family, docs/method.md §5.4)
    restores the chi-square(s - 1) limit when the parameters are maximum-likelihood estimates
    from the raw residuals (Nikulin 1973; Rao and Robson 1974).

    Parameters
    ----------
    counts : ndarray, shape (s,)
    information : ndarray, shape (k, k)
        ``J``.
    gradient : ndarray, shape (s, k)
        ``dq_j/dtheta_i`` at the estimate, cell boundaries held fixed.
    probs : ndarray, shape (s,), optional
        Cell probabilities; equiprobable cells when omitted.
    """
    counts = np.asarray(counts, dtype=float)
    s = counts.size
    n = counts.sum()
    if gradient.size == 0:
        return 0.0
    q = np.full(s, 1.0 / s) if probs is None else np.asarray(probs, dtype=float)
    v = (counts - n * q) / np.sqrt(n * q)
    b = np.asarray(gradient, dtype=float) / np.sqrt(q)[:, None]
    j_star = b.T @ b
    bv = b.T @ v
    return float(bv @ np.linalg.solve(np.asarray(information, dtype=float) - j_star, bv))


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
    (also to other processes), so no table is built twice.  Tables are deterministic functions of
    their key and the seed (docs/method.md §7.7), so planning them changes no result.
    ``build_tables(table_jobs(entries), cache)``: callers with several processes can build the
    jobs apart and merge the caches in the jobs' order.

    Parameters
    ----------
    entries : sequence of (spec, noise, AuditSettings, int, bool)
        Per model: its spec (or dict), noise law (name, dict or law), settings, number of
        observations and whether it has a production version.  A model whose spec or law is
        invalid is skipped (its own audit reports the problem).
    cache : CalibrationCache, optional
        Tables to add to; a new cache when omitted.

    Returns
    -------
    CalibrationCache
    """
    return build_tables(table_jobs(entries), cache)


def table_jobs(entries: Sequence[tuple[Any, Any, AuditSettings, int, bool]]) -> list[tuple]:
    """The distinct null tables :func:`prepare_calibration` builds for ``entries``, one job each, in
    the order it builds them.

    A job is ``("production", settings, n, None, None)`` or ``("refit", settings, n, law,
    location)``; jobs are plain picklable tuples, so they can be built in other processes
    (:func:`build_tables`).
    """
    jobs: dict[tuple, tuple] = {}
    for spec, noise, settings, n_obs, has_production in entries:
        if settings.calibration == "asymptotic":
            continue
        try:
            model, law = as_model(spec), as_noise_law(noise)
            if has_production and n_obs >= settings.audit_window:
                job = ("production", settings, settings.audit_window, None, None)
                jobs.setdefault(table_job_key(job), job)
            if settings.calibration == "simulated" and law.pivotal and not (law.has_shape and law.shape is None):
                n = (settings.fit_window or n_obs) - model.presample()
                job = ("refit", settings, n, law, model.has_location())
                jobs.setdefault(table_job_key(job), job)
        except (FitauditError, ValueError):
            continue  # the model's own audit reports the problem
    return list(jobs.values())


def table_job_key(job: tuple) -> tuple:
    """What identifies a :func:`table_jobs` job (its law by name and shape): jobs with equal keys
    build the same table.

    >>> from fitaudit.core.settings import AuditSettings
    >>> job = ("refit", AuditSettings(), 100, as_noise_law("normal"), True)
    >>> table_job_key(job)[3:]
    (('normal', None), True)
    """
    kind, settings, n, law, location = job
    return (kind, settings, n, None if law is None else (law.name, law.shape), location)


def build_tables(jobs: Sequence[tuple], cache: CalibrationCache | None = None) -> CalibrationCache:
    """Build the null tables of :func:`table_jobs` ``jobs`` into ``cache`` (a new one when
    omitted), in order; a table already there (or in its store) is not simulated again."""
    cache = cache if cache is not None else CalibrationCache()
    for kind, settings, n, law, location in jobs:
        try:
            if kind == "production":
                settings_production_table(settings, n, number_of_cells(n, 0), settings.gate(n, 0), cache)
            else:
                k = law.n_estimated(location)
                s = number_of_cells(n, k)
                settings_refit_table(settings, law, n, s, location, settings.gate(n, k), shape=law.shape, cache=cache)
        except (FitauditError, ValueError):
            continue  # the audits that need the table report the problem
    return cache
