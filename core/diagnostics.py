"""Independence checks on residuals: autocorrelation, Ljung-Box and McLeod-Li.

A cell-count statistic is blind to serial dependence (docs/method.md §9.1), so every check pairs the
divergence map with a portmanteau test on the residuals (the independence gate) and reports one on
the squared residuals (conditional heteroscedasticity).

Residual series may start with NaN (the first positions of a differenced or lagged model have no
one-step error); those are dropped.  NaN anywhere after the first finite value is an error.

References
----------
.. [1] G. M. Ljung and G. E. P. Box, "On a measure of lack of fit in time series models",
       Biometrika 65, 1978, p. 297.
.. [2] A. I. McLeod and W. K. Li, "Diagnostic checking ARMA time series models using
       squared-residual autocorrelations", J. Time Series Anal. 4, 1983, p. 269.
.. [3] G. E. P. Box, G. M. Jenkins, G. C. Reinsel and G. M. Ljung, "Time Series Analysis",
       5th ed., Wiley 2015, section 2.1.6 (large-lag standard error of the autocorrelation; from
       memory).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view

from ._scipy import special
from .exceptions import InputError, InsufficientDataError

__all__ = [
    "PortmanteauResult",
    "acf",
    "acf_band",
    "autocovariances",
    "chi2_sf",
    "ljung_box",
    "ljung_box_batch",
    "ljung_box_lags",
    "mcleod_li",
    "square_autocovariances",
]


def chi2_sf(x, df):
    """Upper-tail chi-square probability ``P(chi2_df >= x)`` (1 for ``x <= 0``), elementwise.

    ``scipy.special.chdtrc``, the function ``scipy.stats.chi2.sf`` evaluates, without the
    distribution object's argument handling (about 80 us a call, paid for every member and
    portmanteau test of every audit); equal to it for every ``x``, NaN included.

    >>> round(float(chi2_sf(3.841, 1)), 4), round(float(chi2_sf(18.307, 10)), 4)  # 95 % points: common practice
    (0.05, 0.05)
    """
    return special.chdtrc(df, np.maximum(x, 0.0))


_LJUNG_BOX_CONVENTION = (
    "Q = n(n+2) sum_{k=1..h} r_k^2/(n-k), r_k the sample autocorrelation (mean removed, denominator n); "
    "p-value from chi-square(h - model_df)"
)
_MCLEOD_LI_CONVENTION = (
    "Ljung-Box Q on the squared residuals (mean of the squares removed, denominator n); p-value from chi-square(h)"
)


# --------------------------------------------------------------------------------------------
# Input handling
# --------------------------------------------------------------------------------------------
def _residual_series(x, owner: str) -> np.ndarray:
    """1-D float residuals with leading NaN dropped; any other NaN or inf is an error."""
    try:
        a = np.asarray(x, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{owner}: the residuals must be numeric; {exc}.") from None
    if a.ndim != 1:
        raise InputError(f"{owner}: the residuals must be a 1-D series; got shape {a.shape}.")
    finite = ~np.isnan(a)
    start = int(np.argmax(finite)) if finite.any() else a.size
    a = a[start:]
    bad = ~np.isfinite(a)
    if bad.any():
        pos = start + int(np.argmax(bad))
        what = "NaN" if np.isnan(a[pos - start]) else "an infinite value"
        raise InputError(
            f"{owner}: the residual series has {what} at position {pos}, after its first finite value; "
            "only leading NaN (positions before the first one-step error) are allowed. Check the model's "
            "residuals for a gap in the data."
        )
    return a


def _check_lags(lags, n: int, owner: str, model_df: int = 0) -> tuple[int, int]:
    if isinstance(lags, bool) or not isinstance(lags, (int, np.integer)) or lags < 1:
        raise InputError(f"{owner}: lags must be a positive int; got {lags!r}.")
    if isinstance(model_df, bool) or not isinstance(model_df, (int, np.integer)) or model_df < 0:
        raise InputError(f"{owner}: model_df must be a non-negative int; got {model_df!r}.")
    if lags >= n:
        raise InsufficientDataError(f"{owner}: {lags} lags need at least {lags + 1} residuals; got {n}.")
    df = int(lags) - int(model_df)
    if df < 1:
        raise InputError(
            f"{owner}: lags ({lags}) must exceed model_df ({model_df}) so the chi-square has at least one "
            "degree of freedom; use ljung_box_lags(n, period, model_df)."
        )
    return int(lags), df


# --------------------------------------------------------------------------------------------
# Autocorrelation
# --------------------------------------------------------------------------------------------
def autocovariances(X: np.ndarray, nlags: int) -> np.ndarray:
    """Autocovariances ``c_0..c_h`` (``h = nlags``) of every row of X (R, n): mean removed, denominator n.

    Each row's values do not depend on the other rows, nor on ``nlags`` beyond their own lags (the
    first ``k + 1`` values of a call with more lags are those of a call with ``k``), so one call
    serves many series and every statistic built from them (tests/test_lockstep.py).

    >>> autocovariances(np.array([[1.0, 2.0, 3.0, 4.0]]), 1).tolist()
    [[1.25, 0.3125]]
    """
    n = X.shape[1]
    dev = X - X.mean(axis=1, keepdims=True)
    padded = np.concatenate([dev, np.zeros((len(X), nlags))], axis=1)
    shifted = sliding_window_view(padded, n, axis=1)[:, : nlags + 1]  # row k holds dev[k:] + zeros
    return np.einsum("rkt,rt->rk", shifted, dev) / n


def acf(x, nlags: int, *, given: np.ndarray | None = None) -> np.ndarray:
    """Sample autocorrelation function.

    ``r_k = c_k / c_0`` with ``c_k = (1/n) sum_{t=1..n-k} (x_t - xbar)(x_{t+k} - xbar)`` (the
    biased, positive-definite estimator; statsmodels' ``acf(adjusted=False, fft=False)``).

    Parameters
    ----------
    x : array_like, 1-D
        Residuals; leading NaN are dropped.
    nlags : int
        Largest lag h, ``1 <= h < n``.
    given : ndarray, optional
        The series' :func:`autocovariances` (leading NaN dropped), at least ``nlags + 1`` of them,
        when they were computed with other series' (:mod:`fitaudit.core.lockstep`): the same result.

    Returns
    -------
    ndarray (nlags + 1,)
        ``r_0 = 1, r_1, ..., r_h``.

    Raises
    ------
    InputError
        Interior NaN, a constant series or an invalid ``nlags``.

    Examples
    --------
    >>> acf([1.0, 2.0, 3.0, 4.0], 1).round(3).tolist()
    [1.0, 0.25]
    """
    a = _residual_series(x, "acf")
    _check_lags(nlags, a.size, "acf")
    c = autocovariances(a[None, :], int(nlags))[0] if given is None else given[: int(nlags) + 1]
    if c[0] <= 0:
        raise InputError("acf: the residuals are constant, so their autocorrelation is undefined.")
    return c / c[0]


def acf_band(n: int, level: float = 0.95) -> float:
    """Half-width of the pointwise band for a white-noise autocorrelation: ``z_{(1+level)/2} / sqrt(n)``.

    Parameters
    ----------
    n : int
        Number of residuals, >= 1.
    level : float, default 0.95
        Coverage in (0, 1).

    Returns
    -------
    float

    Examples
    --------
    >>> round(acf_band(100), 4)
    0.196
    """
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise InputError(f"acf_band: n must be a positive int; got {n!r}.")
    if not (isinstance(level, (int, float, np.floating)) and 0 < level < 1):
        raise InputError(f"acf_band: level must be a float in (0, 1); got {level!r}.")
    return float(special.ndtri(0.5 + 0.5 * level) / math.sqrt(n))


# --------------------------------------------------------------------------------------------
# Portmanteau tests
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class PortmanteauResult:
    """Result of a portmanteau test.

    Attributes
    ----------
    name : {"ljung-box", "mcleod-li"}
    statistic : float
        Q.
    lags : int
        Number of autocorrelations summed, h.
    df : int
        Degrees of freedom of the reference chi-square.
    p_value : float
        ``P(chi2_df >= Q)``.
    convention : str
        The formula and reference distribution in words.
    n : int
        Number of residuals used (after dropping leading NaN).
    """

    name: Literal["ljung-box", "mcleod-li"]
    statistic: float
    lags: int
    df: int
    p_value: float
    convention: str
    n: int

    def to_dict(self) -> dict:
        """Plain-Python form of every field."""
        return {
            "name": self.name,
            "statistic": self.statistic,
            "lags": self.lags,
            "df": self.df,
            "p_value": self.p_value,
            "convention": self.convention,
            "n": self.n,
        }


def _q_statistic(X: np.ndarray, lags: int) -> np.ndarray:
    """Ljung-Box Q of every row of X (R, n)."""
    return _q_from(autocovariances(X, lags), X.shape[1], lags)


def square_autocovariances(X: np.ndarray, nlags: int) -> np.ndarray:
    """:func:`autocovariances` of the squares of every row of X (R, n), centred by their row mean
    (what :func:`mcleod_li` tests)."""
    squares = X**2
    return autocovariances(squares - squares.mean(axis=1, keepdims=True), nlags)


def _q_from(c: np.ndarray, n: int, lags: int) -> np.ndarray:
    """Ljung-Box Q of rows of autocovariances ``c`` (R, at least lags + 1) of series of length n."""
    r = c[:, 1 : lags + 1] / c[:, :1]
    k = np.arange(1, lags + 1)
    return n * (n + 2) * np.sum(r**2 / (n - k), axis=1)


def ljung_box(x, lags: int, model_df: int = 0, *, given: np.ndarray | None = None) -> PortmanteauResult:
    """Ljung-Box portmanteau test of residual autocorrelation [1]_.

    ``Q = n (n + 2) sum_{k=1..h} r_k^2 / (n - k)`` referred to ``chi2(h - model_df)``, with
    ``r_k`` from :func:`acf`; ``model_df = p + q`` for ARMA(p, q) residuals (statsmodels'
    ``acorr_ljungbox(x, lags=[h], model_df=...)`` convention).

    Parameters
    ----------
    x : array_like, 1-D
        Residuals; leading NaN are dropped.
    lags : int
        h, ``model_df < h < n``; see :func:`ljung_box_lags`.
    model_df : int, default 0
        Number of estimated ARMA coefficients (0 for production errors).
    given : ndarray, optional
        As for :func:`acf`: the series' autocovariances, at least ``lags + 1`` of them.

    Returns
    -------
    PortmanteauResult
    """
    a = _residual_series(x, "ljung_box")
    lags, df = _check_lags(lags, a.size, "ljung_box", model_df)
    if np.ptp(a) == 0:
        raise InputError("ljung_box: the residuals are constant, so their autocorrelation is undefined.")
    c = autocovariances(a[None, :], lags) if given is None else given[None, :]
    q = float(_q_from(c, a.size, lags)[0])
    return PortmanteauResult("ljung-box", q, lags, df, float(chi2_sf(q, df)), _LJUNG_BOX_CONVENTION, int(a.size))


def mcleod_li(x, lags: int, *, given: np.ndarray | None = None) -> PortmanteauResult:
    """McLeod-Li test: Ljung-Box on the squared residuals [2]_.

    ``Q`` of :func:`ljung_box` computed from ``e_t^2`` (centred by their mean), referred to
    ``chi2(h)``: no degrees of freedom are removed for the ARMA coefficients.

    Parameters
    ----------
    x : array_like, 1-D
        Residuals; leading NaN are dropped.
    lags : int
        h, ``1 <= h < n``.
    given : ndarray, optional
        The series' :func:`square_autocovariances`, at least ``lags + 1`` of them, when they were
        computed with other series' (:mod:`fitaudit.core.lockstep`): the same result.

    Returns
    -------
    PortmanteauResult
    """
    a = _residual_series(x, "mcleod_li")
    lags, df = _check_lags(lags, a.size, "mcleod_li")
    if np.ptp(a**2) == 0:
        raise InputError("mcleod_li: the squared residuals are constant, so their autocorrelation is undefined.")
    c = square_autocovariances(a[None, :], lags) if given is None else given[None, :]
    q = float(_q_from(c, a.size, lags)[0])
    return PortmanteauResult("mcleod-li", q, lags, df, float(chi2_sf(q, df)), _MCLEOD_LI_CONVENTION, int(a.size))


def ljung_box_batch(X, lags: int, model_df: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """Ljung-Box statistics and p-values of many residual series at once (vectorised).

    Parameters
    ----------
    X : array_like (R, n)
        One finite residual series per row.
    lags : int
    model_df : int, default 0

    Returns
    -------
    statistic : ndarray (R,)
    p_value : ndarray (R,)
        As :func:`ljung_box` applied row by row.
    """
    try:
        X = np.asarray(X, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"ljung_box_batch: X must be numeric; {exc}.") from None
    if X.ndim != 2:
        raise InputError(f"ljung_box_batch: X must be 2-D (replicates, n); got shape {X.shape}.")
    if not np.isfinite(X).all():
        raise InputError("ljung_box_batch: X contains NaN or infinite values; every replicate must be complete.")
    lags, df = _check_lags(lags, X.shape[1], "ljung_box_batch", model_df)
    constant = np.ptp(X, axis=1) == 0
    if constant.any():
        raise InputError(f"ljung_box_batch: row(s) {np.flatnonzero(constant)[:5].tolist()} are constant.")
    q = _q_statistic(X, lags)
    return q, chi2_sf(q, df)


def ljung_box_lags(n: int, period: int = 1, model_df: int = 0) -> int:
    """Number of lags h for the independence gate (docs/method.md §9.2).

    ``h = min(10, n // 5)`` for non-seasonal models (``period <= 1``), ``h = min(2 m, n // 5)``
    for seasonal period m, and at least ``model_df + 3`` so the chi-square keeps three degrees of
    freedom.  (statsmodels' ``acorr_ljungbox`` default uses the same ``min(10, n // 5)`` and
    ``min(2 m, n // 5)``.)

    Parameters
    ----------
    n : int
        Number of residuals.
    period : int, default 1
        Seasonal period m (1 for none).
    model_df : int, default 0
        Degrees of freedom removed for estimated ARMA coefficients.

    Returns
    -------
    int

    Raises
    ------
    InsufficientDataError
        When ``h >= n`` (too few residuals for the required lags).

    Examples
    --------
    >>> ljung_box_lags(200), ljung_box_lags(144, period=12), ljung_box_lags(30, model_df=4)
    (10, 24, 7)
    """
    for name, value, least in (("n", n, 1), ("period", period, 1), ("model_df", model_df, 0)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < least:
            raise InputError(f"ljung_box_lags: {name} must be an int >= {least}; got {value!r}.")
    cap = 10 if period <= 1 else 2 * int(period)
    h = max(min(cap, n // 5), int(model_df) + 3)
    if h >= n:
        raise InsufficientDataError(
            f"The Ljung-Box gate needs {h} lags (model_df {model_df} + 3 at least) and so at least {h + 1} residuals; "
            f"got {n}."
        )
    return int(h)
