"""Exponential smoothing in additive-error innovations state-space form, ETS(A, N|A|Ad, N|A|M).

The model (Hyndman, Koehler, Ord & Snyder 2008, *Forecasting with Exponential Smoothing*,
Springer, table 2.2, additive-error half), with level l, trend b, seasonal s and period m:

    mu_t = (l_{t-1} + phi b_{t-1}) + s_{t-m}      additive season (s = 0 without a season)
    mu_t = (l_{t-1} + phi b_{t-1}) * s_{t-m}      multiplicative season
    y_t  = mu_t + e_t,                            e_t ~ N(0, sigma2) independent
    l_t  = l_{t-1} + phi b_{t-1} + alpha e_t / q_t
    b_t  = phi b_{t-1} + beta e_t / q_t
    s_t  = s_{t-m} + gamma e_t / r_t

with q_t = r_t = 1 for an additive season and q_t = s_{t-m}, r_t = l_{t-1} + phi b_{t-1} for a
multiplicative one; phi = 1 without damping, b = 0 without a trend.

Two evaluation routes, both without a Python loop over single time points:

* additive season (or none): the model is linear, so the one-step errors are a time-invariant
  filter of y minus the deterministic path d_t of the initial states,
  ``e = lfilter(num, den, y - d)`` (:func:`error_filter`).  The initial states enter linearly,
  so for given smoothing parameters they are the least-squares solution and are profiled out of
  the likelihood, whose gradient is analytic;
* multiplicative season: within one seasonal cycle the seasonal factors in use are fixed, and
  level and trend follow Holt's linear recursion of the deseasonalised series y_t / s_{t-m}.
  Each cycle is one vectorised linear map; the loop runs over cycles (n / m of them) and is
  batched over parameter vectors for numerical derivatives.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping

import numpy as np

from .._scipy import lapack, lfilter, minimize_lbfgsb, optimize
from .._validation import Interval, Options, validate_params
from ..exceptions import ConvergenceWarning, InputError, SpecificationError
from ._base import FitResult, ForecastModel, check_series, information_criteria
from .registry import _register

__all__ = ["ExpSmoothing", "error_filter"]

#: Distance of alpha, beta/alpha and gamma/(1 - alpha) from 0 and 1 (the bounds of statsmodels'
#: ETSModel and of R's forecast::ets).
SMOOTHING_MARGIN = 1e-4
#: Range of the damping parameter phi (Hyndman & Athanasopoulos, fpp2 section 7.6).
PHI_RANGE = (0.8, 0.98)
#: Relative step of the central differences used for gradients and the information matrix.
_DIFF_STEP = 6e-6
#: Number of local searches (from the best points of the starting grid); the likelihood can be multimodal.
_LOCAL_SEARCHES = 3
#: Starting grid of the local searches, in optimiser coordinates (alpha, beta/alpha, gamma/(1 - alpha), phi).
#: It reaches near the bounds on purpose: maxima with gamma/(1 - alpha), beta/alpha or phi at a bound
#: (AirPassengers ETS(A,N,A) and ETS(A,Ad,N), austourists ETS(A,A,N)) and a small-alpha maximum beside a
#: local one at the lower bound (nottem ETS(A,N,A), alpha 0.031) are missed from interior points alone
#: (tests/test_smoothing.py compares every spec with statsmodels' ETSModel on packaged series).
_START_AXES = {
    "alpha": (0.01, 0.03, 0.1, 0.3, 0.9),
    "beta": (0.01, 0.1, 0.9),
    "gamma": (0.01, 0.2, 0.9),
    "phi": (0.8, 0.98),
}
#: Stand-in for non-finite one-step errors during the multiplicative-season search (series scaled to mean 1).
_NONFINITE_PENALTY = 1e6


def error_filter(
    alpha: float, beta: float, gamma: float, phi: float, trend: bool, period: int
) -> tuple[np.ndarray, np.ndarray]:
    """Numerator and denominator of the filter from ``y - d`` to the one-step errors (additive ETS).

    Parameters
    ----------
    alpha, beta, gamma, phi : float
        Smoothing parameters (beta = 0 without a trend, gamma unused without a season,
        phi = 1 without damping).
    trend : bool
        Whether the model has a trend component.
    period : int
        Seasonal period m, or 0 for a model without an (additive) season.

    Returns
    -------
    num, den : ndarray
        Polynomial coefficients in ascending powers of the backshift B, ``den[0] == 1``.

    Notes
    -----
    Eliminating the states from the additive-error equations gives the ARIMA form
    ``den(B) y_t = num(B) e_t`` with (the reduced forms of Hyndman et al. 2008, ch. 11)

        num(B) = (1 - B)(1 - phi B)(1 - B^m)
        den(B) = num(B) + alpha B (1 - phi B)(1 - B^m) + phi beta B (1 - B^m)
                 + gamma B^m (1 - B)(1 - phi B)

    (drop the factors of absent components).  With a season both polynomials vanish at B = 1:
    the common factor (1 - B) is the redundancy between level and seasonal states and is
    cancelled, which leaves ``num = (1 - phi B)(1 - B^m)`` and
    ``den = (1 - B)(1 - phi B) S(B) + alpha B (1 - phi B) S(B) + phi beta B S(B) + gamma B^m (1 - phi B)``
    with ``S(B) = 1 + B + ... + B^(m-1)``.  The one-step errors are ``e = lfilter(num, den, y - d)``,
    d the deterministic path of the initial states, and simulation inverts this:
    ``y = d + lfilter(den, num, e)``.
    """
    m = period
    if not m:
        if not trend:
            return np.array([1.0, -1.0]), np.array([1.0, alpha - 1.0])
        num = np.array([1.0, -(1.0 + phi), phi])
        return num, num + np.array([0.0, alpha + phi * beta, -alpha * phi])
    if not trend:
        num = np.zeros(m + 1)
        num[[0, m]] = 1.0, -1.0
        den = num.copy()
        den[1:] += alpha  # alpha B S(B)
        den[m] += gamma  # gamma B^m
        return num, den
    num = np.zeros(m + 2)
    num[[0, 1, m, m + 1]] = 1.0, -phi, -1.0, phi  # (1 - phi B)(1 - B^m)
    den = num.copy()
    den[1 : m + 1] += alpha + phi * beta  # alpha B S(B) + phi beta B S(B)
    den[2 : m + 2] -= alpha * phi  # -alpha phi B^2 S(B)
    den[m] += gamma
    den[m + 1] -= gamma * phi  # gamma B^m (1 - phi B)
    return num, den


@_register
class ExpSmoothing(ForecastModel):
    """Exponential smoothing with additive errors: ETS(A,N,N), (A,A,N), (A,Ad,N), (A,*,A), (A,*,M).

    Parameters
    ----------
    trend : {None, "add"}
        Additive trend (Holt) or none.
    damped : bool
        Damp the trend with phi (needs ``trend="add"``).
    seasonal : {None, "add", "mul"}
        Additive or multiplicative seasonality (Holt-Winters) or none.
    period : int or None
        Seasonal period m >= 2; required with, and only with, a season.

    Notes
    -----
    *Parameters*, in this order (absent components dropped): ``alpha, beta, gamma, phi, l0, b0,
    s0, ..., s{m-2}, sigma2``.  ``l0, b0`` are the states at the origin (before the first
    observation); ``s{k}`` is the seasonal state k periods before the origin, s_{-k} in Hyndman et
    al.'s notation, so ``s0`` is used by observation m and the last one, ``s{m-1}``, by observation 1.

    *Seasonal normalisation*: ``s{m-1}`` is not a parameter; it is fixed so that the m initial
    seasonal states sum to 0 (additive) or to m (multiplicative), the convention of R's
    forecast::ets (Hyndman's reference implementation).  statsmodels' ETSModel instead fixes
    ``initial_seasonal.{m-1}`` (the same state) to 0 or 1.  Both describe the same fitted values:
    adding c to every seasonal state and -c to l0 (additive), or multiplying the seasonal states
    by c and dividing l0 and b0 by c (multiplicative), changes no prediction.

    *Bounds* (the "usual" region of Hyndman & Athanasopoulos, *Forecasting: Principles and
    Practice*, 2nd ed., section 7.6; the parametrisation of statsmodels' ETSModel):
    ``1e-4 <= alpha <= 1 - 1e-4``, ``1e-4 <= beta/alpha <= 1 - 1e-4``,
    ``1e-4 <= gamma/(1 - alpha) <= 1 - 1e-4`` and ``0.8 <= phi <= 0.98``.  Forecastability
    (invertibility) is not enforced.

    *Likelihood*: Gaussian with sigma2 concentrated out,
    ``loglik = -n/2 (log(2 pi SSE/n) + 1)``, the convention of statsmodels' ETSModel.  R's
    forecast::ets reports ``-n/2 log(SSE)``, which differs by ``-n/2 (log(2 pi / n) + 1)``, and
    its sigma2 is ``SSE / (n - number of estimated parameters)``; ours is the MLE ``SSE / n``.

    *Multiplicative season*: the update is ``s_t = s_{t-m} + gamma e_t / (l_{t-1} + phi b_{t-1})``
    as in Hyndman et al. (2008, table 2.2) and R's forecast::ets.  statsmodels' ETSModel uses
    ``s_t = g y_t / l_t + (1 - g) s_{t-m}`` with the updated level l_t and ``g = gamma/(1 - alpha)``,
    which agrees to first order only; its errors match ours over the first cycle and then drift
    apart, so its fits differ slightly (by little when gamma is small).

    *Standard errors* (``FitResult.extras["bse"]``): from the Gauss-Newton information
    ``J'J / sigma2``, J the Jacobian of the one-step errors with respect to the parameters
    (analytic for an additive season or none, central differences for a multiplicative one);
    ``bse(sigma2) = sigma2 sqrt(2 / n)``.  Parameters at a bound are listed in
    ``extras["at_bound"]``; their standard errors are not meaningful.

    For the Ljung-Box test the model counts no ARMA coefficients (:meth:`n_dynamic_params` is 0):
    the smoothing parameters are not ARMA coefficients of a stationary model.

    References
    ----------
    R. J. Hyndman, A. B. Koehler, J. K. Ord and R. D. Snyder (2008). *Forecasting with
    Exponential Smoothing: The State Space Approach*. Springer.

    Examples
    --------
    >>> import numpy as np
    >>> from fitaudit.core.models.smoothing import ExpSmoothing
    >>> spec = ExpSmoothing(trend="add", damped=True, seasonal="mul", period=7)
    >>> spec.describe()
    'ETS(A,Ad,M) m=7'
    >>> spec.param_names()[:5]
    ['alpha', 'beta', 'gamma', 'phi', 'l0']
    """

    family = "smoothing"
    _parameter_constraints = {
        "trend": [Options(("add",)), None],
        "damped": [Options((True, False))],
        "seasonal": [Options(("add", "mul")), None],
        "period": [Interval(int, 2, None, closed="left"), None],
    }

    def __init__(self, trend=None, damped=False, seasonal=None, period=None):
        validate_params(self, {"trend": trend, "damped": damped, "seasonal": seasonal, "period": period})
        if damped and trend is None:
            raise SpecificationError("ExpSmoothing: damped=True needs trend='add'; there is no trend to damp.")
        if seasonal is not None and period is None:
            raise SpecificationError(
                f"ExpSmoothing: seasonal={seasonal!r} needs the seasonal period, e.g. period=7 for daily data "
                "with a weekly pattern or period=12 for monthly data."
            )
        if seasonal is None and period is not None:
            raise SpecificationError(
                f"ExpSmoothing: period={period!r} is given but seasonal is None; set seasonal='add' or 'mul', "
                "or drop the period."
            )
        self.trend = trend
        self.damped = bool(damped)
        self.seasonal = seasonal
        self.period = None if period is None else int(period)

    # -- description ------------------------------------------------------------------------
    def describe(self) -> str:
        """Short name in Hyndman et al.'s taxonomy, e.g. ``ETS(A,Ad,M) m=7``."""
        trend = "N" if self.trend is None else ("Ad" if self.damped else "A")
        season = {None: "N", "add": "A", "mul": "M"}[self.seasonal]
        return f"ETS(A,{trend},{season})" + (f" m={self.period}" if self.period else "")

    def seasonal_period(self) -> int:
        """The seasonal period m, or 1 without a season."""
        return self.period or 1

    def n_dynamic_params(self) -> int:
        """0: exponential smoothing has no ARMA coefficients to deduct from the Ljung-Box df."""
        return 0

    def _smoothing_names(self) -> list[str]:
        names = ["alpha"]
        if self.trend:
            names.append("beta")
        if self.seasonal:
            names.append("gamma")
        if self.damped:
            names.append("phi")
        return names

    def _state_names(self) -> list[str]:
        names = ["l0"]
        if self.trend:
            names.append("b0")
        if self.seasonal:
            names += [f"s{k}" for k in range(self.period - 1)]
        return names

    def param_names(self, exog_names: list[str] | None = None) -> list[str]:
        """``alpha, [beta], [gamma], [phi], l0, [b0], [s0 .. s{m-2}], sigma2``."""
        return self._smoothing_names() + self._state_names() + ["sigma2"]

    def min_length(self, n_exog: int = 0) -> int:
        """Four observations more than parameters, and at least two full seasonal cycles."""
        return max(len(self.param_names()) + 4, 2 * (self.period or 0))

    # -- parameter vectors -----------------------------------------------------------------
    def _columns(self, P: np.ndarray) -> dict[str, np.ndarray]:
        """Split a (B, d) batch of parameter vectors (param order, no sigma2) into named columns."""
        names = self.param_names()[:-1]
        col = {name: P[:, i] for i, name in enumerate(names)}
        B = P.shape[0]
        return {
            "alpha": col["alpha"],
            "beta": col.get("beta", np.zeros(B)),
            "gamma": col.get("gamma", np.zeros(B)),
            "phi": col.get("phi", np.ones(B)),
            "l0": col["l0"],
            "b0": col.get("b0", np.zeros(B)),
            "seasonal": P[:, len(names) - (self.period - 1) :] if self.seasonal else np.zeros((B, 0)),
        }

    def _first_cycle(self, free: np.ndarray) -> np.ndarray:
        """Seasonal factors used by observations 1..m, from the free states s0..s{m-2} (B, m-1)."""
        total = self.period if self.seasonal == "mul" else 0.0
        full = np.concatenate([free, (total - free.sum(axis=1))[:, None]], axis=1)
        return full[:, ::-1]

    def _to_natural(self, z: np.ndarray) -> np.ndarray:
        """Optimiser coordinates (alpha, beta/alpha, gamma/(1-alpha), phi, states) to parameters."""
        P = np.array(z, dtype=float, copy=True)
        names = self._smoothing_names()
        alpha = P[..., 0]
        if "beta" in names:
            P[..., names.index("beta")] *= alpha
        if "gamma" in names:
            P[..., names.index("gamma")] *= 1.0 - alpha
        return P

    def _to_optimiser(self, p: np.ndarray) -> np.ndarray:
        z = np.array(p, dtype=float, copy=True)
        names = self._smoothing_names()
        alpha = z[..., 0]
        if "beta" in names:
            z[..., names.index("beta")] /= alpha
        if "gamma" in names:
            z[..., names.index("gamma")] /= 1.0 - alpha
        return z

    def _bounds(self) -> list[tuple[float | None, float | None]]:
        unit = (SMOOTHING_MARGIN, 1.0 - SMOOTHING_MARGIN)
        smoothing = [PHI_RANGE if name == "phi" else unit for name in self._smoothing_names()]
        return smoothing + [(None, None)] * len(self._state_names())

    # -- one-step errors -------------------------------------------------------------------
    def _deterministic_path(self, row: np.ndarray, n: int) -> np.ndarray:
        """d_t = l0 + b0 (phi + ... + phi^t) + s_{t-m}: the predictions when every error is zero (additive)."""
        phi = self._smoothing_values(row)["phi"]
        states = row[len(self._smoothing_names()) :]
        path = np.full(n, states[0])
        if self.trend:
            path += states[1] * np.cumsum(phi ** np.arange(1, n + 1))
        if self.seasonal:
            path += np.resize(self._first_cycle(states[None, -(self.period - 1) :])[0], n)
        return path

    def _smoothing_values(self, theta: np.ndarray) -> dict[str, float]:
        """alpha, beta, gamma, phi from the leading entries of a parameter vector (absent: 0, 0, 0, 1)."""
        values = {"alpha": 0.0, "beta": 0.0, "gamma": 0.0, "phi": 1.0}
        values.update(zip(self._smoothing_names(), map(float, theta)))
        return values

    def _additive_filter(self, c: Mapping[str, float]) -> tuple[np.ndarray, np.ndarray]:
        return error_filter(c["alpha"], c["beta"], c["gamma"], c["phi"], bool(self.trend), self.period or 0)

    def _additive_errors(self, y: np.ndarray, row: np.ndarray) -> np.ndarray:
        num, den = self._additive_filter(self._smoothing_values(row))
        return lfilter(num, den, y - self._deterministic_path(row, y.size))

    def _multiplicative_errors(self, y: np.ndarray, P: np.ndarray) -> np.ndarray:
        """One-step errors of a (B, d) batch of parameter vectors, shape (B, n); see the module notes.

        Within a cycle the seasonal factors S in use are known; with u = y / S, level and trend
        follow Holt's recursion x_t = A x_{t-1} + g u_t, L_t = w' x_{t-1}, where
        A = [[1-alpha, phi(1-alpha)], [-beta, phi(1-beta)]], g = (alpha, beta), w = (1, phi).
        Then e_t = S_t (u_t - L_t) and s_t = S_t (1 + gamma (u_t - L_t) / L_t).
        """
        m = self.period
        c = self._columns(P)
        K = _cycle_operator(c, m)
        cycles = -(-y.size // m)
        Y = np.zeros(cycles * m)
        Y[: y.size] = y
        Y = Y.reshape(cycles, m)
        S = self._first_cycle(c["seasonal"])
        v = np.zeros((P.shape[0], m + 2, 1))  # (level, trend, u_1..u_m) of the current cycle
        v[:, 0, 0], v[:, 1, 0] = c["l0"], c["b0"]
        E = np.empty((P.shape[0], cycles, m))
        gamma = c["gamma"][:, None]
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            for k in range(cycles):
                u = Y[k] / S
                v[:, 2:, 0] = u
                out = K @ v
                eps = u - out[:, :m, 0]
                E[:, k] = S * eps
                S = S * (1.0 + gamma * eps / out[:, :m, 0])
                v[:, :2] = out[:, m:]
        return E.reshape(P.shape[0], -1)[:, : y.size]

    def _batch_errors(self, y: np.ndarray, P: np.ndarray) -> np.ndarray:
        """One-step errors (B, n) for a batch of natural parameter vectors (param order, no sigma2)."""
        if self.seasonal == "mul":
            return self._multiplicative_errors(y, P)
        with np.errstate(over="ignore", invalid="ignore"):
            return np.stack([self._additive_errors(y, row) for row in P])

    def _validate_y(self, y, min_length: int) -> np.ndarray:
        y = check_series(y, self.describe(), min_length)
        if self.seasonal == "mul" and (y <= 0).any():
            bad = np.nonzero(y <= 0)[0]
            raise InputError(
                f"{self.describe()}: multiplicative seasonality needs a strictly positive series, but it has "
                f"{bad.size} value(s) <= 0 (first at position {int(bad[0])}, value {y[bad[0]]:g}). "
                "Use seasonal='add', or shift or transform the series."
            )
        return y

    @staticmethod
    def _reject_exog(exog, what: str) -> None:
        if exog is not None:
            raise SpecificationError(
                f"ExpSmoothing.{what}: exponential smoothing takes no exogenous inputs; drop exog, or register "
                "the series with family 'arima' (regression with ARIMA errors) to use them."
            )

    def errors(self, y, params: Mapping[str, float], exog=None) -> np.ndarray:
        """One-step-ahead errors ``y_t - mu_t`` of frozen parameters, from the states at the series start.

        Parameters
        ----------
        y : array_like, shape (n,)
            The series; its first observation follows the origin of ``l0, b0, s*``.
        params : mapping
            Exactly :meth:`param_names` (``sigma2`` is required but unused).
        exog : None
            Not supported.

        Returns
        -------
        ndarray, shape (n,)
            The one-step errors (all defined).

        Raises
        ------
        InputError
            Bad series (see :func:`check_series`), or a non-positive value under a
            multiplicative season.
        SpecificationError
            Parameters that do not match the spec, or that make the error recursion overflow.
        """
        self._reject_exog(exog, "errors")
        y = self._validate_y(y, 1)
        vec = self._check_params(params, [])[:-1]
        e = self._batch_errors(y, vec[None, :])[0]
        if not np.isfinite(e).all():
            raise SpecificationError(
                f"{self.describe()}: the one-step errors overflow with parameters {dict(params)} (the level or the "
                "error recursion is unstable on this series); refit the model."
            )
        return e

    def production_errors(self, y, params: Mapping[str, float], exog=None) -> np.ndarray:
        """One-step errors of frozen smoothing parameters with the initial states re-estimated on ``y``.

        The stored ``l0, b0, s*`` describe the origin of the window the production version was
        fitted on; on a later stretch of data (which may start on another weekday) they would
        misalign the season.  Here ``alpha, beta, gamma, phi`` stay frozen and the initial states
        minimise the sum of squared one-step errors on ``y``: by linear least squares for an
        additive season (the same profile as in :meth:`fit`), by nonlinear least squares from the
        stored states for a multiplicative one.
        """
        self._reject_exog(exog, "production_errors")
        y = self._validate_y(y, self.min_length())
        vec = self._check_params(params, [])[:-1]
        k = len(self._smoothing_names())
        theta = vec[:k]
        if self.seasonal == "mul":
            scale = float(np.mean(y))

            def resid(states: np.ndarray) -> np.ndarray:
                e = self._batch_errors(y / scale, np.concatenate([theta, states])[None, :])[0]
                return np.where(np.isfinite(e), e, 1e6)

            start = vec[k:].copy()
            start[0] = start[0] / scale
            if self.trend:
                start[1] = start[1] / scale
            sol = optimize.least_squares(resid, start, method="trf")
            states = sol.x.copy()
            states[0] *= scale
            if self.trend:
                states[1] *= scale
        else:
            _, states = _AdditiveProfile(self, y)(theta)
        e = self._batch_errors(y, np.concatenate([theta, states])[None, :])[0]
        if not np.isfinite(e).all():
            raise SpecificationError(
                f"{self.describe()}: the one-step errors overflow with parameters {dict(params)} on this series; refit "
                "the model."
            )
        return e

    # -- estimation --------------------------------------------------------------------------
    def fit(self, y, exog=None, *, standard_errors: bool = True) -> FitResult:
        """Maximum-likelihood fit within the usual bounds (see the class notes).

        Parameters
        ----------
        y : array_like, shape (n,)
            The series: finite, not constant, at least :meth:`min_length` long, and positive for
            a multiplicative season.
        exog : None
            Not supported (raises :class:`SpecificationError`).

        Returns
        -------
        FitResult
            ``params`` in :meth:`param_names` order, ``residuals`` = :meth:`errors` at them,
            ``extras["bse"]`` (left out with ``standard_errors=False``) and ``extras["at_bound"]``.

        Warns
        -----
        ConvergenceWarning
            When the optimiser stops without meeting its criterion.

        Notes
        -----
        The Gaussian likelihood with sigma2 concentrated out is maximised by minimising the sum
        of squared one-step errors.  Additive season (or none): the initial states are profiled
        out by least squares; L-BFGS-B (analytic gradient) maximises the profile likelihood over
        the smoothing parameters from the three best points of a small grid, and the best local
        maximum is kept (the likelihood can be multimodal).  Multiplicative season: bounded
        nonlinear least squares over all parameters (trust-region reflective, central-difference
        Jacobian) on the series divided by its mean, from the distinct additive-season fits
        (seasonal states converted to factors ``1 + s / l0``) and from the best of them with
        heavy smoothing; the best is kept.
        """
        self._reject_exog(exog, "fit")
        y = self._validate_y(y, self.min_length())
        if self.seasonal == "mul":
            vec, res = self._fit_multiplicative(y)
            return self._result(y, vec, res, standard_errors=standard_errors)
        profile = _AdditiveProfile(self, y)
        vec, res = self._additive_searches(y, profile, best_only=True)[0]
        return self._result(y, vec, res, profile, standard_errors)

    def _additive_searches(
        self, y: np.ndarray, profile: _AdditiveProfile | None = None, best_only: bool = False
    ) -> list[tuple[np.ndarray, object]]:
        """Local maxima of the profile likelihood from the best grid points, best first.

        Each entry is (parameter vector without sigma2, scipy OptimizeResult); with ``best_only``
        only the best one (every search still runs; only its states are solved for).
        """
        if profile is None:
            profile = _AdditiveProfile(self, y)
        bounds = self._bounds()[: len(self._smoothing_names())]
        grid = self._start_grid()
        with np.errstate(over="ignore", invalid="ignore"):
            values = profile.objective_values(self._to_natural(grid))
            runs = [
                minimize_lbfgsb(profile.objective, grid[i], bounds, ftol=1e-13, gtol=1e-9, maxiter=500)
                for i in np.argsort(values, kind="stable")[:_LOCAL_SEARCHES]
            ]
        runs.sort(key=lambda r: (_rounded(r.fun), not r.success))  # near-ties: a converged run first
        out = []
        for res in runs[:1] if best_only else runs:
            theta = self._to_natural(res.x[None, :])[0]
            out.append((np.concatenate([theta, profile(theta)[1]]), res))
        return out

    def _start_grid(self) -> np.ndarray:
        """Starting points (optimiser coordinates) for the smoothing parameters, one per row."""
        axes = [_START_AXES[name] for name in self._smoothing_names()]
        return np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, len(axes))

    def _fit_multiplicative(self, y: np.ndarray):
        scale = float(np.mean(y))
        ys = y / scale
        names = self.param_names()[:-1]
        bounds = self._bounds()

        lower = np.array([-np.inf if lo is None else lo for lo, _ in bounds])
        upper = np.array([np.inf if hi is None else hi for _, hi in bounds])

        # The recursion's cost is mostly per time step, not per parameter vector: the residuals of a
        # point are computed with the central differences around it (one pass for 2d + 1 vectors
        # costs about 1.6 times a pass for one), and the Jacobian the optimiser asks for next, at
        # the same point unless it rejected the step, is then already there.
        last: dict = {}

        def with_jacobian(z: np.ndarray) -> np.ndarray:
            Z, step = _central_batch(z)
            E = self._multiplicative_errors(ys, self._to_natural(Z))
            J = (E[1::2] - E[2::2]).T / (2.0 * step)
            last.update(z=z.copy(), jacobian=np.where(np.isfinite(J), J, 0.0))
            return E[0]

        def residuals(z: np.ndarray) -> np.ndarray:
            e = with_jacobian(z)
            return np.where(np.isfinite(e), e, _NONFINITE_PENALTY)

        def jacobian(z: np.ndarray) -> np.ndarray:
            if not ("z" in last and np.array_equal(last["z"], z)):
                with_jacobian(z)
            return last["jacobian"].copy(order="K")  # its layout too: the optimiser's products depend on it

        runs = [
            optimize.least_squares(
                residuals,
                np.clip(self._to_optimiser(start), lower, upper),
                jac=jacobian,
                bounds=(lower, upper),
                method="trf",
                x_scale="jac",
                ftol=1e-12,
                xtol=1e-12,
                gtol=1e-10,
                max_nfev=500,
            )
            for start in self._multiplicative_starts(ys)
        ]
        res = min(runs, key=lambda r: (_rounded(r.cost), not r.success))
        vec = self._to_natural(res.x[None, :])[0]
        for name in ("l0", "b0"):
            if name in names:
                vec[names.index(name)] *= scale
        return vec, res

    def _multiplicative_starts(self, y: np.ndarray) -> list[np.ndarray]:
        """Starting vectors: the distinct additive-season fits with seasonal factors ``1 + s / l0``
        (mean one), and the best of them with heavy smoothing (alpha 0.1, beta/alpha and
        gamma/(1 - alpha) 0.01, phi 0.97), which escapes optima with the trend smoothing at its bound.
        """
        additive = ExpSmoothing(trend=self.trend, damped=self.damped, seasonal="add", period=self.period)
        m = self.period
        k = len(self._smoothing_names())
        starts: list[np.ndarray] = []
        for vec, _ in additive._additive_searches(y):
            if any(np.allclose(vec[:k], s[:k], atol=1e-3) for s in starts):
                continue
            level = vec[k]
            offsets = additive._first_cycle(vec[None, -(m - 1) :])[0][::-1]  # s0..s{m-1}
            factors = np.clip(1.0 + offsets / level, 0.05, None) if level > 0 else np.ones(m)
            factors *= m / factors.sum()
            start = vec.copy()
            start[-(m - 1) :] = factors[:-1]
            starts.append(start)
        heavy = self._to_optimiser(starts[0])
        heavy[:k] = [0.97 if name == "phi" else (0.1 if name == "alpha" else 0.01) for name in self._smoothing_names()]
        starts.insert(1, self._to_natural(heavy))
        return starts[:_LOCAL_SEARCHES]

    def _result(
        self, y: np.ndarray, vec: np.ndarray, res, profile: _AdditiveProfile | None = None, standard_errors: bool = True
    ) -> FitResult:
        n = y.size
        residuals = self._batch_errors(y, vec[None, :])[0]
        sse = float(residuals @ residuals)
        if not np.isfinite(sse) or sse <= 0:
            raise SpecificationError(
                f"{self.describe()}: the fit produced non-finite or zero errors; the series may be deterministic "
                "or unsuitable for this model (try another trend or season)."
            )
        sigma2 = sse / n
        loglik = -0.5 * n * (np.log(2.0 * np.pi * sigma2) + 1.0)
        names = self.param_names()
        params = {name: float(v) for name, v in zip(names[:-1], vec)} | {"sigma2": sigma2}
        aic, bic = information_criteria(loglik, len(names), n)
        converged = bool(res.success) or self._stalled_at_optimum(res)
        if not converged:
            warnings.warn(
                f"{self.describe()}: the optimiser stopped without converging ({res.message}); check the series for "
                "level shifts or outliers, or choose a simpler trend or season.",
                ConvergenceWarning,
                stacklevel=3,
            )
        return FitResult(
            spec=ExpSmoothing(**self.get_params()),
            params=params,
            loglik=float(loglik),
            sigma2=sigma2,
            aic=aic,
            bic=bic,
            nobs=n,
            residuals=residuals,
            converged=converged,
            message=str(res.message) or ("converged" if converged else "stopped"),
            iterations=int(res.nfev),
            extras={
                **({"bse": self._standard_errors(y, vec, sigma2, profile)} if standard_errors else {}),
                "at_bound": self._at_bound(vec),
            },
        )

    def _stalled_at_optimum(self, res) -> bool:
        """True when L-BFGS-B stopped in its line search at a stationary point.

        With ``ftol=1e-13`` the line search can fail to find a decrease once the objective is
        flat to rounding ("ABNORMAL" termination) although the point is a maximum; the projected
        gradient (components pushing against an active bound removed) then is negligible.
        """
        jac = getattr(res, "jac", None)
        if jac is None or "ABNORMAL" not in str(res.message).upper():
            return False
        bounds = self._bounds()[: len(jac)]
        pg = np.array(jac, dtype=float)
        for i, (lo, hi) in enumerate(bounds):
            x = res.x[i]
            if (lo is not None and x <= lo + 1e-10 and pg[i] > 0) or (hi is not None and x >= hi - 1e-10 and pg[i] < 0):
                pg[i] = 0.0
        return bool(np.max(np.abs(pg)) <= 1e-4 * max(1.0, abs(float(res.fun))))

    def _standard_errors(
        self, y: np.ndarray, vec: np.ndarray, sigma2: float, profile: _AdditiveProfile | None = None
    ) -> dict[str, float]:
        """sqrt of diag(sigma2 (J'J)^-1), J the Jacobian of the one-step errors with respect to the parameters.

        Additive season (or none): J is analytic (:meth:`_AdditiveProfile.error_jacobian`, the
        states at their least-squares values as in the fit); multiplicative season: central differences.
        """
        if self.seasonal == "mul":
            Z, step = _central_batch(vec)
            E = self._batch_errors(y, Z)
            J = (E[1::2] - E[2::2]).T / (2.0 * step)
        else:
            k = len(self._smoothing_names())
            if profile is None:
                profile = _AdditiveProfile(self, y)
            J = np.concatenate(profile.error_jacobian(vec[:k]), axis=1)
        names = self.param_names()
        with np.errstate(invalid="ignore"):
            try:
                cov = sigma2 * np.linalg.inv(J.T @ J)
                bse = np.sqrt(np.diag(cov))
            except np.linalg.LinAlgError:
                bse = np.full(vec.size, np.nan)
        out = {name: float(b) for name, b in zip(names[:-1], bse)}
        out["sigma2"] = float(sigma2 * np.sqrt(2.0 / y.size))
        return out

    def _at_bound(self, vec: np.ndarray) -> list[str]:
        z = self._to_optimiser(vec[None, :])[0]
        names = self._smoothing_names()
        hits = []
        for i, (lo, hi) in enumerate(self._bounds()[: len(names)]):
            if min(abs(z[i] - lo), abs(z[i] - hi)) < 1e-6:
                hits.append(names[i])
        return hits

    # -- simulation ----------------------------------------------------------------------------
    def simulate(
        self, params: Mapping[str, float], n: int, rng: np.random.Generator, exog=None, innovations=None
    ) -> np.ndarray:
        """Simulate n observations from the states in ``params`` (l0, b0, s*) forward.

        Parameters
        ----------
        params : mapping
            Exactly :meth:`param_names`.
        n : int
            Number of observations.
        rng : numpy.random.Generator
            Source of N(0, sigma2) innovations when ``innovations`` is None.
        exog : None
            Not supported.
        innovations : array_like, shape (n,), optional
            The errors e_1..e_n, used as given.

        Returns
        -------
        ndarray, shape (n,)

        Notes
        -----
        Additive season (or none): ``y = d + lfilter(den, num, e)``, the deterministic path of
        the initial states plus the inverse of the error filter (:func:`error_filter`).
        Multiplicative season: cycle by cycle, solving the (unit lower-triangular) within-cycle
        system for the levels.
        """
        self._reject_exog(exog, "simulate")
        vec = self._check_params(params, [])
        e = _innovations(n, rng, vec[-1], innovations, self.describe())
        row = vec[:-1]
        if self.seasonal != "mul":
            num, den = self._additive_filter(self._smoothing_values(row))
            return self._deterministic_path(row, n) + lfilter(den, num, e)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            y = self._simulate_multiplicative(row, e)
        if not np.isfinite(y).all():
            raise SpecificationError(
                f"{self.describe()}: the simulated level reached zero (the seasonal update divides by it); "
                "the noise is too large for multiplicative seasonality at these parameters."
            )
        return y

    def _simulate_multiplicative(self, row: np.ndarray, e: np.ndarray) -> np.ndarray:
        P = row[None, :]
        m = self.period
        c = self._columns(P)
        K = _cycle_operator(c, m)[0]
        cycles = -(-e.size // m)
        E = np.zeros(cycles * m)
        E[: e.size] = e
        E = E.reshape(cycles, m)
        # L = P x + T u with u = L + eps, so L = (I - T)^-1 (P x + T eps)
        solve = np.linalg.inv(np.eye(m) - K[:m, 2:])
        from_state = solve @ K[:m, :2]
        from_error = solve @ K[:m, 2:]
        S = self._first_cycle(c["seasonal"])[0]
        x = np.array([c["l0"][0], c["b0"][0]])
        Y = np.empty((cycles, m))
        gamma = c["gamma"][0]
        for k in range(cycles):
            eps = E[k] / S
            L = from_state @ x + from_error @ eps
            u = L + eps
            Y[k] = u * S
            S = S * (1.0 + gamma * eps / L)
            x = K[m:] @ np.concatenate([x, u])
        return Y.ravel()[: e.size]


class _AdditiveProfile:
    """Profile sum of squares of additive ETS, the initial states solved by least squares, and its derivatives.

    With the error filter num/den (:func:`error_filter`) the errors are
    ``e = den^-1 (num * y - q)``, ``*`` a causal convolution, where ``q = num * d`` is the
    deterministic path d of the initial states passed through num.  num is the characteristic
    polynomial of the state transition (unit root, damping factor, seasonal roots), so it
    annihilates d after its first ``len(num) - 1`` terms: q is a short transient ``q = Q s``,
    linear in the states s, and ``den^-1 q = Lag(h) Q s`` with h the impulse response of 1/den.
    Each evaluation therefore filters two rows (num * y and a unit impulse) whatever the number of
    states; the states are the least-squares coefficients of the columns ``Lag(h) Q``.  Q is square
    (Lq x Lq) and invertible, so the profile SSE is also the least-squares fit on the columns
    ``Lag(h)`` alone, with coefficients c = Q s: the search and the start grid work with c, and the
    states are solved for once, at the end (:meth:`__call__`).

    The series is centred and scaled first (mean 0, standard deviation 1; the level state absorbs
    the shift), so sums of squares and tolerances do not depend on the units of y.

    Gradient (envelope theorem, c at its least-squares value): differentiating
    ``den * e = num * y - c`` (c placed at t < Lq) gives ``de/dtheta_i = den^-1 (dnum_i * y - dden_i * e)``,
    and ``dSSE/dtheta_i = 2 a . (dnum_i * y - dden_i * e)`` with ``a = den^-T e`` the errors
    filtered backwards in time (the adjoint of the filter), so one more filtered row gives every
    component.  num and den are affine in each smoothing parameter (:meth:`_polynomials`).
    """

    def __init__(self, spec: ExpSmoothing, y: np.ndarray):
        self.spec = spec
        self.names = spec._smoothing_names()
        self.shift = float(np.mean(y))
        self.scale = float(np.std(y)) or 1.0
        self.y = (y - self.shift) / self.scale
        n = y.size
        self.offset = n * np.log(self.scale)  # n/2 log SSE in the units of y from the scaled SSE
        self.n = n
        self.trend = bool(spec.trend)
        self.m = spec.period if spec.seasonal else 0
        self.basis = _filter_basis(self.trend, self.m)
        self.L = self.basis.shape[1]  # length of num and den
        self.Lq = self.L - 1  # length of the transient q
        # the filters' inputs, Lq zeros first: num * y and a unit impulse.  The outputs then start with
        # Lq exact zeros, which give the lagged impulse responses h[t - j] as a view (:meth:`_lagged`)
        self.inputs = np.zeros((2, self.Lq + n))
        self.inputs[1, self.Lq] = 1.0
        t = np.arange(self.Lq)
        # deterministic paths of the unit seasonal states at t < Lq (s_k is used at t = m-1-k mod m, minus s_{m-1})
        self.season_head = (
            ((t % self.m)[:, None] == self.m - 1 - np.arange(self.m - 1)) - ((t % self.m) == 0)[:, None].astype(float)
            if self.m
            else np.zeros((self.Lq, 0))
        )
        self.toeplitz = np.subtract.outer(t, t)  # i - j
        self.toeplitz_index = np.clip(self.toeplitz, 0, None)
        self.toeplitz_mask = (self.toeplitz >= 0).astype(float)
        self.head_powers = np.arange(1.0, self.Lq + 1)
        # deterministic paths of the unit states at t < Lq, (Lq, k): level, trend (refilled for each phi), season
        self.head = np.concatenate(
            [np.ones((self.Lq, 1))] + ([self.head_powers[:, None]] if self.trend else []) + [self.season_head], axis=1
        )
        self.index = {name: i for i, name in enumerate(self.names)}
        self.positions = tuple(self.index.get(name) for name in ("alpha", "beta", "gamma", "phi"))
        self.i_phi = self.positions[3]
        # d den / d theta_i = sum of (1, phi, alpha, beta, gamma) times these rows of the basis (7: a zero row)
        terms = {"alpha": (2, 3, 7, 7, 7), "beta": (7, 4, 7, 7, 7), "gamma": (5, 6, 7, 7, 7), "phi": (1, 7, 3, 4, 6)}
        rows = np.array([terms[name] for name in self.names]).T  # (5, d)
        self.den_derivative_terms = np.vstack([self.basis, np.zeros(self.L)])[rows].reshape(5, -1)
        self.y_n0 = np.convolve(self.y, self.basis[0])[:n]  # N0 * y (causal): num * y = N0 * y + phi N1 * y
        self.y_n1 = np.convolve(self.y, self.basis[1])[:n]  # N1 * y, the derivative of num * y in phi
        self.one = np.ones(1)  # the numerator of 1/den
        self.padded = np.zeros(n + self.Lq)  # a series, then Lq zeros that stay zero
        self._solved: tuple = (None, None)  # (parameters as bytes, answer) of the last :meth:`_solve`
        self.n_states = self.head.shape[1]
        self.toeplitz_n1 = self._toeplitz(self.basis[1])
        self.gram_lag = np.abs(self.toeplitz)  # the lag of each entry of the Gram matrix (:meth:`_gram`)
        # the last terms of h reversed, h[n-1], h[n-2], ..., in the lower-triangular Toeplitz matrix V of the Gram tail
        self.tail_index = np.clip(self.toeplitz - 1, 0, None)
        self.tail_mask = (self.toeplitz >= 1).astype(float)

    # -- filter coefficients -----------------------------------------------------------------
    def _coefficients(self, Theta: np.ndarray) -> np.ndarray:
        """(B, 7) weights of the basis rows N0, N1, A0, A1, Bb, G0, G1 (see :func:`_filter_basis`)."""
        _, i_beta, i_gamma, i_phi = self.positions  # alpha is always a parameter, first
        C = np.empty((Theta.shape[0], 7))
        C[:, 0] = 1.0
        C[:, 1] = 1.0 if i_phi is None else Theta[:, i_phi]
        C[:, 2] = Theta[:, 0]
        C[:, 3] = C[:, 2] * C[:, 1]
        C[:, 4] = 0.0 if i_beta is None else Theta[:, i_beta] * C[:, 1]
        C[:, 5] = 0.0 if i_gamma is None else Theta[:, i_gamma]
        C[:, 6] = C[:, 5] * C[:, 1]
        return C

    # -- evaluation ------------------------------------------------------------------------------
    def _values(self, theta: np.ndarray) -> tuple[float, float, float, float]:
        """alpha, beta, gamma, phi from a parameter vector (param order; absent: 0, 0, 0, 1)."""
        t = theta.tolist()  # Python floats: the same products as numpy scalars', at a fraction of the cost
        _, i_beta, i_gamma, i_phi = self.positions  # alpha is always a parameter, first
        return (
            t[0],
            0.0 if i_beta is None else t[i_beta],
            0.0 if i_gamma is None else t[i_gamma],
            1.0 if i_phi is None else t[i_phi],
        )

    def _den(self, values: tuple[float, float, float, float]) -> np.ndarray:
        """den at (alpha, beta, gamma, phi) (:meth:`_values`); :meth:`_coefficients` is the batched form."""
        a, b, g, p = values
        return np.array([1.0, p, a, a * p, b * p, g, g * p]) @ self.basis

    def _polynomials(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """num, den and the unit-state paths D (Lq, k) at one parameter vector (param order)."""
        values = self._values(theta)
        p = values[3]
        den = self._den(values)
        num = self.basis[0] + p * self.basis[1]
        D = self.head
        if self.trend:
            D = D.copy()
            D[:, 1] = np.cumsum(p**self.head_powers)
        return num, den, D

    def _num_y(self, phi, out: np.ndarray) -> None:
        """Write num * y = N0 * y + phi N1 * y to ``out`` (n,), or (B, n) for phi of shape (B, 1)."""
        np.multiply(phi, self.y_n1, out=out)
        out += self.y_n0

    def _filtered(self, den: np.ndarray, phi: float) -> np.ndarray:
        """(2, Lq + n): Lq zeros, then r = den^-1 (num * y) (row 0) and h = den^-1 (unit impulse) (row 1)."""
        self._num_y(phi, self.inputs[0, self.Lq :])
        return lfilter(self.one, den, self.inputs, axis=-1)

    def _lagged(self, F: np.ndarray) -> np.ndarray:
        """The (..., n, Lq) view h[t - j] of filtered rows F (..., 2, Lq + n) (:meth:`_filtered`)."""
        *batch, _, width = F.shape
        step = F.strides[-1]
        start = (width + self.Lq) * step  # row 1, after its Lq zeros
        return np.ndarray((*batch, self.n, self.Lq), np.float64, F, start, (*F.strides[:-2], step, -step))

    def _gram(self, auto: np.ndarray, F: np.ndarray) -> np.ndarray:
        """``G_ij = sum_t h(t-i) h(t-j)`` (..., Lq, Lq) from the autocorrelations of h at lags 0..Lq-1 (..., Lq).

        G_ij is the lag |i-j| autocorrelation less the products that run past the end of the series:
        ``G_(i+1)(j+1) = G_ij - h(n-1-i) h(n-1-j)``, so ``G = Toeplitz(auto) - V V'`` with V the
        lower-triangular Toeplitz matrix of the last terms of h, newest first, below its diagonal.
        """
        V = F[..., 1, : -self.Lq - 1 : -1][..., self.tail_index] * self.tail_mask
        return auto[..., self.gram_lag] - V @ np.swapaxes(V, -1, -2)

    def _toeplitz(self, poly: np.ndarray) -> np.ndarray:
        """Lower-triangular Toeplitz matrix (Lq, Lq) of the first Lq coefficients of ``poly``."""
        return poly[self.toeplitz_index] * self.toeplitz_mask

    def _solve(self, theta: np.ndarray):
        """(SSE, states, parts) at smoothing parameters ``theta`` (param order), centred and scaled units.

        The last answer is kept: a fit asks for the states at its optimum and then for the errors'
        Jacobian there (:meth:`error_jacobian`).  Its arrays are read, never written, by the callers.
        """
        key = theta.tobytes()
        if self._solved[0] == key:
            return self._solved[1]
        self._solved = (key, self._solve_anew(theta))
        return self._solved[1]

    def _solve_anew(self, theta: np.ndarray):
        num, den, D = self._polynomials(theta)
        F = self._filtered(den, self._values(theta)[3])
        r, h = F[0, self.Lq :], F[1, self.Lq :]
        if not (math.isfinite(r[-1]) and math.isfinite(h[-1])):  # an overflow propagates to the last term
            return np.inf, np.zeros(self.n_states), None
        Tn = self._toeplitz(num)
        M = np.ascontiguousarray(self._lagged(F)) @ (Tn @ D)  # a contiguous copy multiplies faster (same values)
        states = _least_squares(M, r)
        e = r - M @ states
        return float(e @ e), states, (num, den, D, h, M, e, Tn)

    def __call__(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        """(SSE, least-squares states) at smoothing parameters ``theta`` (param order), in the units of y."""
        with np.errstate(over="ignore", invalid="ignore"):
            sse, states, _ = self._solve(theta)
        return sse * self.scale**2, self._unscaled(states)

    def _unscaled(self, states: np.ndarray) -> np.ndarray:
        out = states * self.scale
        out[0] += self.shift
        return out

    def _dq_states(self, theta: np.ndarray, Tn: np.ndarray, D: np.ndarray, states: np.ndarray) -> np.ndarray:
        """(dQ/dphi) s, (Lq,): num = N0 + phi N1 and the trend path phi + ... + phi^(t+1) depend on phi
        (``Tn`` the Toeplitz matrix of num, s the states)."""
        p = theta[self.positions[3]]
        dtrend = np.cumsum(self.head_powers * p ** (self.head_powers - 1.0))
        return self.toeplitz_n1 @ (D @ states) + Tn @ (dtrend * states[1])

    def _den_derivatives(self, values: tuple[float, float, float, float]) -> np.ndarray:
        """(d, L) coefficients of d den / d theta_i at (alpha, beta, gamma, phi) (:meth:`_values`), from
        den = num + alpha (A0 + phi A1) + phi beta Bb + gamma (G0 + phi G1) (:func:`_filter_basis`)."""
        a, b, g, p = values
        return (np.array([1.0, p, a, b, g]) @ self.den_derivative_terms).reshape(len(self.names), self.L)

    def value_and_gradient(self, theta: np.ndarray) -> tuple[float, np.ndarray]:
        """(SSE, dSSE/dtheta) at smoothing parameters ``theta`` (param order), centred and scaled units.

        Least squares on the lagged impulse responses (coefficients c = Q s; see the class notes),
        so neither Q nor the states are formed.

        Call within ``np.errstate(over="ignore", invalid="ignore")``: parameters far outside the
        forecastable region make the filter overflow, which is reported as an infinite SSE.
        """
        return self._sse_and_gradient(self._values(theta))

    def _sse_and_gradient(self, values: tuple[float, float, float, float]) -> tuple[float, np.ndarray]:
        """:meth:`value_and_gradient` at (alpha, beta, gamma, phi) (:meth:`_values`)."""
        den = self._den(values)
        F = self._filtered(den, values[3])
        Lq, n = self.Lq, self.n
        r, h = F[0, Lq:], F[1, Lq:]
        if not (math.isfinite(r[-1]) and math.isfinite(h[-1])):  # an overflow propagates to the last term
            return np.inf, np.zeros(len(self.names))
        # correlations with h after its Lq zeros: index k holds lag Lq - k
        auto = np.correlate(F[1], h, "valid")[Lq:0:-1]  # sum_t h(t) h(t - j), j < Lq
        cross = np.correlate(F[1], r, "valid")[Lq:0:-1]  # sum_t h(t - j) r(t)
        e = r - np.convolve(h, _least_squares(lambda: self._lagged(F), r, self._gram(auto, F), cross))[:n]
        adjoint = lfilter(self.one, den, e[::-1])[::-1]  # den^-T e
        self.padded[:n] = adjoint
        c_e = np.correlate(self.padded, e, "valid")  # sum_t adjoint[t + j] e[t], j < L
        grad = self._den_derivatives(values) @ c_e
        if self.i_phi is not None:  # dnum/dphi * y = N1 * y
            grad[self.i_phi] -= adjoint @ self.y_n1
        return float(e @ e), -2.0 * grad

    def objective(self, z: np.ndarray) -> tuple[float, np.ndarray]:
        """``n/2 log SSE`` (in the units of y) and its gradient in optimiser coordinates
        (alpha, beta/alpha, gamma/(1 - alpha), phi); 1e300 where the errors overflow.

        The coordinates and the chain rule are worked in Python floats (the same products as numpy's).
        """
        alpha, z_beta, z_gamma, phi = self._values(z)  # absent parameters: 0, 0, 1 as for theta
        values = (alpha, z_beta * alpha, z_gamma * (1.0 - alpha), phi)
        sse, grad = self._sse_and_gradient(values)
        if not (math.isfinite(sse) and sse > 0):
            return 1e300, np.zeros_like(z)
        out = grad.tolist()  # chain rule: beta = z_beta alpha, gamma = z_gamma (1 - alpha)
        _, i_beta, i_gamma, _ = self.positions
        if i_beta is not None:
            out[0] += z_beta * out[i_beta]
            out[i_beta] *= alpha
        if i_gamma is not None:
            out[0] -= z_gamma * out[i_gamma]
            out[i_gamma] *= 1.0 - alpha
        half = 0.5 * self.n
        return half * math.log(sse) + self.offset, np.array(out) * (half / sse)

    def objective_values(self, Theta: np.ndarray) -> np.ndarray:
        """``n/2 log SSE`` (in the units of y) at a (B, d) batch of smoothing parameters; 1e300 where not finite."""
        sse = self.grid_values(Theta)
        ok = np.isfinite(sse) & (sse > 0)
        return np.where(ok, 0.5 * self.n * np.log(np.where(ok, sse, 1.0)) + self.offset, 1e300)

    def error_jacobian(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(de/dtheta at fixed states, de/dstates), (n, d) and (n, k), in the units of y and of the parameters."""
        with np.errstate(over="ignore", invalid="ignore"):
            sse, states, (num, den, D, h, M, e, Tn) = self._solve(theta)
            dden = self._den_derivatives(self._values(theta))
            rows = -np.stack([np.convolve(p, e)[: self.n] for p in dden])
            if "phi" in self.index:
                i = self.index["phi"]
                rows[i] += self.y_n1
                rows[i, : self.Lq] -= self._dq_states(theta, Tn, D, states)
            J = lfilter(self.one, den, rows, axis=-1).T
        return J * self.scale, -M

    def _lag_products(self, RH: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The Gram matrix (B, Lq, Lq) of the lagged impulse responses and their products with r (B, Lq),
        from B sets of filtered rows (B, 2, Lq + n) (:meth:`_filtered`); nothing of size n x Lq is formed."""
        cross, auto = np.moveaxis(np.einsum("btj,bst->bsj", self._lagged(RH), RH[:, :, self.Lq :]), 1, 0)
        return self._gram(auto, RH), cross

    def grid_values(self, Theta: np.ndarray) -> np.ndarray:
        """Profile SSE (centred and scaled units) at a (B, d) batch of smoothing parameters; inf if not finite.

        The normal equations are those of :meth:`value_and_gradient` (coefficients c = Q s of the
        lagged impulse responses), batched.
        """
        C = self._coefficients(Theta)
        den = C @ self.basis
        B, Lq = C.shape[0], self.Lq
        RH = np.zeros((B, 2, Lq + self.n))  # the inputs of :meth:`_filtered`, filtered in place
        self._num_y(C[:, 1:2], RH[:, 0, Lq:])
        RH[:, 1, Lq] = 1.0
        with np.errstate(over="ignore", invalid="ignore"):
            for b in range(B):  # scipy filters one coefficient set per call
                RH[b] = lfilter(self.one, den[b], RH[b], axis=-1)
            finite = np.isfinite(RH[:, 0, -1]) & np.isfinite(RH[:, 1, -1])  # an overflow propagates to the last term
            RH[~finite] = 0.0
            A, rhs = self._lag_products(RH)
            scale = np.sqrt(np.abs(np.einsum("bii->bi", A)))
            scale[~(scale > 0)] = 1.0
            As = A / scale[:, :, None] / scale[:, None, :]
            try:
                coef = np.linalg.solve(As, (rhs / scale)[:, :, None])[..., 0]
            except np.linalg.LinAlgError:
                coef = np.stack([np.linalg.lstsq(a, b, rcond=None)[0] for a, b in zip(As, rhs / scale)])
            R = RH[:, 0, Lq:]
            total = np.einsum("bn,bn->b", R, R)
            sse = total - np.einsum("bk,bk->b", rhs / scale, coef)
            # the difference loses digits when the fit removes most of r (relative error ~ 1e-16 total / sse):
            # such points are evaluated with explicit errors
            for b in np.nonzero(finite & ~(sse > 1e-8 * total))[0]:
                sse[b] = self._solve(Theta[b])[0]
        return np.where(finite & np.isfinite(sse), sse, np.inf)


def _filter_basis(trend: bool, m: int) -> np.ndarray:
    """Rows N0, N1, A0, A1, Bb, G0, G1 with num = N0 + phi N1 and
    den = num + alpha (A0 + phi A1) + phi beta Bb + gamma (G0 + phi G1) (:func:`error_filter`).

    With T(B) = 1 - phi B (trend) or 1, S(B) = 1 + B + ... + B^(m-1) (season) or 1, and the
    differencing 1 - B^m (season) or 1 - B: ``num = T (1 - B^m)``, the alpha term ``B T S``, the
    beta term ``phi B S`` and the gamma term ``B^m T``.
    """
    t0, t1 = (np.array([1.0, 0.0]), np.array([0.0, -1.0])) if trend else (np.array([1.0]), np.array([0.0]))
    diff = np.zeros((m or 1) + 1)
    diff[0], diff[-1] = 1.0, -1.0
    bs = np.concatenate([[0.0], np.ones(m or 1)])  # B S(B)
    L = diff.size + t0.size - 1

    def row(p: np.ndarray) -> np.ndarray:
        out = np.zeros(L)
        out[: min(L, p.size)] = p[:L]
        return out

    zero = np.zeros(L)
    bm = np.zeros((m or 1) + 1)
    bm[-1] = 1.0  # B^m
    return np.array(
        [
            row(np.convolve(diff, t0)),
            row(np.convolve(diff, t1)),
            row(np.convolve(bs, t0)),
            row(np.convolve(bs, t1)),
            row(bs) if trend else zero,
            row(np.convolve(bm, t0)) if m else zero,
            row(np.convolve(bm, t1)) if m else zero,
        ]
    )


def _least_squares(M, r: np.ndarray, gram: np.ndarray | None = None, rhs: np.ndarray | None = None) -> np.ndarray:
    """Least-squares coefficients by the normal equations ``gram = M'M``, ``rhs = M'r`` (formed here
    unless given), or lstsq when gram is not positive definite.  With gram and rhs given, M may be a
    function that returns the matrix (it is then formed only for lstsq).

    The residual is computed afterwards from the coefficients, so coefficient errors affect the
    sum of squares only to second order.
    """
    gram = M.T @ M if gram is None else gram
    rhs = M.T @ r if rhs is None else rhs
    _, coef, info = lapack.dposv(gram, rhs)  # Cholesky; its accuracy does not depend on column scaling
    if info == 0:
        return coef
    return np.linalg.lstsq(M if isinstance(M, np.ndarray) else M(), r, rcond=None)[0]


def _cycle_operator(c: Mapping[str, np.ndarray], m: int) -> np.ndarray:
    """One seasonal cycle of Holt's recursion as a linear map, batched: (B, m + 2, m + 2).

    Acting on (l, b, u_1, ..., u_m) (states at the cycle start, deseasonalised observations),
    rows 0..m-1 give the predicted levels L_i = w' A^i x + sum_{j<i} w' A^(i-1-j) g u_j and the
    last two rows the states after the cycle, A^m x + sum_j A^(m-1-j) g u_j, with
    A = [[1-alpha, phi(1-alpha)], [-beta, phi(1-beta)]], g = (alpha, beta), w = (1, phi).
    """
    alpha, beta, phi = c["alpha"], c["beta"], c["phi"]
    B = alpha.size
    A = np.empty((B, 2, 2))
    A[:, 0, 0] = 1.0 - alpha
    A[:, 0, 1] = phi * (1.0 - alpha)
    A[:, 1, 0] = -beta
    A[:, 1, 1] = phi * (1.0 - beta)
    g = np.stack([alpha, beta], axis=1)
    w = np.stack([np.ones(B), phi], axis=1)
    powers = np.empty((m + 1, B, 2, 2))
    powers[0] = np.eye(2)
    for i in range(m):  # over the period, not over time
        powers[i + 1] = powers[i] @ A
    K = np.zeros((B, m + 2, m + 2))
    K[:, :m, :2] = np.einsum("bk,ibkl->bil", w, powers[:m])
    impulse = np.einsum("bil,bl->bi", K[:, :m, :2], g)  # w' A^i g
    rows, cols = np.tril_indices(m, -1)
    K[:, rows, 2 + cols] = impulse[:, rows - 1 - cols]
    K[:, m:, :2] = powers[m]
    K[:, m:, 2:] = np.einsum("jbkl,bl->bkj", powers[m - 1 :: -1][:m], g)
    return K


def _rounded(value: float) -> float:
    """An objective value to 10 significant digits, so that numerically equal optima compare equal."""
    return float(f"{value:.10g}")


def _central_batch(z: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rows z, z + h_1 e_1, z - h_1 e_1, z + h_2 e_2, ... and the steps h."""
    step = _DIFF_STEP * np.maximum(1.0, np.abs(z))
    d = z.size
    Z = np.repeat(z[None, :], 2 * d + 1, axis=0)
    Z[1 + 2 * np.arange(d), np.arange(d)] += step
    Z[2 + 2 * np.arange(d), np.arange(d)] -= step
    return Z, step


def _innovations(n: int, rng: np.random.Generator, sigma2: float, innovations, owner: str) -> np.ndarray:
    """The innovations as given, or N(0, sigma2) draws; clear errors on bad lengths or variances."""
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise InputError(f"{owner}: the number of observations to simulate must be a positive integer; got {n!r}.")
    if innovations is not None:
        e = np.asarray(innovations, dtype=float)
        if e.shape != (n,):
            raise InputError(f"{owner}: innovations have shape {e.shape}, expected ({n},).")
        if not np.isfinite(e).all():
            raise InputError(f"{owner}: innovations contain NaN or infinite values.")
        return e
    if not sigma2 > 0:
        raise SpecificationError(f"{owner}: sigma2 must be positive to draw innovations; got {sigma2!r}.")
    return rng.normal(0.0, np.sqrt(sigma2), size=n)
