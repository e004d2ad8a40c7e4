"""Forecast audits: the stated predictive distributions of models fitted elsewhere.

A team whose forecasts come from another library, a notebook or a vendor cannot hand fitaudit a
model to run, but it can hand over what the model said before each observation was seen: the
predictive distribution ``F_t`` of ``y_t``, issued ``h`` steps ahead.  If the forecasts are right,
the probability integral transforms (PIT) ``u_t = F_t(y_t)`` are uniform on (0, 1), and for
one-step forecasts independent (Dawid 1984 [1]_; Diebold, Gunther and Tay 1998 [2]_; Gneiting,
Balabdaoui and Raftery 2007 [3]_).  :func:`audit_forecasts` scores exactly that, with the same
cells, divergence map and simulated calibration as the production check
(:func:`fitaudit.core.audit.score_frozen`): a stated law is fixed before the data, like frozen
production parameters, so the null of i.i.d. U(0, 1) PIT values is exact.

Three ways of stating a predictive distribution are understood:

* **mean and scale** under a continuous noise law (``normal``, ``student-t`` with a fixed shape,
  ``laplace``, ``logistic``): ``F_t(x) = F0((x - mean_t) / s_t)``, where ``s_t`` is the law's
  scale for the *standard deviation* ``scale_t`` (see :func:`pit_location_scale`);
* **mean and a count law** (``poisson``, ``negative-binomial`` with a fixed size): the randomised
  PIT of Czado, Gneiting and Held (2009) [8]_ (:func:`pit_counts`);
* **predictive quantiles** ``{level: values}``: a piecewise-linear predictive distribution
  function between the stated quantiles with exponential tails beyond them
  (:func:`pit_quantiles`).

Beside calibration the audit reports accuracy (never a verdict): the mean absolute scaled error
against a seasonal naive forecast (Hyndman and Koehler 2006 [5]_), and the continuous ranked
probability score (CRPS, Gneiting and Raftery 2007 [4]_) with its skill against the same naive
forecast.

References
----------
.. [1] A. P. Dawid, "Statistical theory: the prequential approach", J. R. Statist. Soc. A 147,
       1984, p. 278 (from memory).
.. [2] F. X. Diebold, T. A. Gunther and A. S. Tay, "Evaluating density forecasts with applications
       to financial risk management", Int. Econ. Rev. 39, 1998, p. 863; section 4 treats h-step
       forecasts, whose PIT sequence is (h-1)-dependent, by splitting it into h i.i.d.
       subsequences with Bonferroni bounds (from memory).
.. [3] T. Gneiting, F. Balabdaoui and A. E. Raftery, "Probabilistic forecasts, calibration and
       sharpness", J. R. Statist. Soc. B 69, 2007, p. 243 (from memory).
.. [4] T. Gneiting and A. E. Raftery, "Strictly proper scoring rules, prediction, and estimation",
       JASA 102, 2007, p. 359, eq. (21) for the CRPS and its normal closed form (from memory).
.. [5] R. J. Hyndman and A. B. Koehler, "Another look at measures of forecast accuracy",
       Int. J. Forecasting 22, 2006, p. 679, section 3.4 (scaled errors; from memory).
.. [6] A. Jordan, F. Krueger and S. Lerch, "Evaluating probabilistic forecasts with scoringRules",
       J. Stat. Softw. 90(12), 2019, appendix A (CRPS of the laplace, logistic and t laws; from
       memory).
.. [7] J. Berrisch and F. Ziel, "CRPS learning", J. Econometrics 237, 2023, 105221 (the CRPS as
       twice the mean pinball loss over quantile levels; from memory).
.. [8] C. Czado, T. Gneiting and L. Held, "Predictive model assessment for count data",
       Biometrics 65, 2009, p. 1254 (randomised PIT; from memory).
.. [9] M. S. Bartlett, "On the theoretical specification and sampling properties of
       autocorrelated time-series", J. R. Statist. Soc. Suppl. 8, 1946, p. 27; G. E. P. Box,
       G. M. Jenkins, G. C. Reinsel and G. M. Ljung, "Time Series Analysis", 5th ed., Wiley 2015,
       section 2.1.6 (covariance of sample autocorrelations; from memory).
.. [10] J. Pickands, "Statistical inference using extreme order statistics", Ann. Statist. 3,
        1975, p. 119 (the exponential law as the generalised Pareto law of shape 0; from memory).
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from ._plain import plain_data
from ._scipy import special, stats
from ._validation import Interval, check_param
from .calibration import CalibrationCache, key_rng, settings_production_table
from .cells import number_of_cells
from .change import locate_change
from .checks import _digest, _failed_check, score_frozen
from .diagnostics import PortmanteauResult, acf, chi2_sf, ljung_box_lags
from .exceptions import FitauditError, InputError, InsufficientDataError
from .noise import NoiseLaw, NoiseParams, as_noise_law, get_law
from .results import AuditResult, CheckResult
from .settings import AuditSettings
from .verdict import _fmt_p

__all__ = [
    "STATEMENTS",
    "pit_location_scale",
    "pit_counts",
    "pit_quantiles",
    "quantile_cdf",
    "lagged_ljung_box",
    "simulate_lagged_ljung_box",
    "crps_normal",
    "crps_location_scale",
    "crps_counts",
    "crps_quantiles",
    "pinball_loss",
    "mase",
    "check_forecast_timing",
    "audit_forecasts",
    "forecast_verdict",
    "forecast_table_lengths",
    "prepare_forecast_calibration",
]

#: The ways a predictive distribution can be stated (``spec["statement"]`` of a forecast audit).
STATEMENTS: tuple[str, ...] = ("mean-scale", "mean-count", "quantiles")

_parameter_constraints = {
    "horizon": [Interval(int, 1, None)],
    "period": [Interval(int, 1, None)],
}

#: Said in every verdict of a forecast audit.
NOT_REFITTED = (
    "The model was not refitted by fitaudit: its forecasts were audited as stated by their owner "
    "(the probability integral transform of each actual under its own predictive distribution)."
)

_STANDARD_NORMAL = NoiseParams(law="normal", loc=0.0, scale=1.0, shape=None, estimated=())
_TINY = np.finfo(float).tiny
_MIN_NAIVE_PAIRS = 10  # pairs of observations a naive scale must rest on before falling back to the whole series


# --------------------------------------------------------------------------------------------
# Input checks
# --------------------------------------------------------------------------------------------
def _numeric(x, name: str, owner: str) -> np.ndarray:
    try:
        return np.asarray(x, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{owner}: {name} must be numeric; {exc}.") from None


def _series(y, owner: str) -> np.ndarray:
    a = _numeric(y, "the actuals", owner)
    if a.ndim != 1 or a.size == 0:
        raise InputError(f"{owner}: the actuals must be a non-empty 1-D series; got shape {a.shape}.")
    bad = np.flatnonzero(~np.isfinite(a))
    if bad.size:
        raise InputError(
            f"{owner}: the actuals hold {bad.size} NaN or infinite value(s), first at position {int(bad[0])}; "
            "correct the extract or drop those time points from it."
        )
    return a


def _aligned(x, n: int, name: str, owner: str, offset: int = 0, scalar_ok: bool = False) -> np.ndarray:
    """A finite array of length ``n`` (a scalar when ``scalar_ok``); positions in messages are ``offset + i``."""
    a = _numeric(x, name, owner)
    if a.ndim == 0 and scalar_ok:
        a = np.full(n, float(a))
    if a.shape != (n,):
        raise InputError(
            f"{owner}: {name} has shape {a.shape} but the actuals have {n} values; state one forecast per "
            "observation, aligned with the actuals (NaN where none was issued, before the audit window)."
        )
    bad = np.flatnonzero(~np.isfinite(a))
    if bad.size:
        raise InputError(
            f"{owner}: {name} is missing (NaN or infinite) for {bad.size} observation(s) of the audit window, first at "
            f"position {offset + int(bad[0])}; every audited observation needs the forecast issued before it. Fill the "
            "forecast store, or shorten the audit window to the stretch that has forecasts."
        )
    return a


def _positive(a: np.ndarray, name: str, owner: str, offset: int = 0) -> np.ndarray:
    bad = np.flatnonzero(a <= 0)
    if bad.size:
        raise InputError(
            f"{owner}: {name} must be positive, but {bad.size} value(s) are not, first at position "
            f"{offset + int(bad[0])} ({a[bad[0]]:g}); a predictive distribution needs a positive spread. Correct the "
            "forecast store."
        )
    return a


def _continuous_law(noise, owner: str) -> NoiseLaw:
    law = as_noise_law(noise)
    if law.discrete:
        raise InputError(
            f"{owner}: the {law.name} law is a count law; state count forecasts with pit_counts (a mean, no scale)."
        )
    if law.has_shape and law.shape is None:
        raise InputError(
            f"{owner}: a stated {law.name} predictive law needs its shape (degrees of freedom), e.g. "
            f"noise={{'law': '{law.name}', 'shape': 5}}; nothing is estimated from the actuals in a forecast audit."
        )
    return law


def _count_law(noise, owner: str) -> NoiseLaw:
    law = as_noise_law(noise)
    if not law.discrete:
        raise InputError(
            f"{owner}: the {law.name} law is continuous; count forecasts need 'poisson' or 'negative-binomial'."
        )
    if law.has_shape and law.shape is None:
        raise InputError(
            f"{owner}: a stated negative-binomial predictive law needs its size, e.g. "
            "noise={'law': 'negative-binomial', 'shape': 4}; nothing is estimated from the actuals in a forecast audit."
        )
    return law


def _unit_scale(law: NoiseLaw) -> float:
    """The law's scale parameter per unit standard deviation (``from_variance(1).scale``)."""
    return float(law.from_variance(1.0).scale)


