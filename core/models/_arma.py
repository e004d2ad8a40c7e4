"""Numerical kernels for (seasonal) ARMA models: polynomials, transforms, likelihoods, innovations.

Conventions. The AR polynomial is ``phi(B) = 1 - phi_1 B - ... - phi_p B^p`` and the MA polynomial
``theta(B) = 1 + theta_1 B + ... + theta_q B^q``; both are stored as coefficient arrays in powers of
B (``ar_poly = [1, -phi_1, ...]``, ``ma_poly = [1, theta_1, ...]``). A stationary ARMA process
``phi(B) w_t = theta(B) e_t`` with ``Var(e_t) = sigma2`` is inverted by the recursion
``e = lfilter(ar_poly, ma_poly, w, zi=z)``.

Exact likelihood without a time loop. The recursion is affine in the filter's initial state ``z``:
``e = e0 + H z``, where ``e0`` is the output from a zero state and the columns of ``H`` are the
responses to unit initial states (for lfilter's transposed direct form II these are the impulse
response of ``1 / theta(B)`` delayed by 0, 1, ..., r - 1 steps, so ``H`` is Toeplitz). ``z`` is a
fixed linear function of pre-sample values (``scipy.signal.lfiltic``), independent of the
in-sample innovations, with covariance ``sigma2 * Pz`` (from the autocovariances and the
cross-covariances ``E[w_t e_{t-k}] = sigma2 psi_k``, or from a small Lyapunov equation). The map
``w -> e0`` is lower triangular with unit diagonal, hence

    w ~ N(0, sigma2 A^{-1} (I + H Pz H') A^{-T}),   A w = e0,

and with ``Pz = R R'`` and ``M = I + R' H'H R`` (an r x r matrix, r = max(p, q)) the determinant
lemma and the Woodbury identity give

    -2 log L = m log(2 pi sigma2) + log det M + e0' (I - H R M^{-1} R' H') e0 / sigma2.

Regression coefficients (generalised least squares) and sigma2 are concentrated out in closed form.
The one-step innovations of the exact predictor follow from the same pieces: ``e0_t = e_t - g_t' u``
with ``u = R^{-1} z ~ N(0, I)`` and ``g_t = R' h_t``, so the exact predictor is a Bayesian
(recursive least squares) update for the static vector ``u`` (see :func:`standardized_innovations`).
All of this was checked against statsmodels' Kalman filter (``SARIMAX.loglike`` and its
standardised forecast errors) to about 1e-12.

References
----------
Box, G. E. P., Jenkins, G. M., Reinsel, G. C. and Ljung, G. M. (2015). *Time Series Analysis:
Forecasting and Control*, 5th ed., Wiley, ch. 7 (exact likelihood of ARMA models).
Brockwell, P. J. and Davis, R. A. (1991). *Time Series: Theory and Methods*, 2nd ed., Springer,
sect. 3.3 (autocovariances of ARMA processes) and sect. 5.2 (the Durbin-Levinson algorithm).
Monahan, J. F. (1984). A note on enforcing stationarity in autoregressive-moving average models.
*Biometrika* 71(2), 403-404.  Jones, R. H. (1980). Maximum likelihood fitting of ARMA models to time
series with missing observations. *Technometrics* 22(3), 389-395.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .._scipy import blas, lapack, lfilter

__all__ = [
    "seasonal_product",
    "pacf_to_coefficients",
    "coefficients_to_pacf",
    "constrain_stationary",
    "unconstrain_stationary",
    "is_stationary",
    "arma_autocovariance",
    "initial_state_covariance",
    "difference",
    "integrate",
    "differencing_polynomial",
    "ExactSystem",
    "ExactLikelihood",
    "ConditionalLikelihood",
    "css_jacobian",
    "StateLayout",
    "state_maps",
    "profile_regression",
    "profile_loglik",
    "gaussian_loglik",
    "standardized_innovations",
    "simulate_arma",
]

# Small dense algebra goes through scipy's raw BLAS/LAPACK wrappers (microseconds per call);
# OpenBLAS's own threaded dtrtrs/dpotri are avoided: their thread hand-off can cost milliseconds
# on a busy machine, so triangular solves use dtrsm.
_LOG_2PI = math.log(2.0 * math.pi)
_NEGLIGIBLE = 1e-100  # impulse-response values below this are set to zero
_SMALL_STATE = 3  # state dimensions up to this use the Lyapunov form of the state covariance
_F_TOLERANCE = 1e-12  # |g_t|^2 below this for all later t: F_t = 1, no further updating
_BLOCK = 64  # rows per block of the innovations update


# -- polynomials and the stationarity transform -----------------------------------------------


def seasonal_product(regular: np.ndarray, seasonal: np.ndarray, period: int) -> np.ndarray:
    """Coefficients of the product ``a(B) * c(B^s)`` of a regular and a seasonal polynomial.

    Parameters
    ----------
    regular : ndarray
        Coefficients of ``a(B)`` in increasing powers of B (``regular[0]`` is usually 1).
    seasonal : ndarray
        Coefficients of ``c(x)`` in increasing powers of ``x = B^s``.
    period : int
        The seasonal period s (>= 1).

    Returns
    -------
    ndarray
        Coefficients of the product in increasing powers of B, length
        ``len(regular) + period * (len(seasonal) - 1)``.
    """
    spread = np.zeros(period * (len(seasonal) - 1) + 1)
    spread[::period] = seasonal
    return np.convolve(regular, spread)


def pacf_to_coefficients(pacf: np.ndarray) -> np.ndarray:
    """AR coefficients ``phi_1..phi_p`` whose partial autocorrelations are ``pacf``.

    The Durbin-Levinson recursion ``phi_kj = phi_{k-1,j} - r_k phi_{k-1,k-j}``, ``phi_kk = r_k``
    (Brockwell and Davis 1991, Prop. 5.2.1). For ``|r_k| < 1`` the polynomial
    ``1 - phi_1 B - ... - phi_p B^p`` has all roots outside the unit circle (Monahan 1984).

    Parameters
    ----------
    pacf : ndarray
        Partial autocorrelations ``r_1..r_p``.

    Returns
    -------
    ndarray
        The coefficients ``phi_1..phi_p``.
    """
    phi = np.zeros(len(pacf))
    for k, r in enumerate(pacf):
        phi[:k] -= r * phi[k - 1 :: -1] if k else 0.0
        phi[k] = r
    return phi


def coefficients_to_pacf(phi: np.ndarray) -> np.ndarray:
    """Partial autocorrelations of the AR polynomial ``1 - phi_1 B - ... - phi_p B^p``.

    The step-down (inverse Durbin-Levinson) recursion
    ``phi_{k-1,j} = (phi_kj + r_k phi_{k,k-j}) / (1 - r_k^2)`` with ``r_k = phi_kk``. The
    polynomial is stationary if and only if every ``|r_k| < 1`` (Schur-Cohn criterion); the
    recursion stops at the first ``|r_k| >= 1`` and returns the values found so far padded with
    that value, so callers test ``np.all(np.abs(r) < 1)``.

    Parameters
    ----------
    phi : ndarray
        AR coefficients ``phi_1..phi_p``.

    Returns
    -------
    ndarray
        ``r_1..r_p``.
    """
    phi = np.asarray(phi, dtype=float)
    pacf = np.empty(phi.size)
    for k in range(phi.size, 0, -1):
        r = phi[k - 1]
        pacf[k - 1] = r
        if not abs(r) < 1.0:
            pacf[:k] = r
            return pacf
        phi = (phi[: k - 1] + r * phi[k - 2 :: -1] if k > 1 else phi[:0]) / (1.0 - r * r)
    return pacf


def constrain_stationary(x: np.ndarray) -> np.ndarray:
    """Map unconstrained reals to the coefficients of a stationary AR polynomial.

    ``r_k = x_k / sqrt(1 + x_k^2)`` (so ``|r_k| < 1``), then :func:`pacf_to_coefficients`
    (Monahan 1984; statsmodels' ``constrain_stationary_univariate`` uses the same ``r_k`` with the
    opposite sign convention in the recursion).
    An MA polynomial ``1 + theta B + ...`` is invertible when ``-theta`` is stationary.
    """
    x = np.asarray(x, dtype=float)
    if x.size == 1:
        value = float(x[0])
        return np.array([value / math.sqrt(1.0 + value * value)])
    return pacf_to_coefficients(x / np.sqrt(1.0 + x * x))


def unconstrain_stationary(phi: np.ndarray) -> np.ndarray:
    """Inverse of :func:`constrain_stationary`: ``x_k = r_k / sqrt(1 - r_k^2)``.

    Raises
    ------
    ValueError
        If the polynomial is not stationary.
    """
    r = coefficients_to_pacf(phi)
    if not np.all(np.abs(r) < 1.0):
        raise ValueError("the polynomial is not stationary")
    return r / np.sqrt(1.0 - r * r)


def is_stationary(phi: np.ndarray) -> bool:
    """True when ``1 - phi_1 B - ... - phi_p B^p`` has all its roots outside the unit circle."""
    phi = np.asarray(phi, dtype=float)
    if phi.size == 1:
        return bool(abs(phi[0]) < 1.0)  # False for NaN too
    if phi.size == 0:
        return True
    return bool(np.isfinite(phi).all() and (np.abs(coefficients_to_pacf(phi)) < 1.0).all())


# -- second moments ---------------------------------------------------------------------------


def _psi_weights(ar_poly: np.ndarray, ma_poly: np.ndarray, n: int) -> np.ndarray:
    """First ``n`` coefficients of ``theta(B) / phi(B) = sum psi_j B^j``.

    ``psi_j = theta_j + sum_{i=1}^{min(j, p)} phi_i psi_{j-i}``: the impulse response of the filter
    ``theta(B) / phi(B)`` (Brockwell and Davis 1991, eq. 3.3.3).
    """
    if len(ar_poly) == 2 and n <= 16:  # one AR coefficient: a short scalar recursion beats the filter call
        phi = -float(ar_poly[1])
        theta = ma_poly.tolist()[:n]
        theta += [0.0] * (n - len(theta))
        psi, previous = [], 0.0
        for value in theta:
            previous = value + phi * previous
            psi.append(previous)
        return np.array(psi)
    impulse = np.zeros(n)
    impulse[:1] = 1.0
    return lfilter(ma_poly, ar_poly, impulse)


def arma_autocovariance(ar_poly: np.ndarray, ma_poly: np.ndarray, nlags: int) -> np.ndarray:
    """Autocovariances ``gamma(0..nlags-1)`` of a stationary ARMA process with unit innovation variance.

    Solves the linear system ``gamma(k) - sum_j phi_j gamma(|k - j|) = sum_{j>=k} theta_j psi_{j-k}``
    for ``k = 0..L`` at once (Brockwell and Davis 1991, eq. 3.3.8, "second method").

    Parameters
    ----------
    ar_poly, ma_poly : ndarray
        ``[1, -phi_1, ..., -phi_p]`` and ``[1, theta_1, ..., theta_q]`` (trailing zeros allowed,
        but each one enlarges the system).
    nlags : int
        Number of lags wanted (>= 1).

    Returns
    -------
    ndarray
        ``gamma(0), ..., gamma(nlags - 1)`` divided by ``sigma2``.

    Raises
    ------
    numpy.linalg.LinAlgError
        If the AR polynomial is not stationary (singular system).
    """
    ar_poly = np.asarray(ar_poly, dtype=float)
    ma_poly = np.asarray(ma_poly, dtype=float)
    has_ar = bool(ar_poly[1:].any())
    psi = _psi_weights(ar_poly, ma_poly, len(ma_poly)) if has_ar else ma_poly
    return _autocovariance(ar_poly, ma_poly, psi, nlags)


def _autocovariance(ar_poly: np.ndarray, ma_poly: np.ndarray, psi: np.ndarray, nlags: int) -> np.ndarray:
    """:func:`arma_autocovariance` given the weights ``psi_0..psi_q`` (or more)."""
    p = len(ar_poly) - 1
    q = len(ma_poly) - 1
    size = max(nlags, p + 1)
    has_ar = bool(ar_poly[1:].any())
    rhs = np.zeros(size)
    head = np.correlate(ma_poly, psi[: q + 1], "full")[q:]
    rhs[: min(q + 1, size)] = head[:size]
    if not has_ar:
        return rhs[:nlags]
    if p == 1 and nlags <= 2:  # the two equations solved in closed form
        phi = -float(ar_poly[1])
        if not abs(phi) < 1.0:
            raise np.linalg.LinAlgError("autocovariance system is singular (AR polynomial not stationary?)")
        gamma0 = (rhs[0] + phi * rhs[1]) / (1.0 - phi * phi)
        return np.array([gamma0, phi * gamma0 + rhs[1]])[:nlags]
    _, _, gamma, info = lapack.dgesv(_acov_system(ar_poly, size), rhs)
    if info != 0:
        raise np.linalg.LinAlgError("autocovariance system is singular (AR polynomial not stationary?)")
    return gamma[:nlags]


def _acov_system(ar_poly: np.ndarray, size: int) -> np.ndarray:
    """The matrix of :func:`arma_autocovariance`: ``sum_j a_j`` at ``(k, |k - j|)`` for ``k < size``
    and the non-zero coefficients ``a_j`` of ``ar_poly`` (``a_0 = 1``), added in order of j."""
    system = np.zeros((size, size))
    rows = np.arange(size)
    for j in np.flatnonzero(ar_poly).tolist():
        system[rows, np.abs(rows - j)] += ar_poly[j]
    return system


class StateLayout:
    """Index arrays for an ``r``-dimensional lfilter state, built once and reused.

    Attributes
    ----------
    r : int
        State dimension ``max(p*, q*)``.
    hankel : ndarray
        ``hankel[i, j] = i + j + 1``: indices of the Hankel state maps (see :func:`state_maps`).
    toeplitz : ndarray
        ``|i - j|``: indices of the autocovariance matrix.
    shift, upper : ndarray
        ``max(j - i, 0)`` and ``j >= i``: indices and support of the cross-covariance matrix.
    """

    def __init__(self, r: int):
        lags = np.arange(r)
        self.r = r
        self.hankel = lags[:, None] + lags[None, :] + 1
        self.toeplitz = np.abs(lags[:, None] - lags[None, :])
        shift = lags[None, :] - lags[:, None]
        self.upper = shift >= 0
        self.shift = np.clip(shift, 0, None)


def state_maps(num: np.ndarray, den: np.ndarray, layout: StateLayout) -> tuple[np.ndarray, np.ndarray]:
    """Matrices ``(Mx, My)`` with ``lfiltic(num, den, y=y_past, x=x_past) = Mx x_past + My y_past``.

    ``x_past = (x_{-1}, ..., x_{-r})`` and ``y_past`` likewise. For the transposed direct-form II
    state used by ``scipy.signal.lfilter`` both maps are Hankel: ``Mx[i, j] = num_{i+j+1}`` and
    ``My[i, j] = -den_{i+j+1}`` (zero beyond the polynomial degrees; ``den[0] = 1``).
    """
    r = layout.r
    b = np.zeros(2 * r + 1)
    a = np.zeros(2 * r + 1)
    b[: len(num)] = num
    a[: len(den)] = den
    return b[layout.hankel], -a[layout.hankel]


def _second_moments(ar_poly, ma_poly, layout: StateLayout) -> tuple[np.ndarray, np.ndarray]:
    """``G[j, l] = gamma(|j - l|)`` and ``C[j, l] = E[w_{-j} e_{-l}] = psi_{l-j}`` (l >= j), over sigma2."""
    gamma = arma_autocovariance(ar_poly, ma_poly, layout.r)
    psi = _psi_weights(ar_poly, ma_poly, layout.r)
    return gamma[layout.toeplitz], np.where(layout.upper, psi[layout.shift], 0.0)


def initial_state_covariance(ar_poly: np.ndarray, ma_poly: np.ndarray, layout: StateLayout | None = None) -> np.ndarray:
    """Covariance (over sigma2) of the initial state ``z`` of ``lfilter(ar_poly, ma_poly, w)``.

    With ``z = Mw w_past + Me e_past`` (see :func:`state_maps`),
    ``Pz = Mw G Mw' + Mw C Me' + Me C' Mw' + Me Me'``, where ``G[j, l] = gamma(|j - l|)`` and
    ``C[j, l] = E[w_{-j} e_{-l}] / sigma2 = psi_{l-j}`` for ``l >= j`` (zero otherwise).  ``Mw`` is
    zero outside its leading ``p x p`` block (p the AR degree, often far below r in seasonal
    models), so only ``gamma(0..p-1)`` and the first p rows of ``C`` are needed.

    For ``r <= 3`` the same matrix is obtained more cheaply from the state recursion: substituting
    ``w_n = e_n - z_{0,n-1}`` into the lfilter state update gives ``z_n = T z_{n-1} + c e_n`` with
    ``T`` the companion matrix of the AR polynomial (``T[i, 0] = -b_{i+1}``, ones above the
    diagonal) and ``c = b_{1:} - a_{1:}``, so ``Pz = T Pz T' + c c'`` (a discrete Lyapunov equation,
    solved in vectorised form).

    Returns
    -------
    ndarray
        ``r x r`` matrix, ``r = max(p, q)``.
    """
    layout = layout or StateLayout(max(len(ar_poly), len(ma_poly)) - 1)
    r = layout.r
    if r <= _SMALL_STATE:
        return _small_state_covariance(_padded(ar_poly, r + 1), _padded(ma_poly, r + 1))
    b = ar_poly if len(ar_poly) == r + 1 else _padded(ar_poly, r + 1)
    a = ma_poly if len(ma_poly) == r + 1 else _padded(ma_poly, r + 1)
    lags = np.flatnonzero(b[1:])
    p = int(lags[-1]) + 1 if lags.size else 0
    if p <= 1:  # Mw = b_1 e_1 e_1' (or zero): Me alone is needed
        extended = np.zeros(2 * r + 1)
        extended[: r + 1] = a
        me = extended[layout.hankel]  # minus Me (Hankel, so symmetric)
        cov = me @ me.T
        if not p:
            return cov
        psi = _psi_weights(b[:2], a, r + 1)
        gamma = _autocovariance(b[:2], a, psi, 1)
        b1 = float(b[1])
        cross = -b1 * (me @ psi[:r])  # first row of Mw C Me'
        cov[0] += cross
        cov[:, 0] += cross
        cov[0, 0] += b1 * b1 * gamma[0]
        return cov
    mw, me = state_maps(b, a, layout)
    cov = me @ me.T
    psi = _psi_weights(b[: p + 1], a, r + 1)
    gamma = _autocovariance(b[: p + 1], a, psi, p)
    mw = mw[:p, :p]
    cross = np.zeros((r, r))
    cross[:p] = mw @ np.where(layout.upper[:p], psi[layout.shift[:p]], 0.0) @ me.T
    cov += cross + cross.T
    cov[:p, :p] += mw @ gamma[layout.toeplitz[:p, :p]] @ mw.T
    return cov


def _small_state_covariance(b: np.ndarray, a: np.ndarray) -> np.ndarray:
    """Solve ``P = T P T' + c c'`` for the lfilter state (see :func:`initial_state_covariance`)."""
    r = len(b) - 1
    c = b[1:] - a[1:]
    if r == 1:
        t = -b[1]
        if not abs(t) < 1.0:
            raise np.linalg.LinAlgError("state covariance: AR polynomial not stationary")
        return np.array([[c[0] * c[0] / (1.0 - t * t)]])
    transition = np.eye(r, k=1)
    transition[:, 0] = -b[1:]
    kron = (transition[:, None, :, None] * transition[None, :, None, :]).reshape(r * r, r * r)
    _, _, vec, info = lapack.dgesv(np.eye(r * r) - kron, np.outer(c, c).ravel())
    if info != 0:
        raise np.linalg.LinAlgError("state covariance: AR polynomial not stationary")
    return vec.reshape(r, r)


def _factor(cov: np.ndarray) -> np.ndarray:
    """A matrix ``R`` with ``R R' = cov`` (Cholesky, or a symmetric square root when singular)."""
    chol, info = lapack.dpotrf(cov, lower=1, clean=1)
    if info == 0:
        return chol
    vals, vecs = np.linalg.eigh(cov)
    return vecs * np.sqrt(np.clip(vals, 0.0, None))


