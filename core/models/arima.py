"""Seasonal ARIMA with exogenous regressors (regression with ARIMA errors).

The model for a series ``y_1..y_n`` with regressors ``x_t`` (trend terms and exogenous inputs, in
levels) is

    y_t = x_t' beta + u_t,    phi(B) Phi(B^s) (1 - B)^d (1 - B^s)^D u_t = theta(B) Theta(B^s) e_t,

``e_t`` i.i.d. N(0, sigma2), with ``phi(B) = 1 - phi_1 B - ...`` and ``theta(B) = 1 + theta_1 B + ...``
(statsmodels' sign convention for MA terms; a published MA coefficient -0.40 reads -0.40 here).
Trend terms are regressors in levels: ``intercept`` multiplies 1 and ``drift`` multiplies
t = 1, 2, ..., n (t counts from 1 at the first value of the series passed in).  A trend term of
lower order than ``d + D`` is removed by the differencing and is rejected.

Estimation (the classical textbook convention; Box, Jenkins, Reinsel and Ljung 2015, ch. 7):
``y`` and the regressors are differenced, and the differenced series is a regression with
stationary ARMA errors.  ``method="exact"`` maximises its exact Gaussian likelihood (sigma2 and
beta concentrated out by generalised least squares), started from the conditional sum of squares;
``method="css"`` minimises the conditional sum of squares.  Stationarity and invertibility are
enforced by the partial-autocorrelation transform of Monahan (1984).  The exact likelihood equals
that of statsmodels' ``SARIMAX(y, exog=X, ..., simple_differencing=True)`` with the trend terms
passed as columns of ``X``.
"""

from __future__ import annotations

import copy
import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np

from .._scipy import lapack
from .._validation import Interval, Options, validate_params
from ..exceptions import ConvergenceWarning, InputError, InsufficientDataError, SpecificationError
from . import _arma
from ._base import FitResult, ForecastModel, check_series, exog_matrix, information_criteria
from .registry import _register

__all__ = ["Arima"]

_TRENDS = {"n": (), "c": ("intercept",), "t": ("drift",), "ct": ("intercept", "drift")}
_TREND_ORDER = {"intercept": 0, "drift": 1}
_TREND_WORDS = {"n": "", "c": " with intercept", "t": " with drift", "ct": " with intercept and drift"}
_MAX_UNCONSTRAINED = 1e4  # |x| cap of the transform: partial autocorrelation within 5e-9 of +-1
_GRADIENT_STEP = 1e-7  # relative forward-difference step on the transformed scale
_GTOL = 1e-5  # BFGS gradient tolerance of -loglik/m on the transformed scale
_GAIN_TOLERANCE = 1e-4  # remaining log-likelihood gain predicted by the quasi-Newton model
_STEP_GAIN_TOLERANCE = 1e-5  # log-likelihood gain of a full quasi-Newton step that ends the iterations
_ARMIJO = 1e-4  # sufficient-decrease constant of the line search (Nocedal and Wright 2006, sect. 3.1)
_LINE_SEARCH_STEPS = 30  # trial points per line search before the search direction is given up
_CSS_TOLERANCE = 1e-10  # relative decrease of the sum of squares that ends Gauss-Newton (method="css")
_START_TOLERANCE = 1e-5  # the same when the conditional fit only starts the exact one
_HESSIAN_STEP = 1e-4  # relative step of the forward-difference Hessian (standard errors)


@dataclass(frozen=True)
class _Data:
    """A series prepared for estimation: differenced rows ``[z; X]`` and bookkeeping."""

    rows: np.ndarray  # (1 + k, m): differenced series, then differenced regressors
    exog_names: list
    lost: int  # values lost to differencing
    ols: np.ndarray  # least-squares coefficients of the differenced series on the regressors