# --------------------------------------------------------------------------------------------
# PIT values
# --------------------------------------------------------------------------------------------
def pit_location_scale(y, mean, scale, noise="normal") -> np.ndarray:
    """PIT values of actuals under stated location-scale predictive laws.

    ``u_t = F0((y_t - mean_t) / (c scale_t))``, ``F0`` the standard law and ``c`` its scale per
    unit standard deviation: 1 (normal), ``sqrt((nu - 2) / nu)`` (student-t), ``1 / sqrt(2)``
    (laplace), ``sqrt(3) / pi`` (logistic).  ``scale`` is the predictive **standard deviation**,
    the convention of the production check's ``sigma2``; to state a student-t by its scale
    parameter ``s`` instead, pass ``s * sqrt(nu / (nu - 2))``.

    Parameters
    ----------
    y, mean : array_like, shape (n,)
    scale : float or array_like, shape (n,)
        Predictive standard deviations, positive.
    noise : str, dict or NoiseLaw, default "normal"
        ``"normal"``, ``{"law": "student-t", "shape": nu}``, ``"laplace"`` or ``"logistic"``.

    Returns
    -------
    ndarray, shape (n,)

    Raises
    ------
    InputError
        Length mismatch, NaN, non-positive scales, a count law or a student-t without its shape.
    """
    return _pit_location_scale(y, mean, scale, noise, "pit_location_scale")


def _pit_location_scale(y, mean, scale, noise, owner: str, offset: int = 0) -> np.ndarray:
    law = _continuous_law(noise, owner)
    y = _numeric(y, "the actuals", owner)
    n = y.size
    mean = _aligned(mean, n, "the predictive mean", owner, offset)
    sd = _positive(
        _aligned(scale, n, "the predictive scale", owner, offset, scalar_ok=True), "the predictive scale", owner, offset
    )
    s = sd * _unit_scale(law)
    return np.asarray(law.cdf_batch(y[:, None], mean, s, None if not law.has_shape else law.shape)[:, 0], dtype=float)


def pit_counts(y, mean, noise, rng: np.random.Generator) -> np.ndarray:
    """Randomised PIT values of counts under stated count laws (Czado, Gneiting and Held 2009 [8]_).

    ``u_t = F_t(y_t - 1) + V_t P_t(Y = y_t)``, ``V_t ~ U(0, 1)`` independent, ``F_t`` the Poisson
    law with mean ``mean_t`` or the negative-binomial (NB2) law with that mean and the stated size;
    i.i.d. U(0, 1) when the stated laws are right.

    Parameters
    ----------
    y : array_like, shape (n,)
        Non-negative integer counts.
    mean : array_like, shape (n,)
        Predictive means, positive.
    noise : str, dict or NoiseLaw
        ``"poisson"`` or ``{"law": "negative-binomial", "shape": size}``.
    rng : numpy.random.Generator
        Seeded generator (the audit seeds it from the settings seed and a digest of the data).

    Returns
    -------
    ndarray, shape (n,)
    """
    return _pit_counts(y, mean, noise, rng, "pit_counts")


def _pit_counts(y, mean, noise, rng, owner: str, offset: int = 0) -> np.ndarray:
    law = _count_law(noise, owner)
    y = _numeric(y, "the actuals", owner)
    mean = _positive(_aligned(mean, y.size, "the predictive mean", owner, offset), "the predictive mean", owner, offset)
    bad = np.flatnonzero((y < 0) | (y != np.round(y)))
    if bad.size:
        raise InputError(
            f"{owner}: the {law.name} law needs counts, but {bad.size} actual(s) are not non-negative integers, first "
            f"at position {offset + int(bad[0])} ({y[bad[0]]:g}); state a continuous predictive law for this series."
        )
    params = NoiseParams(law=law.name, loc=0.0, scale=1.0, shape=law.shape, estimated=())
    return np.asarray(law.randomized_pit(y, mean, params, rng), dtype=float)