# -- differencing -----------------------------------------------------------------------------


def difference(x: np.ndarray, d: int, seasonal_d: int, period: int) -> np.ndarray:
    """Apply ``(1 - B)^d (1 - B^s)^D`` along the last axis, dropping the first ``d + s D`` values."""
    out = np.asarray(x, dtype=float)
    for _ in range(seasonal_d):
        out = out[..., period:] - out[..., :-period]
    for _ in range(d):
        out = out[..., 1:] - out[..., :-1]
    return out


def integrate(w: np.ndarray, d: int, seasonal_d: int, period: int) -> np.ndarray:
    """Invert ``(1 - B)^d (1 - B^s)^D`` along the last axis, taking pre-sample values as zero."""
    return lfilter([1.0], differencing_polynomial(d, seasonal_d, period), w, axis=-1)


def differencing_polynomial(d: int, seasonal_d: int, period: int) -> np.ndarray:
    """Coefficients of ``(1 - B)^d (1 - B^s)^D`` in increasing powers of B."""
    poly = np.array([1.0])
    for _ in range(d):
        poly = np.convolve(poly, [1.0, -1.0])
    for _ in range(seasonal_d):
        poly = seasonal_product(poly, np.array([1.0, -1.0]), period)
    return poly


# -- the exact likelihood ---------------------------------------------------------------------