@_register
class Arima(ForecastModel):
    """Seasonal ARIMA(p,d,q)(P,D,Q)s with trend terms and exogenous regressors.

    Parameters
    ----------
    order : tuple of int, default (0, 0, 0)
        ``(p, d, q)``: AR order, number of regular differences, MA order.
    seasonal : tuple of int, default (0, 0, 0, 0)
        ``(P, D, Q, s)``: seasonal AR order, seasonal differences, seasonal MA order and period
        (``s >= 2`` whenever P, D or Q is positive).
    trend : {"n", "c", "t", "ct"}, default "n"
        Trend regressors in levels: none, intercept, drift (linear time trend), both.  A term of
        lower order than ``d + D`` is eliminated by differencing and rejected (with ``d = 1`` use
        ``"t"`` for a drift).
    method : {"exact", "css"}, default "exact"
        Exact Gaussian maximum likelihood of the differenced series (started from the conditional
        sum of squares), or the conditional sum of squares alone.
    maxiter : int, default 500
        Iteration limit of each optimisation stage.

    Notes
    -----
    Parameters are named ``ar1.., ma1.., sar1.., sma1.., intercept, drift, x:<column>, sigma2``.

    Log-likelihood: for ``method="exact"`` the exact Gaussian log-likelihood of the
    ``m = n - d - sD`` differenced values (Box et al. 2015, ch. 7), ``nobs = m``; for
    ``method="css"`` the conditional log-likelihood ``-(m - p*)/2 (log(2 pi sigma2) + 1)`` of the
    ``m - p*`` conditional residuals (``p* = p + sP``, ``nobs = m - p*``), ``sigma2`` their mean
    square.  AIC and BIC count every parameter, ``sigma2`` included.

    Residuals (``fit.residuals`` and :meth:`errors`): the one-step-ahead innovations ``v_t`` of the
    exact (Kalman) predictor of the differenced series divided by the square root of their
    relative variance ``F_t``, i.e. ``v_t / sqrt(F_t)``, so that each has variance ``sigma2`` under
    the model whatever its position; NaN for the first ``d + sD`` positions, which are lost to
    differencing.  The same convention serves both estimation methods.

    Standard errors (``fit.extras["bse"]``): ARMA and regression coefficients from the inverse of
    the forward-difference Hessian of the log-likelihood with sigma2 concentrated out (the
    corresponding block of the full inverse Hessian); ``sigma2`` from ``sigma2 sqrt(2 / nobs)``
    (its cross terms with the other parameters vanish asymptotically).

    References
    ----------
    Box, G. E. P., Jenkins, G. M., Reinsel, G. C. and Ljung, G. M. (2015). *Time Series Analysis:
    Forecasting and Control*, 5th ed., Wiley.  Monahan, J. F. (1984). A note on enforcing
    stationarity in autoregressive-moving average models. *Biometrika* 71(2), 403-404.

    Examples
    --------
    >>> import numpy as np
    >>> from fitaudit.core.models.arima import Arima
    >>> y = np.random.default_rng(0).standard_normal(200).cumsum()
    >>> fit = Arima(order=(0, 1, 1), trend="t").fit(y)
    >>> list(fit.params)
    ['ma1', 'drift', 'sigma2']
    """

    family = "arima"
    _parameter_constraints = {
        "trend": [Options(tuple(_TRENDS))],
        "method": [Options(("exact", "css"))],
        "maxiter": [Interval(int, 1, None)],
    }

    def __init__(self, order=(0, 0, 0), seasonal=(0, 0, 0, 0), trend="n", method="exact", maxiter=500):
        self.order = _int_tuple(order, 3, "order", "(p, d, q)")
        self.seasonal = _int_tuple(seasonal, 4, "seasonal", "(P, D, Q, s)")
        self.trend = trend
        self.method = method
        self.maxiter = maxiter
        validate_params(self, {"trend": trend, "method": method, "maxiter": maxiter})
        P, D, Q, s = self.seasonal
        if (P or D or Q) and s < 2:
            raise SpecificationError(
                f"{self.describe()}: seasonal orders {self.seasonal[:3]} need a period s >= 2; got s={s}. "
                "Give the season length, e.g. seasonal=(0, 1, 1, 12) for monthly data."
            )
        integration = self.order[1] + D
        for term in _TRENDS[trend]:
            if _TREND_ORDER[term] < integration:
                hint = " Use trend='t' for a drift." if term == "intercept" and integration == 1 else " Use trend='n'."
                raise SpecificationError(
                    f"{self.describe()}: the {term} (trend {trend!r}) is removed by the differencing "
                    f"(d + D = {integration}) and cannot be estimated.{hint}"
                )

    # -- description and protocol ---------------------------------------------------------
    def describe(self) -> str:
        """Short description, e.g. ``ARIMA(1,1,1)(0,1,1)7 with drift``."""
        p, d, q = self.order
        P, D, Q, s = self.seasonal
        text = f"ARIMA({p},{d},{q})" + (f"({P},{D},{Q}){s}" if P or D or Q else "")
        return text + _TREND_WORDS.get(self.trend, f" with trend {self.trend!r}")

    def param_names(self, exog_names: list[str] | None = None) -> list[str]:
        """``ar1.., ma1.., sar1.., sma1.., intercept, drift, x:<column>, sigma2``."""
        p, _, q = self.order
        P, _, Q, _ = self.seasonal
        names = [f"ar{i}" for i in range(1, p + 1)] + [f"ma{i}" for i in range(1, q + 1)]
        names += [f"sar{i}" for i in range(1, P + 1)] + [f"sma{i}" for i in range(1, Q + 1)]
        names += list(_TRENDS[self.trend]) + [f"x:{c}" for c in (exog_names or [])]
        return names + ["sigma2"]

    def n_dynamic_params(self) -> int:
        """``p + q + P + Q``."""
        p, _, q = self.order
        P, _, Q, _ = self.seasonal
        return p + q + P + Q

    def has_location(self) -> bool:
        """True when a trend regressor is constant after differencing (intercept, or drift with d + D = 1)."""
        integration = self.order[1] + self.seasonal[1]
        return any(_TREND_ORDER[t] == integration for t in _TRENDS[self.trend])

    def seasonal_period(self) -> int:
        """The seasonal period s, or 1 without seasonal terms."""
        return self.seasonal[3] if any(self.seasonal[:3]) else 1

    def min_length(self, n_exog: int = 0) -> int:
        """``d + sD + max(p*, q*) + k``: after differencing, the series must exceed the longest lag
        ``max(p + sP, q + sQ)`` by the number k of estimated parameters (``sigma2`` included)."""
        layout = _Coefficients(self)
        return self._lost() + max(layout.pstar, layout.qstar) + len(self.param_names([""] * n_exog))

    # -- estimation, errors, simulation ---------------------------------------------------
    def fit(self, y, exog=None, *, standard_errors: bool = True) -> FitResult:
        """Estimate the model on ``y`` (and ``exog``, a mapping ``{name: array}``).

        Returns
        -------
        FitResult
            ``params`` in :meth:`param_names` order, the exact (or conditional) log-likelihood,
            standardised one-step residuals aligned to ``y``, ``extras["bse"]`` standard errors
            (left out with ``standard_errors=False``).

        Raises
        ------
        InputError
            NaN/inf or constant series, bad exogenous columns, a series that the differencing and
            regressors explain exactly.
        InsufficientDataError
            Fewer than :meth:`min_length` observations.
        SpecificationError
            Regressors that vanish or are collinear after differencing.

        Warns
        -----
        ConvergenceWarning
            When the optimiser stops without converging (``fit.converged`` is then False).
        """
        data = self._prepare(y, exog, fitting=True)
        estimator = _Estimator(self, data)
        coefs, information, converged, message, evaluations = estimator.conditional_fit()
        if self.method == "exact" and coefs.size:
            coefs, converged, message, more = estimator.exact_fit(coefs, information)
            evaluations += more
        point = estimator.evaluate(coefs, self.method)
        names = self.param_names(data.exog_names)
        params = dict(zip(names, [float(v) for v in (*coefs, *(data.ols + point.beta), point.sigma2)]))
        beta = np.array([params[name] for name in names[coefs.size : -1]])
        aic, bic = information_criteria(point.loglik, len(params), point.nobs)
        if not converged:
            warnings.warn(
                ConvergenceWarning(
                    f"{self.describe()}: the optimiser did not converge ({message}); the estimates may not "
                    "maximise the likelihood. Check the series for level shifts or outliers, raise maxiter, "
                    "or lower the orders."
                ),
                stacklevel=2,
            )
        return FitResult(
            spec=copy.deepcopy(self),
            params=params,
            loglik=point.loglik,
            sigma2=point.sigma2,
            aic=aic,
            bic=bic,
            nobs=point.nobs,
            residuals=self._innovations(data, coefs, beta),
            converged=converged,
            message=message,
            iterations=evaluations,
            extras={
                **({"bse": estimator.standard_errors(coefs, point, names)} if standard_errors else {}),
                "method": self.method,
                "differenced_nobs": data.rows.shape[1],
            },
        )

    def errors(self, y, params: Mapping[str, float], exog=None) -> np.ndarray:
        """One-step errors of frozen parameters, aligned to ``y``.

        The standardised innovations ``v_t / sqrt(F_t)`` of the exact predictor (see the class
        Notes), NaN for the first ``d + sD`` positions; ``errors(y, fit.params, exog)`` reproduces
        ``fit.residuals``.

        Raises
        ------
        SpecificationError
            Parameters that do not match the spec, or that are not stationary/invertible.
        InputError, InsufficientDataError
            Bad or too short series (at least ``d + sD + 1`` values are needed).
        """
        data = self._prepare(y, exog, fitting=False)
        vec = self._check_params(params, data.exog_names)
        layout = _Coefficients(self)
        coefs, beta = vec[: layout.size], vec[layout.size : -1]
        layout.check_region(coefs, "computing one-step errors")
        return self._innovations(data, coefs, beta)

    def production_errors(self, y, params: Mapping[str, float], exog=None) -> np.ndarray:
        """One-step errors of frozen parameters on a new stretch of data.

        As :meth:`errors`, except for a drift without differencing (trend ``"t"``/``"ct"`` with
        d + D = 0): the drift regressor counts time from the first value passed in, so the stored
        intercept belongs to the origin of the original fit window.  There the intercept is
        re-estimated on ``y`` by least squares (the one-step errors are affine in it), every other
        parameter frozen.  (Trend ``"t"`` alone has no intercept to re-estimate: use ``"ct"`` for
        models audited on moving windows.)
        """
        d, D = self.order[1], self.seasonal[1]
        names = self.param_names([])
        if "drift" not in names or "intercept" not in names or d + D > 0:
            return self.errors(y, params, exog)
        base = dict(params)
        base["intercept"] = 0.0
        e0 = self.errors(y, base, exog)
        base["intercept"] = 1.0
        slope = self.errors(y, base, exog) - e0
        ok = ~np.isnan(e0)
        denom = float(slope[ok] @ slope[ok])
        base["intercept"] = -float(e0[ok] @ slope[ok]) / denom if denom > 0 else float(params.get("intercept", 0.0))
        return self.errors(y, base, exog)

    def simulate(
        self, params: Mapping[str, float], n: int, rng: np.random.Generator, exog=None, innovations=None
    ) -> np.ndarray:
        """Simulate ``n`` values of the model.

        The ARMA part of the differenced series starts in its stationary law (pre-sample values
        drawn from ``rng``, so no burn-in is needed), is driven by ``innovations`` (used as given)
        or by N(0, sigma2) draws, is integrated with zero pre-sample values, and the regression part
        ``x_t' beta`` (intercept, drift t = 1..n, exogenous inputs of length n) is added.

        Raises
        ------
        SpecificationError
            Parameters that do not match the spec, are not stationary/invertible, or sigma2 <= 0.
        InputError
            A bad length, exogenous inputs or innovations.
        """
        owner = self.describe()
        if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
            raise InputError(f"{owner}: simulate needs a positive integer length n; got {n!r}.")
        X, names = exog_matrix(exog, n, owner)
        vec = self._check_params(params, names)
        layout = _Coefficients(self)
        coefs, beta, sigma2 = vec[: layout.size], vec[layout.size : -1], vec[-1]
        layout.check_region(coefs, "a stationary simulation", moving_average=False)
        if not sigma2 > 0:
            raise SpecificationError(f"{owner}: sigma2 must be positive to simulate; got {sigma2!r}.")
        if innovations is None:
            shocks = rng.normal(0.0, math.sqrt(sigma2), size=n)
        else:
            shocks = np.asarray(innovations, dtype=float)
            if shocks.shape != (n,) or not np.isfinite(shocks).all():
                raise InputError(f"{owner}: innovations must be {n} finite values; got shape {shocks.shape}.")
        w = _arma.simulate_arma(*layout.polynomials(coefs), shocks, sigma2, rng)
        levels = _arma.integrate(w, self.order[1], self.seasonal[1], self.seasonal_period())
        return levels + self._regressors(n, X) @ beta

    # -- data preparation -----------------------------------------------------------------
    def _innovations(self, data: _Data, coefs: np.ndarray, beta: np.ndarray) -> np.ndarray:
        """Standardised one-step innovations of ``w = z - X beta``, aligned to the series."""
        layout = _Coefficients(self)
        w = data.rows[0] - beta @ data.rows[1:]
        system = _arma.ExactLikelihood(w[None, :], layout.r).system(*layout.polynomials(coefs))
        innovations = _arma.standardized_innovations(system, np.ones(1))
        return np.concatenate([np.full(data.lost, np.nan), innovations])

    def _lost(self) -> int:
        return self.order[1] + self.seasonal_period() * self.seasonal[1]

    def presample(self) -> int:
        """The d + D s observations lost to differencing."""
        return self._lost()

    def _prepare(self, y, exog, fitting: bool) -> _Data:
        owner = self.describe()
        y = check_series(y, owner)
        X, names = exog_matrix(exog, y.size, owner)
        need = self.min_length(len(names)) if fitting else self._lost() + 1
        if y.size < need:
            raise InsufficientDataError(
                f"{owner}: the series has {y.size} observations but the model needs at least {need}"
                + (f" ({self._lost()} are lost to differencing)" if self._lost() else "")
                + "; extend the fit window or choose lower orders."
            )
        levels = np.vstack([y, self._regressors(y.size, X).T])
        rows = _arma.difference(levels, self.order[1], self.seasonal[1], self.seasonal_period())
        ols = self._check_design(rows, names) if fitting else np.empty(0)
        return _Data(rows=rows, exog_names=names, lost=self._lost(), ols=ols)

    def _regressors(self, n: int, X: np.ndarray) -> np.ndarray:
        """Regressors in levels: intercept (1), drift (t = 1..n), then the exogenous columns."""
        t = np.arange(1.0, n + 1.0)
        cols = [np.ones(n) if term == "intercept" else t for term in _TRENDS[self.trend]]
        return np.column_stack(cols + [X]) if cols else X

    def _check_design(self, rows: np.ndarray, exog_names: list[str]) -> np.ndarray:
        """Reject regressors that vanish or are collinear after differencing, and noiseless series;
        return the least-squares coefficients of the differenced series on the regressors."""
        owner = self.describe()
        regressors = rows[1:]
        names = list(_TRENDS[self.trend]) + [f"x:{c}" for c in exog_names]
        resid, coef = rows[0], np.empty(0)
        if regressors.shape[0]:
            gram = regressors @ regressors.T
            scale = np.sqrt(np.diag(gram))
            flat = [name for name, norm in zip(names, scale) if norm == 0.0]
            chol, info = lapack.dpotrf(gram / np.outer(scale, scale), lower=1) if not flat else (None, 1)
            if info != 0 or np.min(np.diag(chol)) ** 2 < 1e-10:
                what = f"{flat} vanish" if flat else f"{names} are collinear"
                raise SpecificationError(
                    f"{owner}: after differencing the regressors {what}; drop the redundant exogenous "
                    "input(s) (a constant input duplicates the intercept or is removed by differencing)."
                )
            coef = lapack.dpotrs(chol, (regressors @ rows[0]) / scale, lower=1)[0] / scale
            resid = rows[0] - coef @ regressors
        if not np.any(np.abs(resid) > 1e-10 * np.max(np.abs(rows[0]))):
            raise InputError(
                f"{owner}: after differencing, the series is an exact function of the trend and exogenous "
                "inputs (no noise left to model); check the extract, lower d/D, or drop regressors."
            )
        return coef