def _quantile_table(quantiles, n: int, owner: str, offset: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Levels (K,) ascending and quantiles (n, K), validated: levels in (0, 1), no missing
    column or value, no crossing."""
    if not isinstance(quantiles, Mapping) or len(quantiles) < 2:
        raise InputError(
            f"{owner}: quantiles must be a mapping from level to values with at least two levels "
            f"(e.g. {{0.05: q05, 0.5: q50, 0.95: q95}}); got {type(quantiles).__name__}"
            + (f" with {len(quantiles)} level(s)" if isinstance(quantiles, Mapping) else "")
            + "."
        )
    levels, columns = [], []
    for key, values in quantiles.items():
        try:
            level = float(key)
        except (TypeError, ValueError):
            level = float("nan")
        if not (0.0 < level < 1.0):
            raise InputError(
                f"{owner}: quantile level {key!r} is not a probability strictly between 0 and 1; name each column "
                "by its level, e.g. 0.05 for the 5 % quantile (not 5, and not 0 or 1, which are unbounded)."
            )
        if values is None:
            raise InputError(
                f"{owner}: the {level:g} quantile column is missing; state it, or drop the level from the declared "
                "quantile levels."
            )
        levels.append(level)
        columns.append(_aligned(values, n, f"the {level:g} quantile", owner, offset))
    order = np.argsort(levels, kind="stable")
    levels_arr = np.asarray(levels)[order]
    dup = np.flatnonzero(np.diff(levels_arr) == 0)
    if dup.size:
        raise InputError(f"{owner}: quantile level {levels_arr[dup[0]]:g} is stated twice; keep one column per level.")
    Q = np.column_stack([columns[i] for i in order])
    cross = np.diff(Q, axis=1) < 0
    if cross.any():
        rows, cols = np.nonzero(cross)
        t, k = int(rows[0]), int(cols[0])
        raise InputError(
            f"{owner}: the stated quantiles cross at {int(cross.any(axis=1).sum())} observation(s), first at position "
            f"{offset + t}: the {levels_arr[k + 1]:g} quantile ({Q[t, k + 1]:g}) is below the {levels_arr[k]:g} "
            f"quantile ({Q[t, k]:g}). Quantiles must not decrease with the level; correct the forecast store (if the "
            "crossing is rounding noise, sort each row's quantiles)."
        )
    return levels_arr, Q


def _tail_scales(levels: np.ndarray, Q: np.ndarray, owner: str, offset: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Scales ``b_lower, b_upper`` (n,) of the exponential tails (see :func:`quantile_cdf`)."""
    K = levels.size
    above_first = Q > Q[:, :1]
    below_last = Q < Q[:, -1:]
    flat = ~above_first.any(axis=1)
    if flat.any():
        t = int(np.flatnonzero(flat)[0])
        raise InputError(
            f"{owner}: every stated quantile is the same value ({Q[t, 0]:g}) at {int(flat.sum())} observation(s), "
            f"first at position {offset + t}; that states no uncertainty at all. State quantiles with spread, or audit "
            "those observations with a count law."
        )
    j = np.argmax(above_first, axis=1)  # first level whose quantile exceeds the lowest one
    i = K - 1 - np.argmax(below_last[:, ::-1], axis=1)  # last level whose quantile is below the highest one
    rows = np.arange(Q.shape[0])
    b_lower = (Q[rows, j] - Q[:, 0]) / np.log(levels[j] / levels[0])
    b_upper = (Q[:, -1] - Q[rows, i]) / np.log((1.0 - levels[i]) / (1.0 - levels[-1]))
    return b_lower, b_upper


def quantile_cdf(x, quantiles) -> np.ndarray:
    """The predictive distribution function that a set of stated quantiles defines.

    With levels ``tau_1 < ... < tau_K`` and quantiles ``q_1 <= ... <= q_K`` of one forecast:

    * between stated quantiles, linear interpolation:
      ``F(x) = tau_k + (tau_{k+1} - tau_k) (x - q_k) / (q_{k+1} - q_k)`` for ``q_k <= x < q_{k+1}``;
      equal quantiles ``q_k = ... = q_l`` make a jump from ``tau_k`` to ``tau_l`` (a point mass);
    * below ``q_1``, an exponential tail ``F(x) = tau_1 exp((x - q_1) / b_L)`` whose scale
      ``b_L = (q_j - q_1) / log(tau_j / tau_1)`` makes it pass through the next distinct stated
      quantile ``q_j`` as well (``j = 2`` unless ``q_2 = q_1``); above ``q_K``,
      ``1 - F(x) = (1 - tau_K) exp(-(x - q_K) / b_U)`` with
      ``b_U = (q_K - q_i) / log((1 - tau_i) / (1 - tau_K))``.

    Why exponential tails: the exponential law is the generalised Pareto law with shape 0, the
    limit of the excesses over a high threshold for every law in the Gumbel domain (normal,
    logistic, laplace, gamma, lognormal; Pickands 1975 [10]_).  It is continuous at the outer
    quantiles, fixed by the two outermost stated quantiles on each side, exact for a Laplace
    predictive law and heavier than a normal tail, so an actual just beyond the outer quantile is
    not pushed to a PIT value of 0 or 1 by a tail thinner than the forecaster's.  A normal tail
    matched to the same two quantiles would be thinner and so more alarmist.  In the distribution
    gate the tails matter only through cell edges below ``tau_1`` or above ``tau_K`` (with
    equiprobable cells of width 0.1 and levels on a 0.05 grid, not at all: every cell edge is a
    stated level, so the cell of each PIT value is exact); they always matter for the normal
    scores of the independence gate.

    Parameters
    ----------
    x : array_like, shape (n,)
        Values at which to evaluate ``F_t`` (one per forecast).
    quantiles : mapping of float to array_like (n,)
        Level -> stated quantiles; at least two levels in (0, 1).

    Returns
    -------
    ndarray, shape (n,)
        ``F_t(x_t)`` (right-continuous at a jump).

    Examples
    --------
    >>> quantile_cdf([15.0, 5.0], {0.1: [10.0, 10.0], 0.5: [20.0, 20.0], 0.9: [30.0, 30.0]}).round(4).tolist()
    [0.3, 0.0447]
    """
    x = _numeric(x, "x", "quantile_cdf")
    levels, Q = _quantile_table(quantiles, x.size, "quantile_cdf")
    lower, upper = _quantile_pit(x, levels, Q, None, "quantile_cdf", right=True)
    return upper


def _quantile_pit(y, levels, Q, rng, owner: str, offset: int = 0, right: bool = False):
    """(left limit, PIT) of ``y`` under the quantile-defined law; PIT randomised within jumps by ``rng``
    (midpoint when ``rng`` is None; the right limit when ``right``)."""
    n, K = Q.shape
    b_lower, b_upper = _tail_scales(levels, Q, owner, offset)
    below = np.sum(Q < y[:, None], axis=1)  # stated quantiles strictly below y
    upto = np.sum(Q <= y[:, None], axis=1)  # ... at or below y
    u = np.empty(n)
    left = np.empty(n)
    # lower tail
    lo = upto == 0
    u[lo] = left[lo] = levels[0] * np.exp((y[lo] - Q[lo, 0]) / b_lower[lo])
    # upper tail
    hi = below == K
    u[hi] = left[hi] = 1.0 - (1.0 - levels[-1]) * np.exp(-(y[hi] - Q[hi, -1]) / b_upper[hi])
    # strictly between two stated quantiles
    mid = (below == upto) & ~lo & ~hi
    r = np.flatnonzero(mid)
    k = below[r]
    q0, q1 = Q[r, k - 1], Q[r, k]
    u[r] = left[r] = levels[k - 1] + (levels[k] - levels[k - 1]) * (y[r] - q0) / (q1 - q0)
    # at one or more stated quantiles: a jump from tau_below to tau_(upto - 1) when several are equal
    at = np.flatnonzero(upto > below)
    if at.size:
        left[at] = levels[below[at]]
        top = levels[upto[at] - 1]
        if right:
            v = np.ones(at.size)
        elif rng is None:
            v = np.full(at.size, 0.5)
        else:
            v = rng.uniform(size=at.size)
        u[at] = left[at] + v * (top - left[at])
    return left, np.clip(u, 0.0, 1.0)


def pit_quantiles(y, quantiles, rng: np.random.Generator | None = None) -> np.ndarray:
    """PIT values of actuals under predictive laws stated by quantiles.

    ``u_t = F_t(y_t)`` for the distribution function :func:`quantile_cdf` defines (linear between
    stated quantiles, exponential tails).  Where several stated quantiles are equal and the actual
    equals them, ``F_t`` jumps; the PIT is then randomised within the jump,
    ``u_t = F_t(y_t-) + V_t (F_t(y_t) - F_t(y_t-))``, ``V_t ~ U(0, 1)``, as for counts
    (Czado, Gneiting and Held 2009 [8]_).

    Parameters
    ----------
    y : array_like, shape (n,)
    quantiles : mapping of float to array_like (n,)
        Level -> stated quantiles.  Refused with :class:`InputError`: fewer than two levels, a level
        outside (0, 1) or stated twice, a missing column (None), NaN values, a length other than
        n, crossing quantiles (a higher level with a lower value) and quantiles without spread.
    rng : numpy.random.Generator, optional
        Draws ``V_t`` at jumps; None puts the PIT at the middle of the jump.

    Returns
    -------
    ndarray, shape (n,)

    Examples
    --------
    >>> pit_quantiles([25.0], {0.1: [10.0], 0.5: [20.0], 0.9: [30.0]}).round(6).tolist()
    [0.7]
    """
    return _pit_quantiles(y, quantiles, rng, "pit_quantiles")


def _pit_quantiles(y, quantiles, rng, owner: str, offset: int = 0) -> np.ndarray:
    y = _numeric(y, "the actuals", owner)
    levels, Q = _quantile_table(quantiles, y.size, owner, offset)
    return _quantile_pit(y, levels, Q, rng, owner, offset)[1]


def _quantile_at(levels: np.ndarray, Q: np.ndarray, p: float, owner: str) -> np.ndarray:
    """The ``p`` quantile of each quantile-defined predictive law (inverse of :func:`quantile_cdf`)."""
    b_lower, b_upper = _tail_scales(levels, Q, owner)
    if p < levels[0]:
        return Q[:, 0] + b_lower * math.log(p / levels[0])
    if p > levels[-1]:
        return Q[:, -1] - b_upper * math.log((1.0 - p) / (1.0 - levels[-1]))
    k = int(np.searchsorted(levels, p, side="left"))
    if levels[k] == p:
        return Q[:, k].copy()
    w = (p - levels[k - 1]) / (levels[k] - levels[k - 1])
    return Q[:, k - 1] + w * (Q[:, k] - Q[:, k - 1])


def _normal_scores(u: np.ndarray) -> np.ndarray:
    """``z = Phi^{-1}(u)``, with u kept inside (0, 1) so that z is finite."""
    return special.ndtri(np.clip(u, _TINY, 1.0 - np.finfo(float).epsneg))


# --------------------------------------------------------------------------------------------
# Independence beyond the horizon
# --------------------------------------------------------------------------------------------
def _lagged_q(X: np.ndarray, start: int, lags: int) -> np.ndarray:
    """The statistic of :func:`lagged_ljung_box` for every row of X (R, n)."""
    R, n = X.shape
    last = start + lags - 1
    dev = X - X.mean(axis=1, keepdims=True)
    spec = np.fft.rfft(dev, 2 * n, axis=1)
    c = np.fft.irfft(spec * np.conj(spec), 2 * n, axis=1)[:, : last + 1] / n
    r = c / c[:, :1]  # sample autocorrelations r_0 .. r_last (mean removed, denominator n)
    # W_d = sum_v rho_v rho_(v + d), |v| < start, from the symmetric sequence rho_(-start+1) .. rho_(start-1)
    seq = np.concatenate([r[:, start - 1 : 0 : -1], r[:, :start]], axis=1)  # (R, 2 start - 1)
    width = seq.shape[1]
    d = np.arange(lags)
    column = np.zeros((R, lags))
    for j in range(min(lags, width)):  # W_d vanishes for d > 2 (start - 1)
        column[:, j] = np.sum(seq[:, : width - j] * seq[:, j:], axis=1)
    W = column[:, np.abs(d[:, None] - d[None, :])]  # (R, lags, lags) Toeplitz
    k = np.arange(start, last + 1)
    rt = r[:, start:] * np.sqrt(n * (n + 2.0) / (n - k))
    try:
        sol = np.linalg.solve(W, rt[:, :, None])[:, :, 0]
    except np.linalg.LinAlgError:
        sol = np.stack([np.linalg.lstsq(w, v, rcond=None)[0] for w, v in zip(W, rt)])
    return np.einsum("rk,rk->r", rt, sol)


def lagged_ljung_box(x, start: int, lags: int) -> PortmanteauResult:
    """Ljung-Box test of the autocorrelations at lags ``start .. start + lags - 1`` only.

    Errors of h-step forecasts made at successive origins overlap, so even correct ones are
    autocorrelated up to lag ``h - 1`` (an MA(h - 1) dependence); independence is tested beyond,
    at lags ``h, h + 1, ...`` (``start = h``).  Under MA(start - 1) dependence the sample
    autocorrelations ``r_k`` at those lags are asymptotically normal with mean 0 and covariances
    given by Bartlett's formula [9]_,
    ``n Cov(r_k, r_l) = W_kl = sum_v rho_v rho_(v + l - k)`` over ``|v| < start``
    (``rho_0 = 1``; ``W_kk = 1 + 2 sum_{v=1}^{start-1} rho_v^2``), so

        ``Q = r~' W^{-1} r~``,  ``r~_k = r_k sqrt(n (n + 2) / (n - k))``,

    with ``rho_v`` estimated by ``r_v``, is referred to ``chi2(lags)``.  For ``start = 1``, W is the
    identity and Q is the Ljung-Box statistic of :func:`fitaudit.core.diagnostics.ljung_box`.
    For ``start > 1`` the chi-square limit is reached slowly (at n = 90 and start = 3 it rejects
    about twice as often as it should); :func:`simulate_lagged_ljung_box` gives the finite-sample
    null that :func:`audit_forecasts` uses.

    Parameters
    ----------
    x : array_like, shape (n,)
        Finite values (e.g. normal scores of PIT values).
    start : int
        First lag tested, >= 1.
    lags : int
        Number of lags tested, >= 1; ``start + lags - 1 < n``.

    Returns
    -------
    PortmanteauResult
        ``lags`` is the number of lags tested, ``df = lags``; the p-value is the chi-square one.

    Raises
    ------
    InsufficientDataError
        When ``start + lags - 1 >= n``.
    """
    a = _lagged_input(x, start, lags)
    q = float(_lagged_q(a[None, :], start, lags)[0])
    last = start + lags - 1
    convention = (
        f"Q = r~' W^-1 r~ over lags {start}..{last}, r~_k = r_k sqrt(n(n+2)/(n-k)), W from Bartlett's formula with the "
        f"sample autocorrelations at lags 1..{start - 1}; p-value from chi-square({lags})"
        if start > 1
        else "Q = n(n+2) sum_{k=1..h} r_k^2/(n-k); p-value from chi-square(h)"
    )
    return PortmanteauResult("ljung-box", q, int(lags), int(lags), float(chi2_sf(q, lags)), convention, int(a.size))


def _lagged_input(x, start: int, lags: int) -> np.ndarray:
    for name, value in (("start", start), ("lags", lags)):
        check_param("lagged_ljung_box", name, value, Interval(int, 1, None))
    a = _numeric(x, "x", "lagged_ljung_box")
    if a.ndim != 1 or not np.isfinite(a).all():
        raise InputError("lagged_ljung_box: x must be a finite 1-D series.")
    last = start + lags - 1
    if last >= a.size:
        raise InsufficientDataError(
            f"lagged_ljung_box: lags {start}..{last} need at least {last + 1} values; got {a.size}. "
            "Lengthen the audit window."
        )
    if np.ptp(a) == 0:
        raise InputError("lagged_ljung_box: the values are constant, so their autocorrelation is undefined.")
    return a


def simulate_lagged_ljung_box(x, start: int, lags: int, replicates: int, rng: np.random.Generator) -> np.ndarray:
    """Simulated null of :func:`lagged_ljung_box` for a series with x's dependence up to lag start - 1.

    Under the null the series is a stationary MA(start - 1) process: autocorrelations
    ``rho_1 .. rho_(start-1)`` (estimated by x's sample autocorrelations) and none beyond.  Gaussian
    series of x's length with exactly that autocorrelation function are drawn by circulant
    embedding (Davies and Harte 1987; Dietrich and Newsam 1997, from memory): the circulant of
    size ``m >= n + start - 1`` holding ``rho`` has eigenvalues
    ``f(2 pi j / m) = 1 + 2 sum_v rho_v cos(2 pi j v / m)``, non-negative when ``rho`` is a valid MA
    autocorrelation function (otherwise ``rho`` is shrunk towards 0 until it is), and the real and
    imaginary parts of ``FFT(sqrt(f / m) (N1 + i N2))`` are two independent draws.  Each draw is
    scored with the same statistic, ``rho`` re-estimated, so the p-value
    ``(1 + #{Q* >= Q}) / (R + 1)`` accounts for the small-sample bias of the autocorrelations and
    for the estimation of W (a parametric bootstrap).  For ``start = 1`` the draws are i.i.d.
    normal, the exact null of the Ljung-Box statistic.

    Parameters
    ----------
    x : array_like, shape (n,)
    start, lags : int
        As in :func:`lagged_ljung_box`.
    replicates : int
        R, the number of simulated series (>= 19).
    rng : numpy.random.Generator
        Seeded generator.

    Returns
    -------
    ndarray, shape (R,)
        Simulated statistics, sorted.
    """
    check_param("simulate_lagged_ljung_box", "replicates", replicates, Interval(int, 19, None))
    a = _lagged_input(x, start, lags)
    n = a.size
    rho = acf(a, start - 1)[1:] if start > 1 else np.zeros(0)
    m = 1 << int(math.ceil(math.log2(n + start)))
    v = np.arange(1, start)
    j = np.arange(m)
    g = 2.0 * (np.cos(2.0 * np.pi * np.outer(j, v) / m) @ rho) if start > 1 else np.zeros(m)
    if g.min() < -1.0:  # not a valid MA autocorrelation function: shrink it until the spectrum is non-negative
        g = g * (0.99 / -g.min())
    f = np.maximum(1.0 + g, 0.0)
    half = (replicates + 1) // 2
    z = rng.standard_normal((half, m)) + 1j * rng.standard_normal((half, m))
    draws = np.fft.fft(np.sqrt(f / m) * z, axis=1)[:, :n]
    X = np.concatenate([draws.real, draws.imag])[:replicates]
    return np.sort(_lagged_q(X, start, lags))


# --------------------------------------------------------------------------------------------
# Scores
# --------------------------------------------------------------------------------------------
def crps_normal(y, mean, sd) -> np.ndarray:
    """CRPS of normal predictive laws in closed form (Gneiting and Raftery 2007 [4]_).

    ``CRPS(N(mu, sigma^2), y) = sigma [z (2 Phi(z) - 1) + 2 phi(z) - 1 / sqrt(pi)]``,
    ``z = (y - mu) / sigma``; in the units of y, smaller is better.

    Parameters
    ----------
    y, mean : array_like
    sd : float or array_like
        Standard deviations, positive.

    Returns
    -------
    ndarray

    Examples
    --------
    >>> round(float(crps_normal(0.0, 0.0, 1.0)), 6)  # (sqrt(2) - 1) / sqrt(pi)
    0.233695
    """
    y, mean, sd = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (y, mean, sd)))
    if (sd <= 0).any() or not np.isfinite(sd).all():
        raise InputError("crps_normal: sd must be finite and positive.")
    z = (y - mean) / sd
    return sd * (
        z * (2.0 * special.ndtr(z) - 1.0)
        + 2.0 * np.exp(-0.5 * z * z) / math.sqrt(2.0 * math.pi)
        - 1.0 / math.sqrt(math.pi)
    )