def _padded(poly: np.ndarray, size: int) -> np.ndarray:
    """``poly`` followed by zeros up to length ``size``."""
    out = np.zeros(size)
    out[: len(poly)] = poly
    return out


@dataclass(frozen=True)
class ExactSystem:
    """The pieces of the exact Gaussian likelihood of ``phi(B) w = theta(B) e`` for ``w = rows' c``.

    Attributes
    ----------
    e0 : ndarray
        ``(k, m)``: each row of ``rows`` filtered from a zero state (``A rows'`` transposed).
    g : ndarray
        ``(r, m)``: ``R' H'``, the responses to unit initial states times ``R`` (``R R' = Pz``).
    logdet : float
        ``log det(I + R' H'H R)``.
    gram : ndarray
        ``(k, k)``: ``rows A' W A rows'`` with ``W = I - H R M^{-1} R' H'``; for coefficients ``c``
        the quadratic form ``w' V^{-1} w`` of ``w = rows' c`` (``Cov(w) = sigma2 V``) is ``c' gram c``.
    """

    e0: np.ndarray
    g: np.ndarray
    logdet: float
    gram: np.ndarray


class ExactLikelihood:
    """Exact Gaussian likelihood of a regression with stationary ARMA errors, for fixed data rows.

    Repeated evaluations (an optimiser's) cost one 2-D ``lfilter`` call over the data rows, one
    impulse response, one Gram product and two small Cholesky factorisations each (see the module
    docstring). The state responses ``H`` are shifted copies of the impulse response of
    ``1 / theta(B)``, so their cost does not grow with the state dimension.

    Parameters
    ----------
    rows : ndarray
        ``(k, m)``: the (differenced) series and regressors as rows.
    r : int
        State dimension ``max(p*, q*)`` of the ARMA polynomials to be evaluated.
    """

    def __init__(self, rows: np.ndarray, r: int):
        self.rows = rows
        self.layout = StateLayout(r)
        m = rows.shape[1]
        self._impulse = np.zeros(m)
        self._impulse[0] = 1.0
        self._one = np.ones(1)
        self._shifted = np.zeros(r + m)
        # a read-only view of the delayed impulse responses: lagged[i, t] = shifted[r + t - i], so
        # once shifted[r:] holds g, lagged is H' (rows h_t' of H, column t)
        step = self._shifted.strides[0]
        self._lagged = np.lib.stride_tricks.as_strided(
            self._shifted[r:], shape=(r, m), strides=(-step, step), writeable=False
        )

    @property
    def nobs(self) -> int:
        """Number of values m entering the likelihood."""
        return self.rows.shape[1]

    def system(self, ar_poly: np.ndarray, ma_poly: np.ndarray) -> ExactSystem:
        """The :class:`ExactSystem` at the given polynomials (degrees at most r).

        Raises
        ------
        numpy.linalg.LinAlgError
            If the AR polynomial is not stationary or the rows are degenerate.
        """
        r = self.layout.r
        k = self.rows.shape[0]
        if r == 0:
            return ExactSystem(self.rows, np.empty((0, self.nobs)), 0.0, self.rows @ self.rows.T)
        b = ar_poly if len(ar_poly) == r + 1 else _padded(ar_poly, r + 1)
        a = ma_poly if len(ma_poly) == r + 1 else _padded(ma_poly, r + 1)
        # the response to the unit initial state e_i is the impulse response g of 1/theta(B)
        # delayed by i steps (transposed direct form II), so H is Toeplitz: H[t, i] = g[t - i]
        if a[1:].any():
            g = lfilter(self._one, a, self._impulse)
            if abs(g[-r:]).max() < _NEGLIGIBLE:  # decayed: keep products clear of (very slow) subnormal numbers
                g[np.abs(g) < _NEGLIGIBLE] = 0.0
            self._shifted[r:] = g
        else:  # no MA part: g is the unit impulse
            self._shifted[r:] = self._impulse
        factor = _factor(initial_state_covariance(b, a, self.layout))
        out = np.empty((r + k, self.nobs))
        out[:r] = factor.T @ self._lagged  # rows g_t = R' h_t
        out[r:] = lfilter(b, a, self.rows, axis=-1)  # e0 rows
        # one Cholesky of [[M, R'H'U], [U'HR, U'U]], M = I + R'H'HR: its trailing block is the
        # Woodbury-reduced Gram matrix and its leading diagonal gives log det M
        augmented = out @ out.T
        augmented.flat[: r * (r + k + 1) : r + k + 1] += 1.0
        chol, info = lapack.dpotrf(augmented, lower=1, clean=1)
        if 0 < info <= r:
            raise np.linalg.LinAlgError("exact likelihood: I + R'H'HR is not positive definite")
        if info:  # collinear data rows: reduce explicitly
            v = blas.dtrsm(1.0, chol[:r, :r], augmented[:r, r:], lower=1)
            gram = augmented[r:, r:] - v.T @ v
        else:
            gram = chol[r:, r:] @ chol[r:, r:].T
        logdet = 2.0 * float(np.log(chol.diagonal()[:r]).sum())
        return ExactSystem(out[r:], out[:r], logdet, gram)