class _Coefficients:
    """Bookkeeping of an :class:`Arima` spec's ARMA coefficient vector ``ar, ma, sar, sma``.

    Built once per fit or evaluation (the spec itself holds hyperparameters only).  Each block is
    a polynomial factor: AR factors ``1 - sum c_j B^{s j}``, MA factors ``1 + sum c_j B^{s j}``
    (s = 1 for the regular factors).
    """

    _LABELS = ("AR (ar*)", "MA (ma*)", "seasonal AR (sar*)", "seasonal MA (sma*)")

    def __init__(self, spec: Arima):
        p, _, q = spec.order
        P, _, Q, _ = spec.seasonal
        s = spec.seasonal_period()
        self.spec = spec
        self.pstar, self.qstar = p + s * P, q + s * Q
        self.r = max(self.pstar, self.qstar)
        self.blocks = []  # (slice, is_ma, period, label) of the non-empty blocks
        start = 0
        for size, is_ma, period, label in zip((p, q, P, Q), (False, True, False, True), (1, 1, s, s), self._LABELS):
            if size:
                self.blocks.append((slice(start, start + size), is_ma, period, label))
                start += size
        self.size = start

    def constrain(self, x: np.ndarray) -> np.ndarray:
        """Unconstrained vector to stationary AR / invertible MA coefficients (Monahan 1984)."""
        x = np.clip(x, -_MAX_UNCONSTRAINED, _MAX_UNCONSTRAINED)
        out = np.empty(self.size)
        for block, is_ma, _, _ in self.blocks:
            values = _arma.constrain_stationary(x[block])
            out[block] = -values if is_ma else values
        return out

    def unconstrain(self, coefs: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`constrain` for coefficients inside the region."""
        out = np.empty(self.size)
        for block, is_ma, _, _ in self.blocks:
            out[block] = _arma.unconstrain_stationary(-coefs[block] if is_ma else coefs[block])
        return np.clip(out, -_MAX_UNCONSTRAINED, _MAX_UNCONSTRAINED)

    def in_region(self, coefs: np.ndarray) -> bool:
        """True when every AR factor is stationary and every MA factor invertible."""
        return all(_arma.is_stationary(-coefs[block] if is_ma else coefs[block]) for block, is_ma, _, _ in self.blocks)

    def check_region(self, coefs: np.ndarray, action: str, moving_average: bool = True) -> None:
        """Raise :class:`SpecificationError`, naming the factor and the fix, outside the region
        (MA factors are checked only when ``moving_average``)."""
        for block, is_ma, _, label in self.blocks:
            if (moving_average or not is_ma) and not _arma.is_stationary(-coefs[block] if is_ma else coefs[block]):
                raise SpecificationError(
                    f"{self.spec.describe()}: the {label} coefficients {coefs[block].tolist()} are not "
                    f"{'invertible' if is_ma else 'stationary'} (a root lies on or inside the unit circle), "
                    f"so {action} is undefined. Refit the model to obtain a valid parameter version"
                    + ("." if is_ma else ", or add a difference (d or D) if the series has a unit root.")
                )

    def factors(self, coefs: np.ndarray) -> list[tuple[bool, np.ndarray, int, int]]:
        """``(is_ma, factor polynomial in B, period, count)`` per block (see :func:`_arma.css_jacobian`)."""
        out = []
        for block, is_ma, period, _ in self.blocks:
            values = coefs[block]
            poly = np.zeros(period * values.size + 1)
            poly[0] = 1.0
            poly[period::period] = values if is_ma else -values
            out.append((is_ma, poly, period, values.size))
        return out

    def polynomials(self, coefs: np.ndarray, factors: list | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Multiplied-out AR polynomial ``phi(B) Phi(B^s)`` and MA polynomial ``theta(B) Theta(B^s)``
        (``factors``: :meth:`factors` of ``coefs`` when already at hand)."""
        ar_poly = np.ones(1)
        ma_poly = np.ones(1)
        for is_ma, poly, _, _ in self.factors(coefs) if factors is None else factors:
            if is_ma:
                ma_poly = np.convolve(ma_poly, poly) if ma_poly.size > 1 else poly
            else:
                ar_poly = np.convolve(ar_poly, poly) if ar_poly.size > 1 else poly
        return ar_poly, ma_poly

    def transform_jacobian(self, x: np.ndarray) -> np.ndarray:
        """Forward-difference Jacobian ``d coefs / d x`` of :meth:`constrain` (block diagonal)."""
        base = self.constrain(x)
        jac = np.empty((self.size, self.size))
        for j in range(self.size):
            step = 1e-7 * max(1.0, abs(x[j]))
            shifted = x.copy()
            shifted[j] += step
            jac[:, j] = (self.constrain(shifted) - base) / step
        return jac


@dataclass(frozen=True)
class _Point:
    """The estimation criterion at given ARMA coefficients, beta (as a correction to least
    squares) and sigma2 profiled out."""

    loglik: float
    beta: np.ndarray
    sigma2: float
    nobs: int


class _Estimator:
    """Conditional (Gauss-Newton) and exact (BFGS) estimation for one prepared series."""

    def __init__(self, spec: Arima, data: _Data):
        self.spec = spec
        self.layout = _Coefficients(spec)
        # the regression is estimated as a correction to least squares: removing the OLS fit from
        # the series first keeps the quadratic forms free of cancellation (a trend's sum of squares
        # can exceed the residual one by many orders of magnitude)
        self.rows = data.rows.copy()
        self.rows[0] -= data.ols @ data.rows[1:]
        self.exact = _arma.ExactLikelihood(self.rows, self.layout.r)
        self.conditional = _arma.ConditionalLikelihood(self.rows, self.layout.pstar, self.layout.r)
        # pieces by (criterion, coefficient bytes): the optimiser's last point is evaluated again
        # for the estimates and the standard errors; a pure function of the bytes, so reusing it
        # changes no result
        self._memo: dict = {}

    # -- profiled criteria ----------------------------------------------------------------
    def _pieces(self, coefs: np.ndarray, criterion: str) -> tuple[np.ndarray, float, int]:
        """``(gram, logdet, nobs)`` of the exact or conditional criterion at ``coefs``."""
        key = (criterion, coefs.tobytes())
        found = self._memo.get(key)
        if found is not None:
            return found
        polynomials = self.layout.polynomials(coefs)
        if criterion == "exact":
            system = self.exact.system(*polynomials)
            found = system.gram, system.logdet, self.exact.nobs
        else:
            found = self.conditional.gram(*polynomials), 0.0, self.conditional.nobs
        self._memo[key] = found
        return found

    def evaluate(self, coefs: np.ndarray, criterion: str) -> _Point:
        """Log-likelihood, regression correction (to least squares) and sigma2 at ``coefs``."""
        gram, logdet, nobs = self._pieces(coefs, criterion)
        return _Point(*_profiled_loglik(gram, logdet, nobs), nobs)

    # -- conditional sum of squares: Gauss-Newton ------------------------------------------
    def _css_point(self, coefs: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
        """Conditional residual rows, profiled beta and sum of squares at ``coefs``."""
        resid_rows = self.conditional.residual_rows(*self.layout.polynomials(coefs))
        beta, q = _arma.profile_regression(resid_rows @ resid_rows.T)
        return resid_rows, beta, q

    def conditional_fit(self) -> tuple[np.ndarray, np.ndarray, bool, str, int]:
        """Minimise the conditional sum of squares by Levenberg-Marquardt from zero coefficients.

        Each step solves the damped linearised least-squares problem
        ``(J'J + lambda diag(J'J)) step = -J'e`` in the ARMA and regression coefficients jointly
        (analytic Jacobian, :func:`_arma.css_jacobian`); a step is accepted when it stays inside
        the stationary/invertible region and lowers the profiled sum of squares, and lambda is
        updated from the ratio of actual to predicted decrease (Nielsen's rule: Madsen, Nielsen
        and Tingleff 2004, "Methods for non-linear least squares problems", sect. 3.2).  The
        damping matters at the zero start, where AR and MA derivatives are nearly collinear, and
        along the ridge of near-cancelling AR and MA factors.  Stops when the relative
        decrease falls below 1e-10 (``method="css"``) or 1e-5 (when it only provides starting
        values for the exact likelihood), or when no damping gives a decrease.

        Returns
        -------
        coefs : ndarray
            ARMA coefficients.
        information : ndarray
            ``J'J / sigma2`` for the ARMA coefficients with the regression profiled out (the
            Gauss-Newton approximation of the information matrix).
        converged : bool
        message : str
        evaluations : int
            Sum-of-squares evaluations.
        """
        layout, pstar = self.layout, self.conditional.pstar
        tolerance = _CSS_TOLERANCE if self.spec.method == "css" else _START_TOLERANCE
        coefs = np.zeros(layout.size)
        resid_rows, beta, q = self._css_point(coefs)
        information = np.zeros((layout.size, layout.size))
        if not layout.size:
            return coefs, information, True, "no ARMA coefficients: closed-form least squares", 1
        evaluations, damping, growth = 1, 1e-3, 2.0

        def last_information() -> np.ndarray:  # J'J / sigma2 of the last linearisation
            return _schur_arma(normal, layout.size) / (q_normal / self.conditional.nobs)

        for iteration in range(1, self.spec.maxiter + 1):
            resid = resid_rows[0] - beta @ resid_rows[1:]
            w = self.rows[0] - beta @ self.rows[1:]
            factors = layout.factors(coefs)
            ma_poly = layout.polynomials(coefs, factors)[1]
            jac = np.vstack([_arma.css_jacobian(factors, ma_poly, w, resid, pstar), -resid_rows[1:]])
            normal = jac @ jac.T
            gradient = jac @ resid
            q_normal = q
            diagonal = normal.diagonal()
            scale = diagonal + 1e-12 * diagonal.max()
            while damping < 1e10:
                damped = normal.copy()
                damped.flat[:: normal.shape[0] + 1] += damping * scale
                chol, info = lapack.dpotrf(damped, lower=1, clean=1)
                step = -lapack.dpotrs(chol, gradient, lower=1)[0] if info == 0 else np.zeros_like(gradient)
                trial = coefs + step[: layout.size]
                if info == 0 and layout.in_region(trial):
                    trial_rows, trial_beta, trial_q = self._css_point(trial)
                    evaluations += 1
                    predicted = -(step @ gradient) - 0.5 * step @ normal @ step  # of SS / 2
                    if trial_q < q and predicted > 0:
                        gain_ratio = 0.5 * (q - trial_q) / predicted
                        damping *= max(1.0 / 3.0, 1.0 - (2.0 * gain_ratio - 1.0) ** 3)
                        growth = 2.0
                        break
                damping *= growth
                growth *= 2.0
            else:
                return (
                    coefs,
                    last_information(),
                    True,
                    f"css: converged ({iteration} iterations, no further decrease)",
                    evaluations,
                )
            decrease = (q - trial_q) / q
            coefs, resid_rows, beta, q = trial, trial_rows, trial_beta, trial_q
            if decrease < tolerance:
                return coefs, last_information(), True, f"css: converged ({iteration} iterations)", evaluations
        return coefs, last_information(), False, f"css: iteration limit {self.spec.maxiter} reached", evaluations

    # -- exact likelihood: BFGS on the transformed scale ----------------------------------
    def _objective(self, x: np.ndarray) -> float:
        """``-loglik / m`` at the constrained coefficients (inf where the algebra breaks down)."""
        try:
            return -_profiled_loglik(*self._pieces(self.layout.constrain(x), "exact"))[0] / self.exact.nobs
        except (np.linalg.LinAlgError, ValueError):
            return np.inf

    def _gradient(self, x: np.ndarray, f0: float) -> np.ndarray:
        """Forward-difference gradient of :meth:`_objective` at ``x`` (where it equals ``f0``)."""
        grad = np.empty(x.size)
        for i in range(x.size):
            step = _GRADIENT_STEP * max(1.0, abs(x[i]))
            shifted = x.copy()
            shifted[i] += step
            grad[i] = (self._objective(shifted) - f0) / step
        return grad

    def exact_fit(self, coefs0: np.ndarray, information: np.ndarray) -> tuple[np.ndarray, bool, str, int]:
        """Maximise the exact likelihood by BFGS on the transformed coefficients from ``coefs0``.

        Quasi-Newton iterations (Nocedal and Wright 2006, "Numerical Optimization", 2nd ed.,
        algorithm 6.1) with a backtracking line search: the step ``-H g`` is tried at full length
        and shortened by safeguarded quadratic interpolation (factor 0.1 to 0.5) until the
        sufficient-decrease condition ``f(x + a p) <= f(x) + 1e-4 a g'p`` holds (their
        algorithm 3.1 and sect. 3.5); trial points need no gradient, which is computed by forward
        differences only at accepted points.  The inverse Hessian ``H`` is updated by the BFGS
        formula (eq. 6.17) when the curvature ``s'y`` is positive and kept otherwise.  The
        initial ``H`` is the Gauss-Newton information carried to the transformed scale,
        ``m (T' I T)^{-1}`` with ``T`` the Jacobian of the transform.  The iterations stop when
        the largest gradient component of ``-loglik/m`` is below 1e-5, or when no step along the
        quasi-Newton direction lowers the objective (forward-difference gradients are noisy at
        the optimum), or after a full-length step whose log-likelihood gain, both predicted by the
        quasi-Newton model (``m g' H g / 2``) and achieved, is below 1e-5 (near the optimum BFGS
        converges superlinearly, so the gain left after such a step is far smaller still).
        Converged means the first or the last, or the gain still predicted at the last gradient
        below 1e-4.

        Returns
        -------
        coefs, converged, message, evaluations
        """
        m, size, maxiter = self.exact.nobs, self.layout.size, self.spec.maxiter
        x = self.layout.unconstrain(coefs0)
        jac = self.layout.transform_jacobian(x)
        identity = np.eye(size)
        hess_inv = _inverse_if_definite(jac.T @ information @ jac / m)
        if hess_inv is None:
            hess_inv = identity
        f = self._objective(x)
        evaluations = 1
        if not np.isfinite(f):
            return coefs0, False, "exact: the likelihood is not finite at the starting values", evaluations
        grad = self._gradient(x, f)
        evaluations += size
        message, stopped = f"exact: iteration limit {maxiter} reached", False
        for iteration in range(1, maxiter + 1):
            if not np.isfinite(grad).all():
                message = f"exact: stopped after {iteration - 1} iterations (the gradient is not finite)"
                break
            if np.max(np.abs(grad)) <= _GTOL:
                message, stopped = f"exact: converged ({iteration - 1} iterations, gradient below tolerance)", True
                break
            direction = -(hess_inv @ grad)
            slope = float(grad @ direction)
            if not slope < 0.0:  # not a descent direction: restart from steepest descent
                hess_inv = identity
                direction, slope = -grad, -float(grad @ grad)
            step, accepted = 1.0, False
            for _ in range(_LINE_SEARCH_STEPS):
                trial = x + step * direction
                f_trial = self._objective(trial)
                evaluations += 1
                if f_trial <= f + _ARMIJO * step * slope:
                    accepted = True
                    break
                if np.isfinite(f_trial):
                    curvature = f_trial - f - slope * step
                    guess = -slope * step * step / (2.0 * curvature) if curvature > 0 else 0.1 * step
                    step = min(max(guess, 0.1 * step), 0.5 * step)
                else:
                    step *= 0.1
            if not accepted:
                message = f"exact: stopped after {iteration - 1} iterations (no decrease along the search direction)"
                break
            if step == 1.0 and -0.5 * m * slope < _STEP_GAIN_TOLERANCE and m * (f - f_trial) < _STEP_GAIN_TOLERANCE:
                # a full quasi-Newton step whose predicted and actual gains are negligible ends at the
                # optimum (superlinear convergence): its gradient would only confirm it
                x, f = trial, f_trial
                message, stopped = f"exact: converged ({iteration} iterations, last step's gain below tolerance)", True
                break
            grad_trial = self._gradient(trial, f_trial)
            evaluations += size
            s, y = trial - x, grad_trial - grad
            sy = float(s @ y)
            if sy > 0.0:
                hy = hess_inv @ y
                rho = 1.0 / sy
                hess_inv = (
                    hess_inv
                    + ((sy + float(y @ hy)) * rho * rho) * np.outer(s, s)
                    - rho * (np.outer(hy, s) + np.outer(s, hy))
                )
            x, f, grad = trial, f_trial, grad_trial
        gain = 0.5 * m * float(grad @ hess_inv @ grad)
        converged = bool(stopped or (gain < _GAIN_TOLERANCE and iteration < maxiter))
        return self.layout.constrain(x), converged, message, evaluations

    # -- standard errors ------------------------------------------------------------------
    def standard_errors(self, coefs: np.ndarray, point: _Point, names: list[str]) -> dict:
        """Standard errors by name (see the :class:`Arima` Notes); NaN where the Hessian is unusable.

        The Hessian is taken of the log-likelihood with sigma2 concentrated out, as a function of
        the ARMA and regression coefficients jointly; its inverse is the corresponding block of
        the full inverse Hessian. Perturbing regression coefficients needs no new filtering (the
        reduced Gram matrix gives every quadratic form), so the cost is that of the ARMA block.
        """
        out = dict.fromkeys(names, math.nan)
        out["sigma2"] = point.sigma2 * math.sqrt(2.0 / point.nobs)
        n_arma = self.layout.size
        checked = set()

        def loglik(theta: np.ndarray) -> float:
            arma, beta = theta[:n_arma], theta[n_arma:]
            key = arma.tobytes()
            if key not in checked:
                if not self.layout.in_region(arma):
                    raise ValueError("outside the stationary/invertible region")
                checked.add(key)
            gram, logdet, nobs = self._pieces(arma, self.spec.method)
            c = _coef_vector(beta)
            q = float(c @ gram @ c)
            return _arma.profile_loglik(logdet, q, nobs)[0]

        theta = np.concatenate([coefs, point.beta])
        hessian = _forward_hessian(loglik, theta, self.layout, n_arma)
        cov = None if hessian is None else _inverse_if_definite(-hessian)
        if cov is not None:
            out.update(zip(names[:-1], np.sqrt(np.diag(cov)).tolist()))
        return out


# -- small helpers ----------------------------------------------------------------------------


def _coef_vector(beta: np.ndarray) -> np.ndarray:
    """``[1, -beta]``: the combination of the rows ``[z; X]`` that gives ``w = z - X beta``."""
    return np.concatenate(([1.0], -np.asarray(beta, dtype=float)))


def _profiled_loglik(gram: np.ndarray, logdet: float, nobs: int) -> tuple[float, np.ndarray, float]:
    """``(loglik, beta, sigma2)`` with beta (GLS) and sigma2 concentrated out."""
    beta, q = _arma.profile_regression(gram)
    if not q > 0:
        raise np.linalg.LinAlgError("zero residual sum of squares")
    loglik, sigma2 = _arma.profile_loglik(logdet, q, nobs)
    return loglik, beta, sigma2


def _inverse_if_definite(matrix: np.ndarray) -> np.ndarray | None:
    """Inverse of a symmetric positive definite matrix, or None when it is not definite."""
    chol, info = lapack.dpotrf(matrix, lower=1, clean=1)
    if info != 0:
        return None
    inverse = lapack.dpotrs(chol, np.eye(matrix.shape[0]), lower=1)[0]
    return 0.5 * (inverse + inverse.T)


def _schur_arma(normal: np.ndarray, n_arma: int) -> np.ndarray:
    """``A - B C^{-1} B'`` for ``normal = [[A, B], [B', C]]``: the regression block profiled out."""
    if normal.shape[0] == n_arma:
        return normal
    a, b, c = normal[:n_arma, :n_arma], normal[:n_arma, n_arma:], normal[n_arma:, n_arma:]
    chol, info = lapack.dpotrf(c, lower=1, clean=1)
    if info != 0:
        return a
    return a - b @ lapack.dpotrs(chol, b.T, lower=1)[0]


def _forward_hessian(func, x: np.ndarray, layout: _Coefficients, n_arma: int) -> np.ndarray | None:
    """Forward-difference Hessian of ``func`` at ``x`` (ARMA coefficients first, then others).

    ``H_ij = [f(x + h_i e_i + h_j e_j) - f(x + h_i e_i) - f(x + h_j e_j) + f(x)] / (h_i h_j)``,
    ``h_i = 1e-4 max(1, |x_i|)``; a step along an ARMA coordinate whose forward point leaves the
    stationary/invertible region is taken backwards.  Returns None when ``func`` fails (it raises
    ValueError outside the region, LinAlgError on singular algebra).
    """
    k = x.size
    h = _HESSIAN_STEP * np.maximum(1.0, np.abs(x))
    for i in range(n_arma):
        shifted = x[:n_arma].copy()
        shifted[i] += h[i]
        if not layout.in_region(shifted):
            h[i] = -h[i]
    steps = np.diag(h)
    try:
        f0 = func(x)
        single = [func(x + steps[i]) for i in range(k)]
        hess = np.empty((k, k))
        for i in range(k):
            for j in range(i, k):
                both = func(x + steps[i] + steps[j])
                hess[i, j] = hess[j, i] = (both - single[i] - single[j] + f0) / (h[i] * h[j])
    except (ValueError, np.linalg.LinAlgError):
        return None
    return hess


def _int_tuple(value, size: int, name: str, shape: str) -> tuple[int, ...]:
    """Normalise ``value`` to a tuple of ``size`` non-negative ints (lists from YAML accepted)."""
    try:
        items = tuple(value)
    except TypeError:
        items = ()
    valid = len(items) == size and all(
        isinstance(v, (int, np.integer)) and not isinstance(v, bool) and v >= 0 for v in items
    )
    if not valid:
        raise InputError(
            f"The {name!r} parameter of Arima must be {size} non-negative integers {shape}. Got {value!r} instead."
        )
    return tuple(int(v) for v in items)