def crps_location_scale(y, mean, sd, noise="normal") -> np.ndarray:
    """CRPS of location-scale predictive laws stated by mean and standard deviation, in closed form.

    With ``z = (y - mean) / s`` and ``s`` the law's scale for standard deviation ``sd`` (as in
    :func:`pit_location_scale`):

    * normal: :func:`crps_normal`;
    * laplace: ``s (|z| + exp(-|z|) - 3/4)``;
    * logistic: ``s (z - 2 log F(z) - 1)``, ``F(z) = 1 / (1 + e^-z)``;
    * student-t (nu > 1): ``s [z (2 F_nu(z) - 1) + 2 f_nu(z) (nu + z^2) / (nu - 1)
      - 2 sqrt(nu) B(1/2, nu - 1/2) / ((nu - 1) B(1/2, nu/2)^2)]``

    (Jordan, Krueger and Lerch 2019 [6]_, appendix A).

    Parameters
    ----------
    y, mean : array_like, shape (n,)
    sd : float or array_like
    noise : str, dict or NoiseLaw, default "normal"

    Returns
    -------
    ndarray, shape (n,)
    """
    law = _continuous_law(noise, "crps_location_scale")
    y, mean, sd = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (y, mean, sd)))
    if (sd <= 0).any() or not np.isfinite(sd).all():
        raise InputError("crps_location_scale: sd must be finite and positive.")
    if law.name == "normal":
        return crps_normal(y, mean, sd)
    s = sd * _unit_scale(law)
    z = (y - mean) / s
    if law.name == "laplace":
        return s * (np.abs(z) + np.exp(-np.abs(z)) - 0.75)
    if law.name == "logistic":
        return s * (z + 2.0 * np.logaddexp(0.0, -z) - 1.0)  # -2 log F(z) = 2 log(1 + e^-z)
    nu = float(law.shape)
    term = (
        2.0 * math.sqrt(nu) * math.exp(special.betaln(0.5, nu - 0.5) - 2.0 * special.betaln(0.5, nu / 2.0)) / (nu - 1.0)
    )
    return s * (z * (2.0 * special.stdtr(nu, z) - 1.0) + 2.0 * stats.t.pdf(z, nu) * (nu + z * z) / (nu - 1.0) - term)