def profile_regression(gram: np.ndarray) -> tuple[np.ndarray, float]:
    """Generalised least squares from the Woodbury-reduced Gram matrix of ``[z, X]``.

    With ``gram = [[t00, t0x], [tx0, txx]]``: ``beta = txx^{-1} tx0`` and the minimised quadratic
    form ``Q = t00 - t0x beta`` (the Schur complement).

    Returns
    -------
    beta : ndarray
        Regression coefficients (length ``k - 1``).
    q : float
        The minimised quadratic form.

    Raises
    ------
    numpy.linalg.LinAlgError
        If the regressors are collinear.
    """
    if gram.shape[0] == 1:
        return np.empty(0), float(gram[0, 0])
    chol, info = lapack.dpotrf(gram[1:, 1:], lower=1, clean=1)
    if info != 0:
        raise np.linalg.LinAlgError("the regressors are collinear after differencing")
    beta = lapack.dpotrs(chol, gram[1:, 0], lower=1)[0]
    return beta, float(gram[0, 0] - gram[0, 1:] @ beta)


def profile_loglik(logdet: float, q: float, m: int) -> tuple[float, float]:
    """Log-likelihood with sigma2 concentrated out: ``sigma2 = Q / m``,
    ``log L = -m/2 (log(2 pi sigma2) + 1) - logdet / 2``. Returns ``(loglik, sigma2)``."""
    sigma2 = q / m
    return -0.5 * m * (_LOG_2PI + math.log(sigma2) + 1.0) - 0.5 * logdet, sigma2


