"""Scaled Bregman divergences with power generators, and the divergence map.

For cell probabilities ``p`` (empirical), ``q`` (model) and a scale ``m``, the scaled Bregman
divergence with the power generator ``phi_alpha`` is (Stummer and Vajda 2012)

    B_alpha(P, Q | M) = sum_j m_j^(1 - alpha) * D_alpha(p_j, q_j),
    D_alpha(p, q)     = [p^alpha + (alpha - 1) q^alpha - alpha p q^(alpha - 1)] / (alpha (alpha - 1)),

with the limits ``D_1(p, q) = p log(p/q) - p + q`` and ``D_0(p, q) = p/q - 1 - log(p/q)``.
Writing ``x = p/q`` and ``m = q w(x)`` this is ``B = sum_j q_j w(x_j)^(1 - alpha) phi_alpha(x_j)``.

The scale is a weighted mean of the two densities:

=============  ==========================================  =================================
scaling        m                                           notes
=============  ==========================================  =================================
``geometric``  ``p^beta q^(1 - beta)``                     default; beta = 0 gives ``model``
``power``      ``(beta p^r + (1 - beta) q^r)^(1/r)``       r = 1 arithmetic; r = 0 geometric
``model``      ``q``                                       the Cressie-Read family
``data``       ``p``                                       beta is ignored
``unit``       ``1``                                       unscaled (density power) form
=============  ==========================================  =================================

With ``m = q`` the statistic ``2 n B`` equals Cressie and Read's power-divergence statistic with
``lambda = alpha - 1``: Pearson's X2 (alpha = 2), the likelihood-ratio G2 (alpha = 1), the
Cressie-Read recommended statistic (alpha = 5/3), Freeman-Tukey (alpha = 1/2) and Neyman's
modified X2 (alpha = -1).

References
----------
.. [1] W. Stummer and I. Vajda, "On Bregman distances and divergences of probability
       measures", IEEE Trans. Inf. Theory 58(3), 2012, p. 1277.
.. [2] N. Cressie and T. R. C. Read, "Multinomial goodness-of-fit tests", JRSS B 46, 1984,
       p. 440.
.. [3] A. Cichocki and S. Amari, "Families of alpha-, beta- and gamma-divergences",
       Entropy 12, 2010, p. 1532.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

import numpy as np

from ._plain import KEEP, plain_data
from ._scipy import special
from .exceptions import InputError

__all__ = [
    "SCALINGS",
    "CLASSICAL_MEMBERS",
    "CLASSICAL_MEMBER_LABELS",
    "DEFAULT_ALPHAS",
    "DEFAULT_BETAS",
    "DivergenceMap",
    "power_generator",
    "scaled_bregman",
    "divergence_map",
    "partition_statistics",
    "row_block",
    "empty_cell_factor",
    "zero_model_cell_factor",
]

Scaling = Literal["geometric", "power", "model", "data", "unit"]
SCALINGS: tuple[str, ...] = ("geometric", "power", "model", "data", "unit")

#: Classical goodness-of-fit statistics as (alpha, beta, scaling) of the family.
CLASSICAL_MEMBERS: dict[str, tuple[float, float, str]] = {
    "pearson": (2.0, 0.0, "model"),
    "likelihood-ratio": (1.0, 0.0, "model"),
    "cressie-read-2/3": (5.0 / 3.0, 0.0, "model"),
    "freeman-tukey": (0.5, 0.0, "model"),
    "neyman": (-1.0, 0.0, "model"),
}
#: How reports and tables name the classical members (Cressie and Read 1984, section 2).
CLASSICAL_MEMBER_LABELS: dict[str, str] = {
    "pearson": "Pearson X²",
    "likelihood-ratio": "G² (likelihood ratio)",
    "cressie-read-2/3": "Cressie-Read λ = 2/3",
    "freeman-tukey": "Freeman-Tukey",
    "neyman": "Neyman",
}

#: The map's grid (docs/method.md §2.6): alpha = -1..3 step 0.25, beta = 0..1 step 0.125.
DEFAULT_ALPHAS: np.ndarray = np.arange(-4, 13) * 0.25
DEFAULT_BETAS: np.ndarray = np.arange(0, 9) * 0.125
DEFAULT_ALPHAS.setflags(write=False)
DEFAULT_BETAS.setflags(write=False)

_EPS = np.finfo(float).eps
_TIE = 64 * _EPS  # exponent ties in the empty-cell limits (docs/method.md §4.1)
_SERIES_RADIUS = 1e-3  # |u| * max(1, |alpha|, |1 - alpha|) below which the series is used


# --------------------------------------------------------------------------------------------
# The power generator
# --------------------------------------------------------------------------------------------
def _phi_log_argument(u: np.ndarray, a: np.ndarray) -> np.ndarray:
    """phi_alpha(exp(u)) by the stable recipe of docs/method.md §2.5 (may overflow to inf)."""
    scale = np.maximum(1.0, np.maximum(np.abs(a), np.abs(1.0 - a)))
    small = np.abs(u) * scale < _SERIES_RADIUS
    any_small = bool(small.any())  # rare in counts of a few dozen per cell: then no series at all
    if any_small:
        # series: sum_{k>=2} h_{k-2}(a) u^k / k!, h_j(a) = 1 + a + ... + a^j
        us = np.where(small, u, 0.0)
        h = np.ones_like(a * us)
        upow = us * us
        fact = 2.0
        series = np.zeros_like(h)
        for k in range(2, 10):
            series = series + h * upow / fact
            h = h * a + 1.0
            upow = upow * us
            fact *= k + 1
    ul = np.where(small, 1.0, u) if any_small else u
    lo = a <= 0.5
    # alpha <= 1/2: [u exprel(alpha u) - expm1(u)] / (alpha - 1), smooth through alpha = 0
    # alpha >  1/2: duality phi_alpha(x) = x phi_{1 - alpha}(1/x), smooth through alpha = 1
    a_lo = np.where(lo, a, 0.0)
    a_hi = np.where(lo, 1.0, a)
    v_lo = (ul * special.exprel(a_lo * ul) - np.expm1(ul)) / (a_lo - 1.0)
    v_hi = np.exp(ul) * ((-ul) * special.exprel((a_hi - 1.0) * ul) - np.expm1(-ul)) / (-a_hi)
    far = np.where(lo, v_lo, v_hi)
    return np.where(small, series, far) if any_small else far


def _log_phi_far(u: np.ndarray, a: np.ndarray) -> np.ndarray:
    """log phi_alpha(exp(u)) where the stable form overflows (|u| of several hundred).

    Signed log-sum-exp of the three Csiszar terms x^a - a x + (a - 1), divided by a (a - 1);
    at such |u| one term dominates, so there is no cancellation.  alpha in {0, 1} use the
    limits phi_1(x) = x log x - x + 1 and phi_0(x) = x - 1 - log x.
    """
    out = np.empty_like(u)
    one = np.abs(a - 1.0) < _TIE
    zero = np.abs(a) < _TIE
    gen = ~(one | zero)
    if one.any():
        uu = u[one]
        # u > 0: x (u - 1) + 1 ~ x (u - 1); u < 0 never overflows (phi -> 1)
        out[one] = np.where(uu > 0, uu + np.log(np.abs(uu - 1.0)), np.log1p(-np.exp(uu) * (1.0 - uu)))
    if zero.any():
        uu = u[zero]
        out[zero] = np.where(uu > 0, uu + np.log1p(-(1.0 + uu) * np.exp(-uu)), np.log(-uu - 1.0 + np.exp(uu)))
    if gen.any():
        uu, aa = u[gen], a[gen]
        terms = np.stack([aa * uu, uu + np.log(np.abs(aa)), np.log(np.abs(aa - 1.0))])
        signs = np.stack([np.ones_like(aa), -np.sign(aa), np.sign(aa - 1.0)])
        top = terms.max(axis=0)
        s = (signs * np.exp(terms - top)).sum(axis=0)
        out[gen] = top + np.log(s / (aa * (aa - 1.0)))
    return out


def _log_phi(u: np.ndarray, a: np.ndarray) -> np.ndarray:
    """log phi_alpha(exp(u)) for finite u; -inf where u == 0."""
    with np.errstate(all="ignore"):
        phi = _phi_log_argument(u, a)
        out = np.log(np.maximum(phi, 0.0))
    bad = ~np.isfinite(phi)
    if bad.any():
        uu, aa = np.broadcast_arrays(u, a)
        out = np.array(out, copy=True)
        with np.errstate(all="ignore"):
            out[bad] = _log_phi_far(uu[bad].astype(float), aa[bad].astype(float))
    return out


def power_generator(x, alpha):
    """The power generator phi_alpha, evaluated stably.

    ``phi_alpha(t) = (t^alpha - 1 - alpha (t - 1)) / (alpha (alpha - 1))`` with the limits
    ``phi_1(t) = t log t - t + 1`` and ``phi_0(t) = t - 1 - log t``; ``phi_alpha(1) = 0`` and
    ``phi_alpha''(1) = 1`` for every alpha.

    Parameters
    ----------
    x : array_like
        Non-negative arguments (ratios p/q).
    alpha : array_like
        Power index; broadcasts against ``x``.

    Returns
    -------
    ndarray or float
        ``phi_alpha(x)``; ``phi_alpha(0) = 1/alpha`` for alpha > 0 and ``+inf`` for alpha <= 0.

    Notes
    -----
    With ``u = log x``: a Taylor series ``sum_k h_{k-2}(alpha) u^k / k!`` near ``x = 1``;
    ``[u exprel(alpha u) - expm1(u)] / (alpha - 1)`` for alpha <= 1/2; and the duality
    ``phi_alpha(x) = x phi_{1-alpha}(1/x)`` for alpha > 1/2 (docs/method.md §2.5). The naive formula
    loses all relative accuracy near x = 1 and for alpha near 0 or 1; this one does not.

    Examples
    --------
    >>> float(power_generator(4.0, 2.0))   # (4 - 1)^2 / 2
    4.5

    Near ``x = 1`` the value is ``d^2/2 (1 + (alpha - 2) d / 3 + ...)`` with ``d = x - 1``; the naive
    formula returns 0 here (every digit cancels), the stable one keeps the digits:

    >>> d = 2.0**-30  # x - 1, exact in binary floating point (1 + 1e-9 is not)
    >>> round(float(power_generator(1 + d, 0.5)) / (d * d / 2), 9)
    1.0
    """
    x = np.asarray(x, dtype=float)
    a = np.asarray(alpha, dtype=float)
    if np.any(x < 0) or np.any(np.isnan(x)):
        raise InputError("power_generator: x must be non-negative and not NaN.")
    x, a = np.broadcast_arrays(x, a)
    out = np.empty(x.shape)
    pos = x > 0
    with np.errstate(divide="ignore", over="ignore"):
        u = np.log(np.where(pos, x, 1.0))
        out[pos] = np.exp(_log_phi(u[pos], a[pos]))
    zer = ~pos
    out[zer] = np.where(a[zer] > 0, 1.0 / np.where(a[zer] > 0, a[zer], 1.0), np.inf)
    return out[()] if out.ndim == 0 else out


# --------------------------------------------------------------------------------------------
# Boundary limits (docs/method.md §4)
# --------------------------------------------------------------------------------------------
def _power_r(scaling: str, r: float | None) -> float | None:
    if scaling == "power" and r is not None and abs(r) < _TIE:
        return None  # r = 0 is the geometric mean
    return r


def _quiet(fn):
    """Run ``fn`` with floating-point warnings off: limits such as 1/alpha for alpha ~ 1e-320
    legitimately overflow to +inf."""

    def wrapper(*args, **kwargs):
        with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
            return fn(*args, **kwargs)

    wrapper.__name__, wrapper.__qualname__, wrapper.__doc__ = fn.__name__, fn.__qualname__, fn.__doc__
    wrapper.__wrapped__ = fn
    return wrapper


@_quiet
def empty_cell_factor(alpha, beta, scaling: str = "geometric", r: float | None = None) -> np.ndarray:
    """Limit f0 of an empty cell (p = 0 < q): its contribution to B is ``f0 * q``.

    ``f0 = lim_{x -> 0} w(x)^(1 - alpha) phi_alpha(x)`` with ``m = q w(p/q)`` (docs/method.md §4.1):

    * model (m = q): ``1/alpha`` for alpha > 0, ``+inf`` for alpha <= 0;
    * data (m = p): 0 for alpha < 1, 1 at alpha = 1, ``+inf`` for alpha > 1;
    * geometric: 1 at alpha = 1; else with ``e = beta (1 - alpha) + min(alpha, 0)``:
      0 if e > 0, ``+inf`` if e < 0, and ``1/alpha`` (alpha > 0) or ``1/(alpha (alpha - 1))``
      (alpha < 0) at the tie e = 0; at alpha = 0: 0 if beta > 0 else ``+inf``;
    * power with r > 0, beta < 1: ``(1 - beta)^((1 - alpha)/r) / alpha`` for alpha > 0, else ``+inf``;
      power with r < 0, beta > 0 behaves as data;
    * unit (m = 1): the contribution is ``q^alpha / alpha`` for alpha > 0; this returns ``1/alpha``
      (the caller multiplies by ``q^alpha``).

    Returns
    -------
    ndarray
        Broadcast of ``alpha`` and ``beta``; entries in ``[0, +inf]``.
    """
    a, b = np.broadcast_arrays(np.asarray(alpha, float), np.asarray(beta, float))
    r = _power_r(scaling, r)
    inv_a = np.divide(1.0, a, out=np.full(a.shape, np.inf), where=a > 0)
    model = np.where(a > 0, inv_a, np.inf)
    data = np.where(a < 1 - _TIE, 0.0, np.where(a > 1 + _TIE, np.inf, 1.0))
    if scaling in ("model", "unit"):
        return model.copy()
    if scaling == "data":
        return data
    if scaling == "geometric" or (scaling == "power" and r is None):
        e = b * (1.0 - a) + np.minimum(a, 0.0)
        with np.errstate(divide="ignore", invalid="ignore"):
            tie = np.where(a > 0, inv_a, 1.0 / (a * (a - 1.0)))
        out = np.where(e > _TIE, 0.0, np.where(e < -_TIE, np.inf, tie))
        out = np.where(np.abs(a) < _TIE, np.where(b > _TIE, 0.0, np.inf), out)
        return np.where(np.abs(a - 1.0) < _TIE, 1.0, out)
    if scaling == "power":
        if r > 0:
            with np.errstate(divide="ignore", invalid="ignore"):
                w0 = np.power(np.maximum(1.0 - b, 0.0), (1.0 - a) / r)
            out = np.where(a > 0, w0 * np.where(a > 0, inv_a, 0.0), np.inf)
            return np.where(b >= 1.0 - _TIE, data, out)
        return np.where(b <= _TIE, model, data)
    raise _unknown_scaling(scaling)


@_quiet
def zero_model_cell_factor(alpha, beta, scaling: str = "geometric", r: float | None = None) -> np.ndarray:
    """Limit g0 of a cell the model calls impossible (q = 0 < p): its contribution is ``g0 * p``.

    Finite only when m ~ c q with alpha < 1 (``g0 = c^(1 - alpha) / (1 - alpha)``) or m ~ c p with
    alpha > 1 (``g0 = c^(1 - alpha) / (alpha (alpha - 1))``), docs/method.md §4.2: model (c = 1), data
    (c = 1), power r > 0, beta > 0 (m ~ beta^(1/r) p), power r < 0, beta < 1
    (m ~ (1 - beta)^(1/r) q).  Always ``+inf`` for geometric 0 < beta < 1 and at alpha = 1.
    For unit scaling the contribution is ``p^alpha / (alpha (alpha - 1))`` (alpha > 1); this
    returns that factor of ``p^alpha``.
    """
    a, b = np.broadcast_arrays(np.asarray(alpha, float), np.asarray(beta, float))
    r = _power_r(scaling, r)
    with np.errstate(divide="ignore", invalid="ignore"):
        qlike = np.where(a < 1 - _TIE, 1.0 / (1.0 - a), np.inf)
        plike = np.where(a > 1 + _TIE, 1.0 / (a * (a - 1.0)), np.inf)
        if scaling in ("model",):
            return qlike
        if scaling in ("data", "unit"):
            return plike
        if scaling == "geometric" or (scaling == "power" and r is None):
            return np.where(b <= _TIE, qlike, np.where(b >= 1 - _TIE, plike, np.inf))
        if scaling == "power":
            if r > 0:
                c = np.power(np.maximum(b, 0.0), 1.0 / r)
                return np.where(b <= _TIE, qlike, np.power(c, 1.0 - a) * plike)
            c = np.power(np.maximum(1.0 - b, 0.0), 1.0 / r)
            return np.where(b >= 1 - _TIE, plike, np.power(c, 1.0 - a) * qlike)
    raise _unknown_scaling(scaling)


# --------------------------------------------------------------------------------------------
# Validation
# --------------------------------------------------------------------------------------------
def _unknown_scaling(scaling) -> InputError:
    return InputError(f"Unknown scaling {scaling!r}; valid scalings are {', '.join(repr(s) for s in SCALINGS)}.")


def _check_scaling(scaling, r, owner: str) -> float | None:
    if scaling not in SCALINGS:
        raise _unknown_scaling(scaling)
    if scaling == "power":
        if r is None:
            raise InputError(f"{owner}: scaling='power' needs the exponent r (r=1 arithmetic, r=0 geometric).")
        r = float(r)
        if not np.isfinite(r):
            raise InputError(f"{owner}: the power-mean exponent r must be finite; got {r!r}.")
        return r
    if r is not None:
        raise InputError(f"{owner}: r is only used with scaling='power'; got r={r!r} with scaling={scaling!r}.")
    return None


def _sum_tolerance(cells: int) -> float:
    """How far from 1 a vector of ``cells`` probabilities may sum (rounding grows with sqrt(cells))."""
    return float(np.sqrt(_EPS) * max(1.0, cells**0.5))


def _check_probabilities(q: np.ndarray, name: str, owner: str) -> None:
    if q.ndim == 0 or q.shape[-1] == 0:
        raise InputError(f"{owner}: {name!r} must have at least one cell along its last axis; got shape {q.shape}.")
    if np.isnan(q).any() or np.isinf(q).any():
        raise InputError(f"{owner}: {name!r} contains NaN or infinite values.")
    if (q < 0).any():
        raise InputError(
            f"{owner}: {name!r} has negative entries (smallest {q.min():.6g}); probabilities must be >= 0."
        )
    tol = _sum_tolerance(q.shape[-1])
    sums = q.sum(axis=-1)
    worst = np.max(np.abs(sums - 1.0))
    if worst > tol:
        actual = np.ravel(sums)[np.argmax(np.abs(np.ravel(sums) - 1.0))]
        raise InputError(
            f"{owner}: {name!r} must sum to 1 along its last axis (tolerance {tol:.3g}); "
            f"one vector sums to {actual:.12g}. Normalise it (divide by its sum) first."
        )


def _check_alpha_beta(alpha, beta, owner: str) -> tuple[np.ndarray, np.ndarray]:
    a = np.asarray(alpha, dtype=float)
    b = np.asarray(beta, dtype=float)
    if not np.isfinite(a).all():
        raise InputError(f"{owner}: alpha must be finite real numbers; got {alpha!r}.")
    if not np.isfinite(b).all() or (b < 0).any() or (b > 1).any():
        raise InputError(f"{owner}: beta is the weight of the scaling mean and must lie in [0, 1]; got {beta!r}.")
    return a, b


# --------------------------------------------------------------------------------------------
# Element-wise cell contributions (reference path, any broadcasting)
# --------------------------------------------------------------------------------------------
def _log_ratio(p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """u = log(p/q) for p, q > 0: log1p((p - q)/q) near p = q (relative accuracy), else a difference of logs."""
    d = (p - q) / q
    near = np.abs(d) < 0.5
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(near, np.log1p(np.where(near, d, 0.0)), np.log(p) - np.log(q))


def _log_scale_ratio(u, q, b, scaling: str, r: float | None):
    """log(m/q) for p, q > 0, with u = log(p/q)."""
    if scaling == "model":
        return np.zeros(np.broadcast_shapes(np.shape(u), np.shape(b)))
    if scaling == "data":
        return u + np.zeros(np.shape(b))
    if scaling == "unit":
        return -np.log(q) + np.zeros(np.broadcast_shapes(np.shape(u), np.shape(b)))
    if scaling == "geometric" or r is None:
        return b * u
    with np.errstate(divide="ignore"):
        return np.logaddexp(np.log(b) + r * u, np.log1p(-b)) / r


@_quiet
def _cell_terms(p, q, a, b, scaling: str, r: float | None) -> np.ndarray:
    """Per-cell contributions b_alpha(p, q, m) >= 0 of every broadcast element."""
    r = _power_r(scaling, r)
    p, q, a, b = np.broadcast_arrays(p, q, a, b)
    out = np.zeros(p.shape)
    pos = (p > 0) & (q > 0)
    if pos.any():
        pp, qq, aa, bb = p[pos], q[pos], a[pos], b[pos]
        u = _log_ratio(pp, qq)
        with np.errstate(over="ignore", invalid="ignore"):
            logb = np.log(qq) + _log_phi(u, aa) + (1.0 - aa) * _log_scale_ratio(u, qq, bb, scaling, r)
            out[pos] = np.exp(logb)
    emp = (p == 0) & (q > 0)
    if emp.any():
        f0 = empty_cell_factor(a[emp], b[emp], scaling, r)
        weight = q[emp] ** a[emp] if scaling == "unit" else q[emp]
        out[emp] = np.where(f0 == 0, 0.0, f0 * weight)
    imp = (q == 0) & (p > 0)
    if imp.any():
        g0 = zero_model_cell_factor(a[imp], b[imp], scaling, r)
        weight = p[imp] ** a[imp] if scaling == "unit" else p[imp]
        out[imp] = g0 * weight
    return out


def scaled_bregman(p, q, alpha, beta=0.0, scaling: Scaling = "geometric", r: float | None = None):
    """Scaled Bregman divergence ``B_{phi_alpha}(P, Q | M)`` of probability vectors.

    ``B = sum_j m_j^(1 - alpha) D_alpha(p_j, q_j)`` (docs/method.md §2.3), with ``m`` the scaling mean
    of ``p`` and ``q`` named by ``scaling`` and weighted by ``beta`` (module docstring).

    Parameters
    ----------
    p, q : array_like
        Probability vectors along the last axis (``p`` empirical, ``q`` model); leading axes
        broadcast.
    alpha : float or array_like
        Power index of the generator; broadcasts against the leading axes.
    beta : float or array_like, default 0.0
        Weight of ``p`` in the scaling mean, in [0, 1]; broadcasts like ``alpha``.
    scaling : {"geometric", "power", "model", "data", "unit"}, default "geometric"
    r : float, optional
        Exponent of the weighted power mean; required for (and only for) ``scaling="power"``.

    Returns
    -------
    float or ndarray
        Non-negative divergence, ``+inf`` where a boundary limit is infinite; never NaN.

    Raises
    ------
    InputError
        Vectors that are negative, contain NaN, do not sum to 1, or have mismatched lengths;
        beta outside [0, 1]; an unknown scaling.

    Notes
    -----
    Empty cells (``p_j = 0 < q_j``) contribute ``f0 q_j`` and impossible cells
    (``q_j = 0 < p_j``) ``g0 p_j``, with the exact limits of :func:`empty_cell_factor` and
    :func:`zero_model_cell_factor`; cells with ``p_j = q_j = 0`` contribute nothing.
    ``alpha = 1`` gives ``KL(P || Q)`` for every scaling and ``alpha = 2`` gives
    ``sum (p - q)^2 / (2 m)``.

    Examples
    --------
    >>> p, q = [0.2, 0.3, 0.5], [0.25, 0.25, 0.5]
    >>> round(float(scaled_bregman(p, q, 2.0, scaling="model")), 6)   # Pearson / (2n)
    0.01
    """
    owner = "scaled_bregman"
    r = _check_scaling(scaling, r, owner)
    p = np.asarray(p, dtype=float)
    q = np.asarray(q, dtype=float)
    _check_probabilities(p, "p", owner)
    _check_probabilities(q, "q", owner)
    if p.shape[-1] != q.shape[-1]:
        raise InputError(f"{owner}: p has {p.shape[-1]} cells but q has {q.shape[-1]}; they must match.")
    a, b = _check_alpha_beta(alpha, beta, owner)
    terms = _cell_terms(p, q, a[..., None], b[..., None], scaling, r)
    out = terms.sum(axis=-1)
    return float(out) if out.ndim == 0 else out


# --------------------------------------------------------------------------------------------
# The divergence map
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class DivergenceMap:
    """The statistics ``T = 2 n B`` over an (alpha, beta) grid, for one or many count vectors.

    Attributes
    ----------
    statistic : ndarray, shape (..., len(alphas), len(betas))
        ``2 n B_{phi_alpha}(P_n, Q | M_beta)``; ``+inf`` where a boundary limit is infinite.
    n : ndarray or int
        Total count of each vector.
    cells : int
        Number of cells s.
    alphas, betas : ndarray
        The grid.
    scaling, r : str, float or None
        The scaling mean.
    infinite : ndarray of bool
        Mask of infinite grid points (left out of the summary).
    t_max : ndarray or float
        Maximum over the finite grid points (``+inf`` if none is finite).
    argmax : tuple of (ndarray or int)
        (alpha index, beta index) of ``t_max``; ``-1`` when no point is finite.
    members : dict
        Classical statistics by name (``pearson``, ``likelihood-ratio``, ``cressie-read-2/3``,
        ``freeman-tukey``, ``neyman``), computed with ``m = q``.
    """

    statistic: np.ndarray
    n: np.ndarray | int
    cells: int
    alphas: np.ndarray
    betas: np.ndarray
    scaling: str
    r: float | None
    infinite: np.ndarray
    t_max: np.ndarray | float
    argmax: tuple
    members: dict = field(default_factory=dict)

    @property
    def alpha_max(self):
        """alpha at the maximum (NaN when no grid point is finite)."""
        i = np.asarray(self.argmax[0])
        return np.where(i >= 0, self.alphas[np.maximum(i, 0)], np.nan)[()]

    @property
    def beta_max(self):
        """beta at the maximum (NaN when no grid point is finite)."""
        j = np.asarray(self.argmax[1])
        return np.where(j >= 0, self.betas[np.maximum(j, 0)], np.nan)[()]

    def row(self, i: int) -> DivergenceMap:
        """The map of the i-th count vector of a batch."""
        if self.statistic.ndim == 2:
            raise InputError("DivergenceMap.row: this map holds a single count vector.")
        return DivergenceMap(
            statistic=self.statistic[i],
            n=int(np.asarray(self.n)[i]),
            cells=self.cells,
            alphas=self.alphas,
            betas=self.betas,
            scaling=self.scaling,
            r=self.r,
            infinite=self.infinite[i],
            t_max=float(np.asarray(self.t_max)[i]),
            argmax=(int(self.argmax[0][i]), int(self.argmax[1][i])),
            members={k: float(np.asarray(v)[i]) for k, v in self.members.items()},
        )

    def to_dict(self) -> dict:
        """Plain-Python view (lists, floats; infinities as the strings ``"inf"``/``"-inf"``, NaN kept).

        ``alpha_max`` and ``beta_max`` are NaN-free instead: NaN (no finite grid point) as ``None``.
        """

        def clean(x):  # NaN kept, infinities as strings
            return plain_data(np.asarray(x, dtype=float).tolist(), nan=KEEP)

        return {
            "statistic": clean(self.statistic),
            "n": np.asarray(self.n).tolist(),
            "cells": int(self.cells),
            "alphas": np.asarray(self.alphas).tolist(),
            "betas": np.asarray(self.betas).tolist(),
            "scaling": self.scaling,
            "r": self.r,
            "infinite": np.asarray(self.infinite).tolist(),
            "t_max": clean(self.t_max),
            "argmax": [np.asarray(k).tolist() for k in self.argmax],
            "alpha_max": plain_data(np.asarray(self.alpha_max).tolist(), inf=KEEP),
            "beta_max": plain_data(np.asarray(self.beta_max).tolist(), inf=KEEP),
            "members": {k: clean(v) for k, v in self.members.items()},
        }


#: Cells (rows x cells) from which :func:`_grid_sums` computes the terms once per distinct cell.
_DISTINCT_FROM = 4096


def row_block(cells: int) -> int:
    """Rows of ``cells`` cells each (all partitions' cells, for :func:`partition_statistics`) that
    one call of :func:`divergence_map` or :func:`partition_statistics` may take so that every
    row's statistics are bit for bit those of the row alone.

    Below :data:`_DISTINCT_FROM` cells the terms are computed cell by cell, and every step is then
    element-wise or a sum along one row; from there on they are computed once per distinct cell
    and summed in another arrangement, which agrees to rounding only (a few units in the last
    place, tests/test_lockstep.py).

    >>> row_block(28), row_block(5000)
    (146, 1)
    """
    return max(1, (_DISTINCT_FROM - 1) // cells)


def _grid_terms(u, qs, pos, alphas: np.ndarray, betas: np.ndarray, scaling: str, r) -> np.ndarray:
    """The terms of B per cell, for cells ``u = log(p/q)``, ``qs = q`` and ``pos`` (p, q > 0) of
    shape (N, s): shape (N, A, B, s) for the geometric and power scalings, (N, A, s) for the
    others (whose terms do not depend on beta).

    The generator part ``log q + log phi_alpha(x)`` is computed once per (row, alpha, cell) and
    the scaling part ``(1 - alpha) log(m/q)`` once per (row, beta, cell); the grid then costs
    one exponential per (row, alpha, beta, cell).
    """
    gen = np.log(qs)[:, None, :] + _log_phi(u[:, None, :], alphas[None, :, None])
    gen = np.where(pos[:, None, :], gen, -np.inf)
    if scaling == "model":
        return np.exp(gen)
    if scaling in ("data", "unit"):
        lr = u if scaling == "data" else -np.log(qs)
        return np.exp(gen + (1.0 - alphas)[None, :, None] * lr[:, None, :])
    if scaling == "geometric" or r is None:
        lr = betas[None, :, None] * u[:, None, :]  # (N, B, s)
    else:
        lb = np.log(betas)[None, :, None]
        l1b = np.log1p(-betas)[None, :, None]
        lr = np.logaddexp(lb + r * u[:, None, :], l1b) / r
    e = gen[:, :, None, :] + (1.0 - alphas)[None, :, None, None] * lr[:, None, :, :]  # (N, A, B, s)
    np.exp(e, out=e)
    return e


@_quiet
def _grid_sums(
    p: np.ndarray,
    q: np.ndarray,
    alphas: np.ndarray,
    betas: np.ndarray,
    scaling: str,
    r,
    sizes: tuple[int, ...] | None = None,
) -> np.ndarray:
    """B over the (alpha, beta) grid for rows p (N, s) and q (N, s) or (s,): shape (N, A, B).

    The terms of the sums come from :func:`_grid_terms`.  A term depends only on its cell's
    ``(p, q)``, and many rows of counts (a null table's 2,000 rows of 28 cells) hold few distinct
    cells (about a hundred), so from :data:`_DISTINCT_FROM` cells on the terms are computed once
    per distinct cell and gathered: the same values to rounding (not bit for bit: see
    :func:`row_block`).

    With ``sizes`` the cells are consecutive groups of these sizes, each a distribution of its own
    (the partitions of a gate, scored in one pass): the result is (N, len(sizes), A, B), each
    group's sums the values a call with that group's cells alone gives (tests/test_divergence.py).
    """
    N, s = p.shape
    B = betas.size  # shapes below: N rows, G groups, A alphas, B betas, s cells
    ends = np.cumsum(sizes if sizes is not None else (s,)).tolist()
    groups = list(zip([0, *ends[:-1]], ends))
    q2 = np.broadcast_to(q, p.shape)
    pos = (p > 0) & (q2 > 0)

    with np.errstate(divide="ignore", invalid="ignore"):
        qs = np.where(pos, q2, 1.0)
        u = np.where(pos, _log_ratio(np.where(pos, p, 1.0), qs), 0.0)  # (N, s)
        if u.size < _DISTINCT_FROM:
            terms = _grid_terms(u, qs, pos, alphas, betas, scaling, r)  # (N, A, B, s) or (N, A, s)
            total = np.stack([terms[..., lo:hi].sum(axis=-1) for lo, hi in groups], axis=1)  # (N, G, A, B) or (N, G, A)
        else:
            _, iu = np.unique(u, return_inverse=True)
            q_values, iq = np.unique(qs, return_inverse=True)
            key = (iu.reshape(u.shape) * q_values.size + iq.reshape(u.shape)) * 2 + pos
            _, first, where = np.unique(key, return_index=True, return_inverse=True)
            cells = [a.ravel()[first][None, :] for a in (u, qs, pos)]
            terms = _grid_terms(*cells, alphas, betas, scaling, r)[0]  # (A, B, K) or (A, K)
            gathered = terms[..., where.reshape(u.shape)]  # (A, B, N, s) or (A, N, s)
            total = np.stack([np.moveaxis(gathered[..., lo:hi].sum(axis=-1), -1, 0) for lo, hi in groups], axis=1)
        if total.ndim == 3:  # model, data, unit: the same for every beta
            total = total[..., None] * np.ones(B)
        # empty cells: f0 * q (unit: f0 * q^alpha)
        emp = (p == 0) & (q2 > 0)
        if emp.any():
            f0 = empty_cell_factor(alphas[:, None], betas[None, :], scaling, r)  # (A, B)
            total = total + _missing_cells(emp, q2, f0, alphas, scaling, groups)
        imp = (q2 == 0) & (p > 0)
        if imp.any():
            g0 = zero_model_cell_factor(alphas[:, None], betas[None, :], scaling, r)
            total = total + _missing_cells(imp, p, g0, alphas, scaling, groups)
    return total if sizes is not None else total[:, 0]


def _missing_cells(where: np.ndarray, mass: np.ndarray, factor: np.ndarray, alphas, scaling: str, groups) -> np.ndarray:
    """The limits of the terms of cells with p = 0 (``mass`` q) or q = 0 (``mass`` p), per group:
    ``factor`` times the group's mass in them (``unit``: times the sum of mass^alpha), (N, G, A, B)."""
    out = []
    for lo, hi in groups:
        here, m = where[:, lo:hi], np.where(where, mass, 0.0)[:, lo:hi]
        if scaling == "unit":
            w = (m[:, None, :] ** alphas[None, :, None]).sum(-1)  # (N, A)
            w = np.where(here.any(-1)[:, None], w, 0.0)[:, :, None]
        else:
            w = m.sum(-1)[:, None, None]
        out.append(np.where(w > 0, factor[None] * w, 0.0))
    return np.stack(out, axis=1)


def divergence_map(
    counts,
    probs,
    alphas=DEFAULT_ALPHAS,
    betas=DEFAULT_BETAS,
    scaling: Scaling = "geometric",
    r: float | None = None,
    *,
    members: bool = True,
) -> DivergenceMap:
    """The divergence map: ``T = 2 n B(P_n, Q | M)`` for every (alpha, beta) on a grid.

    Parameters
    ----------
    counts : array_like, shape (s,) or (N, s)
        Non-negative cell counts; a 2-D array is a batch of N count vectors (a fleet).
    probs : array_like, shape (s,) or (N, s)
        Model cell probabilities (each vector sums to 1).
    alphas, betas : array_like
        The grid; defaults to alpha = -1..3 step 0.25 and beta = 0..1 step 0.125.
    scaling : {"geometric", "power", "model", "data", "unit"}
    r : float, optional
        Power-mean exponent, only with ``scaling="power"``.
    members : bool, default True
        Also compute the classical members; the null tables and the gate, which read only the
        map's statistics, leave them out (``members`` is then empty).

    Returns
    -------
    DivergenceMap
        ``statistic`` of shape ``(len(alphas), len(betas))`` or ``(N, len(alphas), len(betas))``,
        the infinite mask, the maximum over finite points and the classical members.

    Raises
    ------
    InputError
        Negative or non-finite counts, a zero total, probabilities that do not sum to 1,
        mismatched shapes, an empty grid, an unknown scaling.

    Notes
    -----
    Every member with ``m(q, q) = q`` satisfies ``T -> chi2(s - 1)`` under the null for a fixed
    number of cells (docs/method.md §5.1); the maximum over the grid does not, in finite samples, and
    is calibrated by simulation (:mod:`fitaudit.core.calibration`).  Points with an infinite
    boundary limit (docs/method.md §4) are flagged in ``infinite`` and excluded from ``t_max``.
    Expected counts below 5 make members with alpha <= 0 or alpha >= 3 unreliable.

    Examples
    --------
    >>> m = divergence_map([315, 108, 101, 32], [9/16, 3/16, 3/16, 1/16])
    >>> round(m.members["pearson"], 6)   # Mendel's dihybrid cross, X2 = 0.47
    0.470024
    """
    owner = "divergence_map"
    r = _check_scaling(scaling, r, owner)
    c = np.asarray(counts, dtype=float)
    q = np.asarray(probs, dtype=float)
    if c.ndim not in (1, 2):
        raise InputError(f"{owner}: counts must be 1-D (s,) or 2-D (N, s); got shape {c.shape}.")
    if not np.isfinite(c).all():
        raise InputError(f"{owner}: counts contain NaN or infinite values.")
    if (c < 0).any():
        raise InputError(f"{owner}: counts must be non-negative; smallest is {c.min():.6g}.")
    _check_probabilities(q, "probs", owner)
    if q.ndim > 2 or q.shape[-1] != c.shape[-1] or (q.ndim == 2 and (c.ndim != 2 or q.shape[0] != c.shape[0])):
        raise InputError(f"{owner}: probs of shape {q.shape} does not match counts of shape {c.shape}.")
    a, b = _check_alpha_beta(alphas, betas, owner)
    a, b = np.atleast_1d(a).ravel(), np.atleast_1d(b).ravel()
    if a.size == 0 or b.size == 0:
        raise InputError(f"{owner}: the grid is empty; give at least one alpha and one beta.")
    single = c.ndim == 1
    c2 = c[None, :] if single else c
    n = c2.sum(axis=1)
    if (n <= 0).any():
        raise InputError(f"{owner}: a count vector sums to zero; nothing to compare.")
    p = c2 / n[:, None]
    members_alpha = np.array([v[0] for v in CLASSICAL_MEMBERS.values()])
    with np.errstate(over="ignore"):
        stat = _chunked(
            lambda rows: (
                2.0 * n[rows, None, None] * _grid_sums(p[rows], q if q.ndim == 1 else q[rows], a, b, scaling, r)
            ),
            len(n),
            a.size * b.size * c.shape[-1],
        )
        mem = (
            2.0 * n[:, None] * _grid_sums(p, q, members_alpha, np.zeros(1), "model", None)[:, :, 0]
            if members
            else np.empty((len(n), 0))
        )
    infinite = np.isinf(stat)
    finite_stat = np.where(infinite, -np.inf, stat)
    flat = finite_stat.reshape(len(n), -1)
    idx = flat.argmax(axis=1)
    tmax = flat[np.arange(len(n)), idx]
    none_finite = np.isneginf(tmax)
    tmax = np.where(none_finite, np.inf, tmax)
    ai, bi = np.divmod(idx, b.size)
    ai = np.where(none_finite, -1, ai)
    bi = np.where(none_finite, -1, bi)
    classical = {name: mem[:, k] for k, name in enumerate(CLASSICAL_MEMBERS)} if members else {}
    if single:
        return DivergenceMap(
            statistic=stat[0],
            n=int(n[0]) if float(n[0]).is_integer() else float(n[0]),
            cells=c.shape[-1],
            alphas=a,
            betas=b,
            scaling=scaling,
            r=r,
            infinite=infinite[0],
            t_max=float(tmax[0]),
            argmax=(int(ai[0]), int(bi[0])),
            members={k: float(v[0]) for k, v in classical.items()},
        )
    return DivergenceMap(
        statistic=stat,
        n=n,
        cells=c.shape[-1],
        alphas=a,
        betas=b,
        scaling=scaling,
        r=r,
        infinite=infinite,
        t_max=tmax,
        argmax=(ai, bi),
        members=classical,
    )


def partition_statistics(
    counts, probs, sizes, alphas, betas, scaling: Scaling = "geometric", r: float | None = None
) -> np.ndarray:
    """``T = 2 n B(P_n, Q | M)`` on an (alpha, beta) grid for several partitions of the same values at once.

    ``counts`` and ``probs`` hold the partitions' cells one after another (``sizes`` cells each);
    every partition counts all ``n`` values.  Each partition's statistics equal
    ``divergence_map(its counts, its probs, alphas, betas, scaling, r).statistic``, bit for bit
    (tests/test_divergence.py): one pass over the grid instead of one per partition, for the
    distribution gate (:class:`fitaudit.core.calibration.Gate`), whose inputs are built, not given.

    Parameters
    ----------
    counts : array_like, shape (S,) or (N, S)
        Cell counts of the partitions, ``S = sum(sizes)``.
    probs : array_like, shape (S,)
        Model cell probabilities; each partition's sum to 1.
    sizes : sequence of int
        Cells of each partition, in order.
    alphas, betas, scaling, r
        The grid and the scaling, as for :func:`divergence_map`.

    Returns
    -------
    ndarray, shape (len(sizes), A, B) or (N, len(sizes), A, B)

    Examples
    --------
    Mendel's dihybrid cross on its four classes and on round against wrinkled seeds (315 + 108
    against 101 + 32 for 3 : 1); alpha = 2 with the model scaling is Pearson's X2:

    >>> counts, probs = [315, 108, 101, 32, 315 + 108, 101 + 32], [9/16, 3/16, 3/16, 1/16, 3/4, 1/4]
    >>> t = partition_statistics(counts, probs, (4, 2), [2.0], [0.0], "model")
    >>> [round(float(v), 6) for v in t[:, 0, 0]]  # 36/417 + 36/139 = 0.345324 for the second
    [0.470024, 0.345324]
    """
    owner = "partition_statistics"
    r = _check_scaling(scaling, r, owner)
    c = np.asarray(counts, dtype=float)
    q = np.asarray(probs, dtype=float)
    a, b = (np.atleast_1d(v).ravel() for v in _check_alpha_beta(alphas, betas, owner))
    sizes = tuple(int(k) for k in sizes)
    if c.ndim not in (1, 2) or q.ndim != 1 or not sizes or min(sizes) < 1 or not c.shape[-1] == q.size == sum(sizes):
        raise InputError(
            f"{owner}: counts of shape {c.shape} and probs of shape {q.shape} must hold the partitions' cells one "
            f"after another, {sum(sizes)} in all for sizes {list(sizes)} (each at least 1)."
        )
    if not (np.isfinite(c).all() and (c >= 0).all() and np.isfinite(q).all() and (q >= 0).all()):
        raise InputError(f"{owner}: counts and probs must be finite and non-negative.")
    starts = np.cumsum((0,) + sizes[:-1])
    sums = np.add.reduceat(q, starts)
    if np.abs(sums - 1.0).max() > _sum_tolerance(max(sizes)):
        raise InputError(f"{owner}: each partition's probs must sum to 1; they sum to {sums.tolist()}.")
    c2 = c[None, :] if c.ndim == 1 else c
    totals = np.add.reduceat(c2, starts, axis=1)  # (N, P): every partition counts the same values
    n = totals[:, 0]
    if (n <= 0).any() or (np.abs(totals - n[:, None]) > 1e-9 * n[:, None]).any():
        raise InputError(f"{owner}: every partition must count the same values (a positive total); got {totals[0]}.")
    p = c2 / n[:, None]
    with np.errstate(over="ignore"):
        stat = _chunked(
            lambda rows: 2.0 * n[rows, None, None, None] * _grid_sums(p[rows], q, a, b, scaling, r, sizes),
            len(n),
            a.size * b.size * c.shape[-1],
        )
    return stat[0] if c.ndim == 1 else stat


def _chunked(fn, n_rows: int, per_row: int, budget: int = 4_000_000) -> np.ndarray:
    """Apply ``fn`` to row slices so that intermediate arrays stay below ``budget`` elements."""
    step = max(1, budget // max(per_row, 1))
    if step >= n_rows:
        return fn(slice(0, n_rows))
    return np.concatenate([fn(slice(i, min(i + step, n_rows))) for i in range(0, n_rows, step)])