def crps_counts(y, mean, noise) -> np.ndarray:
    """CRPS of count predictive laws, ``sum_{x >= 0} (F_t(x) - 1{y_t <= x})^2`` (Gneiting and
    Raftery 2007 [4]_, the CRPS of an integer-valued law).

    The sum runs over ``x`` from ``min(y_t, q_lo)`` to ``max(y_t, q_hi)``, ``q_lo`` and ``q_hi`` the
    ``1e-12`` and ``1 - 1e-12`` quantiles of ``F_t``; outside, each term is below ``1e-24``.

    Parameters
    ----------
    y : array_like, shape (n,)
        Counts.
    mean : array_like, shape (n,)
        Predictive means, positive.
    noise : str, dict or NoiseLaw
        ``"poisson"`` or ``{"law": "negative-binomial", "shape": size}``.

    Returns
    -------
    ndarray, shape (n,)
    """
    law = _count_law(noise, "crps_counts")
    y = _numeric(y, "y", "crps_counts")
    mean = _positive(_aligned(mean, y.size, "the predictive mean", "crps_counts"), "the predictive mean", "crps_counts")
    r = float(law.shape) if law.has_shape else None

    def law_at(mu):
        return stats.poisson(mu) if r is None else stats.nbinom(r, r / (r + mu))

    lo = np.minimum(y, law_at(mean).ppf(1e-12))
    hi = np.maximum(y, law_at(mean).isf(1e-12))
    out = np.empty(y.size)
    for t in range(y.size):  # one support per forecast; each is short (about 14 standard deviations)
        x = np.arange(lo[t], hi[t] + 1.0)
        out[t] = float(np.sum((law_at(mean[t]).cdf(x) - (x >= y[t])) ** 2))
    return out


def pinball_loss(y, q, level) -> np.ndarray:
    """Pinball (quantile) loss ``PB_tau(q, y) = tau (y - q)`` if ``y >= q``, else ``(1 - tau)(q - y)``.

    Parameters
    ----------
    y, q : array_like
    level : float or array_like
        tau in (0, 1).

    Returns
    -------
    ndarray
    """
    y, q, level = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (y, q, level)))
    return np.where(y >= q, level * (y - q), (1.0 - level) * (q - y))


def crps_quantiles(y, quantiles) -> np.ndarray:
    """CRPS of predictive laws stated by quantiles, approximated from the stated levels.

    ``CRPS ~ (2 / K) sum_k PB_{tau_k}(q_k, y)`` over the K stated levels (Berrisch and Ziel 2023
    [7]_): the CRPS is ``2 int_0^1 PB_tau(F^{-1}(tau), y) d tau`` (Gneiting and Raftery 2007 [4]_),
    and the mean over equally spaced levels is its Riemann sum.  The approximation leaves out
    the tails beyond the outer levels (it is smaller than the CRPS of a law whose tails are
    included), so compare it only with scores computed on the same levels, as the skill score of
    :func:`audit_forecasts` does.

    Parameters
    ----------
    y : array_like, shape (n,)
    quantiles : mapping of float to array_like (n,)

    Returns
    -------
    ndarray, shape (n,)
    """
    y = _numeric(y, "y", "crps_quantiles")
    levels, Q = _quantile_table(quantiles, y.size, "crps_quantiles")
    return 2.0 * np.mean(pinball_loss(y[:, None], Q, levels[None, :]), axis=1)


def mase(y, point, period: int = 1, history=None) -> float:
    """Mean absolute scaled error (Hyndman and Koehler 2006 [5]_).

    ``MASE = mean_t |y_t - f_t| / Q``,  ``Q = (1 / (T - m)) sum_{i=m+1}^{T} |x_i - x_{i-m}|``:
    the errors of the point forecasts ``f_t`` scaled by the mean absolute error of the one-step
    seasonal naive forecast (period m; m = 1 is the naive forecast) on the in-sample series
    ``x_1..x_T``.  Below 1 the forecasts beat the average in-sample naive forecast.

    Parameters
    ----------
    y, point : array_like, shape (n,)
        Actuals and point forecasts.
    period : int, default 1
        m.
    history : array_like, optional
        The in-sample series x; by default ``y`` itself.

    Returns
    -------
    float

    Raises
    ------
    InputError
        When the history has at most m values or is constant at lag m (the scale is 0).
    """
    check_param("mase", "period", period, Interval(int, 1, None))
    y = _numeric(y, "y", "mase")
    point = _aligned(point, y.size, "the point forecasts", "mase")
    x = y if history is None else _numeric(history, "history", "mase")
    if x.size <= period:
        raise InputError(
            f"mase: the in-sample series needs more than {period} values for a seasonal naive scale; got {x.size}."
        )
    scale = float(np.mean(np.abs(x[period:] - x[:-period])))
    if not scale > 0:
        raise InputError(f"mase: the in-sample series does not change at lag {period}, so the naive scale is 0.")
    return float(np.mean(np.abs(y - point)) / scale)


# --------------------------------------------------------------------------------------------
# Timing
# --------------------------------------------------------------------------------------------
def check_forecast_timing(issued, target, label: str | None = None) -> list[str]:
    """Problems with when forecasts were issued (an empty list when there are none).

    A forecast audit is honest only if every forecast was issued strictly before the observation
    it predicts: one issued at or after its target time may have seen the actual.  The task layer
    calls this with the issue and target time stamps of the stored forecasts and turns each
    problem into an ``error`` verdict for the model.

    Parameters
    ----------
    issued, target : array_like, shape (n,)
        Issue times and target times: ``numpy.datetime64`` values (or datetimes), or numbers on
        one clock.  For period totals the target time stamp is the end of the period.
    label : str, optional
        The model id, named in the messages.

    Returns
    -------
    list of str
        Missing issue times, issue times at or after their targets, and length mismatches, each
        with the count, the first position and the fix.
    """
    who = f"{label}: " if label else ""

    def as_times(x):
        a = np.asarray(x)
        if a.dtype.kind == "O":
            a = a.astype("datetime64[ns]")
        return a

    try:
        iss, tgt = as_times(issued), as_times(target)
    except (TypeError, ValueError) as exc:
        return [f"{who}the issue or target times cannot be read as times ({exc}); store them as time stamps."]
    if iss.shape != tgt.shape or iss.ndim != 1:
        return [f"{who}{iss.size} issue time(s) for {tgt.size} target time(s); state one issue time per forecast."]
    if (iss.dtype.kind == "M") != (tgt.dtype.kind == "M"):
        return [
            f"{who}issue times ({iss.dtype}) and target times ({tgt.dtype}) are not on one clock; store both as time "
            "stamps."
        ]
    problems = []
    missing = np.isnat(iss) if iss.dtype.kind == "M" else ~np.isfinite(iss.astype(float))
    if missing.any():
        first = int(np.flatnonzero(missing)[0])
        problems.append(
            f"{who}{int(missing.sum())} forecast(s) have no issue time, first for target {tgt[first]} (position "
            f"{first}); every audited forecast needs the time it was issued, to show it came before the observation."
        )
    with np.errstate(invalid="ignore"):
        late = ~missing & (iss >= tgt)
    if late.any():
        first = int(np.flatnonzero(late)[0])
        problems.append(
            f"{who}{int(late.sum())} forecast(s) were issued at or after the observation they predict, first the "
            f"forecast for {tgt[first]} issued at {iss[first]} (position {first}); such a forecast may have seen the "
            "actual. Keep only the forecast of record issued before each target time in the forecast store."
        )
    return problems