def gaussian_loglik(logdet: float, q: float, m: int, sigma2: float) -> float:
    """Exact log-likelihood at a given ``sigma2``: ``-m/2 log(2 pi sigma2) - logdet/2 - Q/(2 sigma2)``."""
    return -0.5 * m * (_LOG_2PI + math.log(sigma2)) - 0.5 * logdet - 0.5 * q / sigma2


# -- conditional sum of squares ---------------------------------------------------------------


class ConditionalLikelihood:
    """Conditional sum of squares of a regression with ARMA errors, for fixed data rows.

    The residuals ``e_t``, ``t >= p*`` (``p*`` the full AR degree), are computed with the first
    ``p*`` values of ``w`` as given and pre-sample innovations set to zero (Box et al. 2015,
    sect. 7.1.4). They are linear in the coefficients ``c`` of ``w = rows' c``, so the sum of
    squares is ``c' gram c``.

    Parameters
    ----------
    rows : ndarray
        ``(k, m)``: the (differenced) series and regressors as rows.
    pstar, r : int
        Full AR degree and state dimension ``max(p*, q*)``.
    """

    def __init__(self, rows: np.ndarray, pstar: int, r: int):
        self.rows = rows
        self.pstar = pstar
        self.layout = StateLayout(r)
        self._head = rows[:, pstar - 1 :: -1] if pstar else rows[:, :0]
        self._tail = np.ascontiguousarray(rows[:, pstar:])

    @property
    def nobs(self) -> int:
        """Number of conditional residuals ``m - p*``."""
        return self._tail.shape[1]

    def residual_rows(self, ar_poly: np.ndarray, ma_poly: np.ndarray) -> np.ndarray:
        """``(k, m - p*)``: the conditional residuals of each row (linear in the rows)."""
        r = self.layout.r
        if r == 0:
            return self._tail
        b = _padded(ar_poly, r + 1)
        a = _padded(ma_poly, r + 1)
        mw, _ = state_maps(b, a, self.layout)
        zi = self._head @ mw[:, : self.pstar].T
        return lfilter(b, a, self._tail, axis=-1, zi=zi)[0]

    def gram(self, ar_poly: np.ndarray, ma_poly: np.ndarray) -> np.ndarray:
        """``(k, k)`` Gram matrix of the conditional residuals of the rows."""
        resid = self.residual_rows(ar_poly, ma_poly)
        return resid @ resid.T


def _lagged(signal: np.ndarray, lag: int, start: int) -> np.ndarray:
    """``signal[t - lag]`` for ``t = start .. len(signal) - 1``, zero where ``t - lag < 0``."""
    m = signal.size
    if lag <= start:
        return signal[start - lag : m - lag]
    return np.concatenate([np.zeros(lag - start), signal[: m - lag]])


def css_jacobian(factors: list, ma_poly: np.ndarray, w: np.ndarray, resid: np.ndarray, pstar: int) -> np.ndarray:
    """Jacobian of the conditional residuals with respect to multiplicative ARMA coefficients.

    With ``A(B) = prod A_f(B)`` (AR factors) and ``M(B) = prod M_f(B)`` (MA factors) the residuals
    satisfy ``M(B) e_t = A(B) w_t`` for ``t >= p*`` (``e_t = 0`` before). For a coefficient ``c_j``
    of a factor with period ``s_f`` (``A_f = 1 - sum c_j B^{s_f j}`` or ``M_f = 1 + sum c_j B^{s_f j}``),

        de_t/dc_j = -[1 / M(B)] (B^{s_f j} O_f(B) x)_t,

    where ``O_f`` is the product of the other factors of the same side and ``x = w`` (AR side) or
    ``x = e`` (MA side), filtered from a zero state at ``t = p*`` (Box et al. 2015, sect. 7.2).

    Parameters
    ----------
    factors : list of (bool, ndarray, int, int)
        ``(is_ma, factor polynomial in B, period, number of coefficients)`` in coefficient order.
    ma_poly : ndarray
        The full MA polynomial ``M(B)``.
    w : ndarray
        The (regression-adjusted) series, length m.
    resid : ndarray
        The conditional residuals ``e_{p*}, ..., e_{m-1}``.
    pstar : int
        Full AR degree.

    Returns
    -------
    ndarray
        ``(n_coefficients, m - p*)``, rows in the order of ``factors`` and their coefficients.
    """
    m = w.size
    e_full = np.zeros(m)
    e_full[pstar:] = resid
    inputs = []
    for f, (is_ma, _, period, count) in enumerate(factors):
        other = np.array([1.0])
        for g, (side, poly, _, _) in enumerate(factors):
            if g != f and side == is_ma:
                other = np.convolve(other, poly)
        source = e_full if is_ma else w
        base = np.convolve(source, other)[:m] if other.size > 1 else source
        inputs.extend(-_lagged(base, period * j, pstar) for j in range(1, count + 1))
    if not inputs:
        return np.empty((0, m - pstar))
    return lfilter([1.0], ma_poly, np.array(inputs), axis=-1)