# --------------------------------------------------------------------------------------------
# Verdict
# --------------------------------------------------------------------------------------------
def _gate_text(check: CheckResult, threshold: float, adjusted: bool) -> str:
    dist, ind = check.gate_flags(threshold, adjusted)
    scores = check.noise
    parts = []
    if dist:
        where = (
            f" (largest at alpha {check.alpha_max:g}, beta {check.beta_max:g})" if np.isfinite(check.alpha_max) else ""
        )
        parts.append(
            "the PIT values of the actuals are not uniform "
            f"(T {check.t_at_max:.1f} against a critical value of {check.critical_value:.1f}{where}, p "
            f"{_fmt_p(check.p_distribution)})"
        )
    if ind:
        lb = check.ljung_box
        first = lb.get("first_lag", 1)
        parts.append(
            f"their normal scores are autocorrelated at lags {first}..{first + int(lb.get('lags', 1)) - 1} "
            f"(Ljung-Box Q {lb.get('statistic', float('nan')):.1f}, p {_fmt_p(check.p_independence)})"
        )
    text = " and ".join(parts) if parts else "no gate was flagged"
    if "score_mean" in scores:
        text += (
            f"; the normal scores have mean {scores['score_mean']:.2f} and standard deviation {scores['score_sd']:.2f} "
            "(0 and 1 when the stated laws are right: a positive mean means forecasts too low, a standard deviation "
            "above 1 a stated uncertainty too narrow)"
        )
    return text


def forecast_verdict(check: CheckResult, threshold: float, adjusted: bool = False) -> tuple[str, tuple]:
    """Verdict and reasons of a forecast audit (there is no refit check).

    ``pass`` when the check passes; ``refit`` when it fails, meaning *the forecasts no longer match
    their stated uncertainty: the owner should re-estimate* (fitaudit did not and cannot refit
    the model); ``insufficient`` or ``error`` when the check could not run.  Every verdict says
    that the model was not refitted by fitaudit.  :func:`fitaudit.core.audit.decide_verdict`
    delegates here when its refit check is None.

    Parameters
    ----------
    check : CheckResult
        The forecast check (``AuditResult.production``).
    threshold : float
        Level of the check (or the fleet's q with ``adjusted``).
    adjusted : bool, default False
        Decide on the fleet-adjusted p-value.

    Returns
    -------
    verdict : str
    reasons : tuple of str
    """
    if not check.ok:
        return check.status, (f"The forecast audit could not run: {check.message}", NOT_REFITTED)
    w = check.window.get("length", check.n)
    if check.passed(threshold, adjusted):
        lb = check.ljung_box
        first = lb.get("first_lag", 1)
        return "pass", (
            f"The stated forecasts still match the {w} actuals of the audit window: the PIT values are consistent with "
            f"uniform (largest T {check.t_at_max:.1f} against {check.critical_value:.1f}, p "
            f"{_fmt_p(check.p_distribution)}) and their normal scores show no autocorrelation at lags "
            f"{first}..{first + int(lb.get('lags', 1)) - 1} (p {_fmt_p(check.p_independence)}).",
            NOT_REFITTED,
        )
    return "refit", (
        f"The forecasts no longer match their stated uncertainty over the {w} actuals of the audit window: "
        f"{_gate_text(check, threshold, adjusted)}. The owner should re-estimate the model that issues them.",
        NOT_REFITTED,
    )


# --------------------------------------------------------------------------------------------
# The audit
# --------------------------------------------------------------------------------------------
def _statement(mean, scale, quantiles, noise, owner: str) -> tuple[str, NoiseLaw | None]:
    if quantiles is not None:
        if mean is not None or scale is not None:
            raise InputError(
                f"{owner}: state each predictive distribution one way: quantiles, or a mean with a scale (continuous "
                "law) or a count law; got quantiles and a mean or scale."
            )
        return "quantiles", None
    if mean is None:
        raise InputError(
            f"{owner}: no forecasts stated; give a mean (with a scale for continuous laws, or a count law) or "
            "predictive quantiles {level: values}."
        )
    law = as_noise_law(noise)
    if law.discrete:
        if scale is not None:
            raise InputError(
                f"{owner}: the {law.name} law takes no scale column (its spread follows from the mean"
                + (" and the size given as the noise shape" if law.has_shape else "")
                + "); drop the scale."
            )
        _count_law(law, owner)
        return "mean-count", law
    if scale is None:
        raise InputError(
            f"{owner}: a {law.name} predictive law needs its scale: a column of predictive standard deviations or one "
            "fixed value (scale=...)."
        )
    return "mean-scale", _continuous_law(law, owner)


def _window_slice(a, first: int, n: int, name: str, owner: str):
    """The audit-window part of a stated forecast aligned with the n actuals (scalars pass through)."""
    if a is None or np.ndim(a) == 0:
        return a
    arr = _numeric(a, name, owner)
    if arr.shape != (n,):
        raise InputError(
            f"{owner}: {name} has shape {arr.shape} but the actuals have {n} values; state one forecast per "
            "observation, aligned with the actuals (NaN where none was issued, before the audit window)."
        )
    return arr[first:]


def _level_name(level) -> str:
    try:
        return f"{float(level):g}"
    except (TypeError, ValueError):
        return repr(level)


def _naive_benchmark(y: np.ndarray, first: int, period: int, horizon: int) -> dict:
    """Seasonal naive point forecasts for the window and their predictive standard deviation."""
    n = y.size
    k = period * math.ceil(horizon / period)
    if first < k:
        return {
            "available": False,
            "note": f"the seasonal naive forecast needs {k} observations before the audit window; there are {first}",
        }
    pairs_before = first - k
    if pairs_before >= _MIN_NAIVE_PAIRS:
        d = y[k:first] - y[: first - k]
        source = "history before the audit window"
    else:
        d = y[k:] - y[:-k]
        source = "whole series (too little history before the audit window)"
    sd = float(np.sqrt(np.mean(d * d)))
    if not sd > 0:
        return {
            "available": False,
            "note": f"the series does not change at lag {k}, so the naive predictive law has no spread",
        }
    return {"available": True, "lag": k, "point": y[first - k : n - k], "sd": sd, "sd_from": source}