# -- innovations of the exact predictor -------------------------------------------------------


def standardized_innovations(system: ExactSystem, coef: np.ndarray) -> np.ndarray:
    """One-step innovations of the exact predictor divided by ``sqrt(F_t)``: ``v_t / sqrt(F_t)``.

    For ``w = rows' coef``, ``e0 = e0_rows' coef = e - H z`` with ``z = R u``, ``u ~ N(0, I)``, so
    ``e0_t = e_t - g_t' u`` with ``g_t = R' h_t``: a regression on a static random vector. The
    exact predictor of ``e0_t`` from ``e0_0..e0_{t-1}`` is therefore the Bayesian (recursive least
    squares) update of ``u``; its innovations and variances (over sigma2) equal those of the
    Kalman filter for ``w``, because the map ``w -> e0`` is lower triangular with unit diagonal.

    The update runs over blocks of at most 64 values: for a block with rows ``G`` and prior ``N(mu, P)``,
    the block covariance is ``S = I + G P G'`` and, with ``S = C C'`` (Cholesky), the standardised
    innovations are ``C^{-1} (e0_B + G mu)``; then ``mu -= W' z`` and ``P -= W' W`` with
    ``W = C^{-1} G P``. Once ``|g_t|^2 < 1e-12`` for every later t (``h_t`` decays with the MA
    roots), ``F_t = 1`` within that tolerance and the rest is ``e0_t + g_t' mu`` with no update.

    Parameters
    ----------
    system : ExactSystem
        From :meth:`ExactLikelihood.system`.
    coef : ndarray
        Coefficients ``c`` of ``w = rows' c`` (e.g. ``[1, -beta]``).

    Returns
    -------
    ndarray
        Length m; each value has variance sigma2 under the model.
    """
    e0 = coef @ system.e0
    r = system.g.shape[0]
    if r == 0:
        return e0
    g = system.g.T  # (m, r): g_t = R' h_t
    norms = np.einsum("ij,ij->i", g, g)
    active = np.nonzero(norms >= _F_TOLERANCE)[0]
    t_end = int(active[-1]) + 1 if active.size else 0
    out = np.empty_like(e0)
    mean = np.zeros(r)
    cov = np.eye(r)
    for start in range(0, t_end, _BLOCK):
        end = min(start + _BLOCK, t_end)
        rows = g[start:end]
        gp = rows @ cov
        block_cov = gp @ rows.T
        block_cov.flat[:: rows.shape[0] + 1] += 1.0
        chol, info = lapack.dpotrf(block_cov, lower=1, clean=1)
        if info != 0:
            raise np.linalg.LinAlgError("innovations: block covariance is not positive definite")
        rhs = np.column_stack([e0[start:end] + rows @ mean, gp])
        solved = blas.dtrsm(1.0, chol, rhs, lower=1)
        z, w = solved[:, 0], solved[:, 1:]
        out[start:end] = z
        mean -= w.T @ z
        cov -= w.T @ w
    out[t_end:] = e0[t_end:] + g[t_end:] @ mean
    return out


# -- simulation -------------------------------------------------------------------------------


def simulate_arma(
    ar_poly: np.ndarray, ma_poly: np.ndarray, innovations: np.ndarray, sigma2: float, rng: np.random.Generator
) -> np.ndarray:
    """Stationary ARMA path driven by ``innovations``, started from the stationary law.

    The pre-sample values ``(w_{-1..-r}, e_{-1..-r})`` are drawn jointly Gaussian with covariance
    ``sigma2 [[G, C], [C', I]]`` (autocovariances and cross-covariances as in
    :func:`initial_state_covariance`), converted to the state of ``lfilter(ma_poly, ar_poly, .)``
    and the filter run over the innovations: no burn-in is needed and the path is stationary
    from its first value.

    Parameters
    ----------
    ar_poly, ma_poly : ndarray
        Stationary AR and MA polynomials.
    innovations : ndarray
        The innovations ``e_0..e_{n-1}`` (already scaled).
    sigma2 : float
        Innovation variance of the pre-sample law.
    rng : numpy.random.Generator
        Source of the pre-sample draw.

    Returns
    -------
    ndarray
        ``w_0..w_{n-1}``.
    """
    r = max(len(ar_poly), len(ma_poly)) - 1
    if r == 0:
        return ma_poly[0] * np.asarray(innovations, dtype=float)
    b = np.zeros(r + 1)
    a = np.zeros(r + 1)
    b[: len(ma_poly)] = ma_poly
    a[: len(ar_poly)] = ar_poly
    layout = StateLayout(r)
    acov, cross = _second_moments(a, b, layout)
    joint = np.block([[acov, cross], [cross.T, np.eye(r)]])
    past = _factor(joint) @ rng.standard_normal(2 * r) * math.sqrt(sigma2)
    w_past, e_past = past[:r], past[r:]
    # state of lfilter(b=ma, a=ar, e): inputs are e, outputs are w
    m_in, m_out = state_maps(b, a, layout)
    zi = m_in @ e_past + m_out @ w_past
    return lfilter(b, a, innovations, zi=zi)[0]