def _accuracy(
    y: np.ndarray, first: int, period: int, horizon: int, statement: str, law, mean, scale, levels, Q
) -> dict:
    """MASE, CRPS and CRPS skill against the seasonal naive forecast (reported, never a verdict)."""
    yw = y[first:]
    out: dict[str, Any] = {}
    if statement == "quantiles":
        point = _quantile_at(levels, Q, 0.5, "accuracy")
        out["point"] = "median (the 0.5 quantile, interpolated when not stated)"
        crps = crps_quantiles(yw, dict(zip(levels.tolist(), Q.T)))
        out["crps_method"] = (
            f"twice the mean pinball loss over the {levels.size} stated levels (Berrisch and Ziel 2023)"
        )
    else:
        point = mean
        out["point"] = "mean"
        if statement == "mean-scale":
            crps = crps_location_scale(yw, mean, scale, law)
            out["crps_method"] = f"closed form of the {law.name} law"
        else:
            crps = crps_counts(yw, mean, law)
            out["crps_method"] = f"sum over the support of the {law.name} law"
    out["mae"] = float(np.mean(np.abs(yw - point)))
    out["crps"] = float(np.mean(crps))
    m = period
    history = y[:first] if first - m >= _MIN_NAIVE_PAIRS else y
    out["mase_scale_from"] = (
        "history before the audit window"
        if history is not y
        else "whole series (too little history before the audit window)"
    )
    try:
        out["mase"] = mase(yw, point, m, history)
    except InputError as exc:
        out["mase"] = None
        out["mase_note"] = str(exc)
    naive = _naive_benchmark(y, first, period, horizon)
    if naive["available"]:
        if statement == "quantiles":
            nq = {lv: naive["point"] + naive["sd"] * special.ndtri(lv) for lv in levels.tolist()}
            crps_naive = crps_quantiles(yw, nq)
        else:
            crps_naive = crps_normal(yw, naive["point"], naive["sd"])
        out["crps_naive"] = float(np.mean(crps_naive))
        out["crps_skill"] = float(1.0 - out["crps"] / out["crps_naive"]) if out["crps_naive"] > 0 else None
        out["naive"] = (
            f"seasonal naive y(t-{naive['lag']}) with a normal predictive law of standard deviation {naive['sd']:.4g} "
            f"(root mean square of the lag-{naive['lag']} differences, {naive['sd_from']})"
        )
    else:
        out.update(crps_naive=None, crps_skill=None, naive=naive["note"])
    return out


def _subsequence_check(
    u: np.ndarray, z: np.ndarray, h: int, period: int, settings: AuditSettings, cache, window: dict
) -> CheckResult:
    """Distribution gate of h-step forecasts: h interleaved subsequences (each i.i.d. under the
    null), Bonferroni over them (Diebold, Gunther and Tay 1998 [2]_); independence beyond lag h-1."""
    w = u.size
    checks = []
    for j in range(h):
        idx = np.arange(w - 1 - j, -1, -h)[::-1]  # subsequence j ends j steps before the window's last observation
        checks.append(
            score_frozen(z[idx], u[idx], get_law("normal"), _STANDARD_NORMAL, period, settings, cache, window)
        )
    p_sub = [c.p_distribution for c in checks]
    best = int(np.argmin(p_sub))
    p_dist = float(min(1.0, h * p_sub[best]))
    lags = settings.lb_lags or ljung_box_lags(w, period if period > 1 else settings.season)
    lb = lagged_ljung_box(z, h, lags)
    r = acf(z, h + lags - 1)
    effect_acf = float(np.max(np.abs(r[h:])))
    lb_dict = dict(lb.to_dict(), first_lag=h, p_value_chi2=lb.p_value)
    if settings.calibration == "asymptotic":
        p_ind = lb.p_value
        lb_dict["reference"] = "chi-square (Bartlett-corrected for the MA(h-1) overlap of h-step errors)"
    else:
        rng = key_rng(settings.seed, "independence", "lagged", f"h={h}", f"H={lags}", _digest(z))
        simulated = simulate_lagged_ljung_box(z, h, lags, settings.replicates, rng)
        p_ind = float((1 + np.sum(simulated >= lb.statistic)) / (simulated.size + 1))
        lb_dict.update(
            p_value=p_ind,
            reference=f"simulated MA({h - 1}) null with the estimated autocorrelations (R={simulated.size})",
        )
    calibration = dict(
        checks[best].calibration,
        subsequences=[{"n": int(c.n), "p_distribution": float(c.p_distribution)} for c in checks],
        combination=(
            f"Bonferroni over the {h} interleaved subsequences of {h}-step forecasts (Diebold, Gunther and Tay 1998)"
        ),
        deciding_subsequence=best,
    )
    plots = dict(checks[best].plots, acf=np.asarray(r[1:]).round(6).tolist())
    return dataclasses.replace(
        checks[best],
        p_distribution=p_dist,
        calibration=calibration,
        ljung_box=lb_dict,
        p_independence=float(p_ind),
        p_value=float(min(1.0, 2.0 * min(p_dist, p_ind))),
        effect_acf=effect_acf,
        plots=plots,
    )


def audit_forecasts(
    y,
    mean=None,
    scale=None,
    quantiles: Mapping[float, Any] | None = None,
    noise="normal",
    horizon: int = 1,
    period: int = 1,
    settings: AuditSettings = AuditSettings(),  # noqa: B008 (a frozen dataclass, as in audit_series)
    *,
    cache: CalibrationCache | None = None,
    label: str | None = None,
) -> AuditResult:
    """Audit the stated predictive distributions of a model fitted elsewhere.

    The audit window is the tail of the series of length ``settings.audit_window``, as for the
    production check; a series shorter than the window is ``insufficient``.  Every observation
    of the window needs its stated forecast (NaN is allowed before the window only, where the
    values serve the naive benchmark and nothing else).  For each window observation the PIT
    value ``u_t = F_t(y_t)`` of the actual under its stated predictive law is computed (module
    notes), and

    * **distribution gate**: the PIT values are counted in cells and scored by the divergence
      map with the production check's simulated calibration
      (:func:`fitaudit.core.audit.score_frozen`; the null of i.i.d. U(0, 1) PIT values is exact
      because the stated laws are fixed before the data).  For ``horizon = h > 1`` the PIT
      sequence is (h-1)-dependent even when the forecasts are right, so it is split into the h
      interleaved subsequences of every h-th forecast, each i.i.d. under the null, each scored,
      and their smallest p-value multiplied by h (Bonferroni; Diebold, Gunther and Tay 1998
      [2]_).  Each subsequence must reach the 20 values the cells need, so an h-step audit needs
      a window of about 20 h observations.  The map, counts and critical values reported are
      the deciding subsequence's (at the level of one subsequence).
    * **independence gate**, on the normal scores ``z_t = Phi^{-1}(u_t)``: for h = 1, the
      production check's Ljung-Box test with its simulated null table; for h > 1, a Ljung-Box
      test over lags h .. h + H - 1 only (h-step errors are autocorrelated up to lag h - 1, so
      lags 1 .. h - 1 are not tested), Bartlett-corrected for that dependence
      (:func:`lagged_ljung_box`), with its p-value from a simulated MA(h - 1) null at the
      estimated autocorrelations (:func:`simulate_lagged_ljung_box`; the chi-square limit is
      kept as ``p_value_chi2``, and used with ``calibration="asymptotic"``).  The simulated null
      rests on estimated autocorrelations, so it is approximate: about 4 % instead of 2.5 % at
      90 observations for 3-step random-walk errors (docs/validation.md).  H is
      ``settings.lb_lags`` or the rule of :func:`fitaudit.core.diagnostics.ljung_box_lags`.
    * the check's p-value is ``min(1, 2 min(p_distribution, p_independence))``;
    * **change location** (one-step forecasts whose check fails): the most likely break in the
      normal scores of the window (:func:`fitaudit.core.change.locate_change`), its index a
      position in the series;
    * **accuracy** (reported, never a verdict): MASE of the point forecasts (the mean, or the
      median for quantiles) against the one-step seasonal naive scale of the history before the
      window (Hyndman and Koehler 2006 [5]_), mean CRPS (closed form for location-scale laws,
      summed over the support for counts, twice the mean pinball loss for quantiles), and the
      CRPS skill ``1 - CRPS / CRPS_naive`` against the seasonal naive forecast ``y_{t-k}``,
      ``k = period * ceil(h / period)``, with a normal predictive law whose standard deviation is
      the root mean square of the lag-k differences before the window.

    Verdicts (:func:`forecast_verdict`): ``pass``; ``refit`` = the forecasts no longer match their
    stated uncertainty and the owner should re-estimate; ``insufficient``; ``error``.  The model
    is not refitted by fitaudit, so ``refit`` of the result is None; across a run,
    :func:`fitaudit.core.audit.apply_fleet_rules` adjusts the p-value and escalates a recurring
    ``refit`` to ``respecify`` as for fitted models.

    Parameters
    ----------
    y : array_like, shape (n,)
        The actuals, oldest first, ending at the as-of date.
    mean : array_like, shape (n,), optional
        Predictive means (with ``scale`` for continuous laws; alone for count laws).
    scale : float or array_like, shape (n,), optional
        Predictive standard deviations (continuous laws only; see :func:`pit_location_scale`).
    quantiles : mapping of float to array_like (n,), optional
        Predictive quantiles by level (instead of ``mean``/``scale``; see :func:`pit_quantiles`).
    noise : str, dict or NoiseLaw, default "normal"
        The predictive law for ``mean``: ``normal``, ``student-t``, ``laplace``, ``logistic``,
        ``poisson`` or ``negative-binomial``; a shape (t degrees of freedom, negative-binomial
        size) must be fixed, e.g. ``{"law": "student-t", "shape": 5}``.  Ignored for quantiles.
    horizon : int, default 1
        Steps ahead at which the forecasts were issued.
    period : int, default 1
        Seasonal period (Ljung-Box lags, MASE scale and naive forecast).
    settings : AuditSettings
    cache : CalibrationCache, optional
        Shared null tables (one per run).
    label : str, optional
        Name used in messages (the model id).

    Returns
    -------
    AuditResult
        ``production`` holds the forecast check, ``refit`` is None, ``accuracy`` the accuracy
        figures, ``spec`` ``{"family": "forecasts", "statement", "horizon", "period", ...}``.
        Never raises for bad data: problems become ``insufficient`` or ``error`` verdicts whose
        message names the model and the fix.
    """
    t_start = time.perf_counter()
    cache = cache if cache is not None else CalibrationCache()
    owner = label or "forecasts"
    spec: dict[str, Any] = {"family": "forecasts", "horizon": horizon, "period": period}
    noise_name = (
        "quantiles"
        if quantiles is not None
        else (
            noise
            if isinstance(noise, str)
            else getattr(noise, "name", None) or (noise.get("law") if isinstance(noise, Mapping) else str(noise))
        )
    )
    w = settings.audit_window
    window: dict[str, Any] = {}
    accuracy: dict = {}
    change = None
    try:
        for name, value in (("horizon", horizon), ("period", period)):
            check_param("audit_forecasts", name, value, *_parameter_constraints[name])
        statement, law = _statement(mean, scale, quantiles, noise, owner)
        spec["statement"] = statement
        if law is not None:
            noise_name = law.name if not law.has_shape else f"{law.name}({law.shape:g})"
            spec["noise"] = {"law": law.name, "shape": law.shape}
        y_all = _series(y, owner)
        n = y_all.size
        first = n - w
        window = {"first": first, "last": n - 1, "length": w, "horizon": int(horizon)}
        if w > n:
            raise InsufficientDataError(
                f"{owner}: the audit window ({w} observations) is longer than the series of actuals ({n}); shorten the "
                "audit window or load more history."
            )
        yw = y_all[first:]
        if statement == "quantiles":
            if not isinstance(quantiles, Mapping):
                raise InputError(
                    f"{owner}: quantiles must be a mapping from level to values; got {type(quantiles).__name__}."
                )
            qw = {
                lv: _window_slice(v, first, n, f"the {_level_name(lv)} quantile", owner) for lv, v in quantiles.items()
            }
            levels, Q = _quantile_table(qw, w, owner, first)
            spec["levels"] = levels.tolist()
            rng = key_rng(settings.seed, "pit", "forecast", "quantiles", _digest(yw, Q.ravel()))
            u = _quantile_pit(yw, levels, Q, rng, owner, first)[1]
            mw = sw = None
        else:
            levels = Q = None
            mw = _aligned(
                _window_slice(mean, first, n, "the predictive mean", owner), w, "the predictive mean", owner, first
            )
            if statement == "mean-scale":
                sw = _window_slice(scale, first, n, "the predictive scale", owner)
                sw = _positive(
                    _aligned(sw, w, "the predictive scale", owner, first, scalar_ok=True),
                    "the predictive scale",
                    owner,
                    first,
                )
                u = _pit_location_scale(yw, mw, sw, law, owner, first)
            else:
                sw = None
                rng = key_rng(settings.seed, "pit", "forecast", law.name, _digest(yw, mw))
                u = _pit_counts(yw, mw, law, rng, owner, first)
        z = _normal_scores(u)
    except (FitauditError, ValueError, TypeError) as exc:
        check = _failed_check("production", exc, window, label=label)
        verdict, reasons = forecast_verdict(check, settings.level)
        return AuditResult(
            verdict=verdict,
            reasons=reasons,
            production=check,
            refit=None,
            spec=plain_data(spec),
            noise=str(noise_name),
            timings={"total_s": time.perf_counter() - t_start},
        )

    timings = {}
    t0 = time.perf_counter()
    try:
        if horizon == 1:
            check = score_frozen(z, u, get_law("normal"), _STANDARD_NORMAL, period, settings, cache, window)
            check = dataclasses.replace(check, ljung_box=dict(check.ljung_box, first_lag=1))
        else:
            check = _subsequence_check(u, z, horizon, period, settings, cache, window)
        check = dataclasses.replace(
            check,
            noise=dict(
                check.noise,
                scores="normal scores of the PIT values",
                stated=str(noise_name),
                score_mean=float(np.mean(z)),
                score_sd=float(np.std(z)),
            ),
        )
    except (FitauditError, ValueError, FloatingPointError, np.linalg.LinAlgError, ArithmeticError) as exc:
        check = _failed_check("production", exc, window, label=label)
    timings["production_s"] = time.perf_counter() - t0

    try:
        accuracy = _accuracy(y_all, first, period, horizon, statement, law, mw, sw, levels, Q)
    except (FitauditError, ValueError, FloatingPointError, ArithmeticError) as exc:
        accuracy = {"error": f"{owner}: accuracy could not be computed: {exc}"}

    verdict, reasons = forecast_verdict(check, settings.level)
    if settings.locate_change and horizon == 1 and check.ok and not check.passed(settings.level):
        try:
            change = locate_change(
                z,
                noise="normal",
                params=_STANDARD_NORMAL,
                permutations=settings.change_permutations,
                seed=settings.seed,
                cache=cache,
            )
            change = dataclasses.replace(change, index=change.index + first)
        except (FitauditError, ValueError):
            change = None
    timings["total_s"] = time.perf_counter() - t_start
    return AuditResult(
        verdict=verdict,
        reasons=reasons,
        production=check,
        refit=None,
        spec=plain_data(spec),
        noise=str(noise_name),
        change=change,
        accuracy=plain_data(accuracy),
        timings=timings,
    )


# --------------------------------------------------------------------------------------------
# Calibration planning
# --------------------------------------------------------------------------------------------
def forecast_table_lengths(audit_window: int, horizon: int = 1) -> tuple[int, ...]:
    """Lengths of the PIT sequences a forecast audit scores, each needing one null table.

    One-step forecasts score the whole window, ``w`` values.  ``h``-step forecasts score the
    ``h`` interleaved subsequences of every h-th forecast (:func:`audit_forecasts`), of lengths
    ``ceil(w / h)`` (the first ``w mod h``) and ``floor(w / h)`` (Diebold, Gunther and Tay 1998
    [2]_).

    Parameters
    ----------
    audit_window : int
        ``w``, observations of the audit window.
    horizon : int, default 1
        ``h``, steps ahead.

    Returns
    -------
    tuple of int
        The distinct lengths, longest first.

    Examples
    --------
    >>> forecast_table_lengths(56), forecast_table_lengths(62, 3), forecast_table_lengths(60, 3)
    ((56,), (21, 20), (20,))
    """
    w, h = int(audit_window), int(horizon)
    return tuple(sorted({-(-w // h), w // h}, reverse=True))


def prepare_forecast_calibration(
    entries: Sequence[tuple[AuditSettings, int]],
    cache: CalibrationCache | None = None,
) -> CalibrationCache:
    """Build, once, the null tables of a run's forecast audits.

    A stated predictive law is fixed before the data, so the distribution gate's null is the
    production check's: i.i.d. U(0, 1) PIT values, one table per sequence length
    (:func:`forecast_table_lengths`) and settings, built by
    :func:`fitaudit.core.calibration.production_table` exactly as :func:`score_frozen` asks for
    it (``s = number_of_cells(n, 0)``, the gate of ``settings.gate(n, 0)``), and shared with the
    production checks of fitted models of the same length.  Tables are seeded by their key
    (docs/method.md §7.7), so planning them changes no result.  The independence gate's tables
    are built on demand, as for the production check.

    Parameters
    ----------
    entries : sequence of (AuditSettings, int)
        Per forecast entry: its settings (``audit_window`` is the window) and its horizon.
    cache : CalibrationCache, optional
        Tables to add to; a new cache when omitted.

    Returns
    -------
    CalibrationCache
    """
    cache = cache if cache is not None else CalibrationCache()
    for settings, horizon in entries:
        if settings.calibration == "asymptotic":
            continue
        for n in forecast_table_lengths(settings.audit_window, horizon):
            try:
                settings_production_table(settings, n, number_of_cells(n, 0), settings.gate(n, 0), cache)
            except (FitauditError, ValueError):
                continue  # too short: the audit itself reports it
    return cache
