"""Nonlinear autoregression: a user-supplied mean function, or the built-in two-regime SETAR.

Both are conditional least-squares models of the form

    y_t = f(theta; y_{t-l_1}, ..., y_{t-l_L}, x_t) + e_t,    e_t ~ N(0, sigma2) independent,

fitted on t = t0 .. n-1 (t0 the largest lag, or the delay if larger), so the first t0 residuals
are undefined (NaN).  ``sigma2 = RSS / n_eff`` and the conditional Gaussian log-likelihood is
``-n_eff/2 (log(2 pi sigma2) + 1)``, n_eff = n - t0.

*User mean function* (``function="package.module:function"``): ``f(theta, lags, exog)`` with
theta a 1-D array in the order of ``start``, ``lags`` an (n, L) array whose column j holds
y_{t - lags[j]}, and ``exog`` an (n, k) array of the declared exogenous columns at time t; it
returns an (n,) array.  Estimated by nonlinear least squares (``scipy.optimize.least_squares``,
Levenberg-Marquardt) from the starting values.

*Importing the function runs code*: the module named in the path is imported with
:func:`importlib.import_module` (exactly that module, nothing else is searched or evaluated),
which executes its top-level code in the audit worker.  Register only modules you trust, as you
would any dependency.  Errors raised inside the function are re-raised as
:class:`SpecificationError` naming the function and the model, so an audit reports that model
as ``error`` and carries on.

*SETAR* (``function="setar"``): Tong's self-exciting threshold autoregression with two regimes
(Tong & Lim 1980; Tong 1990, section 3.3),

    y_t = c_1 + sum_l a_{1,l} y_{t-l} + e_t    if y_{t-d} <= r,
    y_t = c_2 + sum_l a_{2,l} y_{t-l} + e_t    otherwise,

with a common noise variance.  The delay d (1 .. max lag unless fixed) and the threshold r
(observed values of y_{t-d} between its ``trim`` and ``1 - trim`` quantiles) are chosen by grid
search for the smallest total residual sum of squares; the coefficients are least squares in
each regime.  The search is vectorised with cumulative cross-product matrices over the sorted
threshold variable (Hansen 1997, section 2).

References
----------
H. Tong and K. S. Lim (1980). Threshold autoregression, limit cycles and cyclical data.
*JRSS B* 42, 245-292.  H. Tong (1990). *Non-linear Time Series: A Dynamical System Approach*.
Oxford.  B. E. Hansen (1997). Inference in TAR models. *Studies in Nonlinear Dynamics and
Econometrics* 2(1).  V. Haggan and T. Ozaki (1981). Modelling nonlinear random vibrations using
an amplitude-dependent autoregressive time series model. *Biometrika* 68, 189-196.
"""

from __future__ import annotations

import dataclasses
import importlib
import math
import re
import warnings
from collections.abc import Callable, Mapping
from typing import Any

import numpy as np

from .._scipy import optimize
from .._validation import Interval, check_param
from ..exceptions import ConvergenceWarning, InputError, SpecificationError
from ._base import FitResult, ForecastModel, check_series, exog_matrix, information_criteria
from .registry import _register

__all__ = ["NonlinearAR", "resolve_function"]

#: Name of the built-in two-regime threshold autoregression.
SETAR = "setar"
#: Observations simulated and discarded before the returned ones when no presample is given.
BURN_IN = 100
#: Stand-in for non-finite residuals while searching (keeps the optimiser away from them).
_NONFINITE_PENALTY = 1e10

_IMPORT_PATH = re.compile(r"^[A-Za-z_][\w]*(\.[A-Za-z_][\w]*)*:[A-Za-z_][\w]*(\.[A-Za-z_][\w]*)*$")
_IDENTIFIER = re.compile(r"^[A-Za-z_][\w]*$")


def resolve_function(path: str, owner: str = "NonlinearAR") -> Callable:
    """Import the callable named by ``"package.module:function"`` (attribute path may be dotted).

    Parameters
    ----------
    path : str
        ``module:attribute``; exactly this module is imported (:func:`importlib.import_module`).
    owner : str
        Name used in error messages (the model's description).

    Returns
    -------
    callable

    Raises
    ------
    SpecificationError
        The module cannot be imported (the message gives the import error), importing it
        raised, the attribute does not exist (the message lists the module's public callables)
        or it is not callable.

    Notes
    -----
    Importing a module executes its top-level code; see the module notes.
    """
    module_name, _, attribute = path.partition(":")
    try:
        module = importlib.import_module(module_name)
    except ImportError as exc:
        raise SpecificationError(
            f"{owner}: cannot import module {module_name!r} named in function={path!r} ({exc}); install the "
            "package on the audit workers or correct the path."
        ) from exc
    except (Exception, SystemExit) as exc:  # the module's own top-level code failed (sys.exit included)
        raise SpecificationError(
            f"{owner}: importing module {module_name!r} (function={path!r}) raised {type(exc).__name__}: {exc}."
        ) from exc
    target: Any = module
    for part in attribute.split("."):
        if not hasattr(target, part):
            public = sorted(
                name for name, value in vars(module).items() if callable(value) and not name.startswith("_")
            )
            raise SpecificationError(
                f"{owner}: module {module_name!r} has no attribute {attribute!r} (function={path!r}); "
                f"its public callables are: {', '.join(public) or 'none'}."
            )
        target = getattr(target, part)
    if not callable(target):
        raise SpecificationError(f"{owner}: {path!r} is a {type(target).__name__}, not a function.")
    return target


@_register
class NonlinearAR(ForecastModel):
    """Nonlinear autoregression with a user mean function, or the built-in two-regime SETAR.

    Parameters
    ----------
    function : str
        ``"setar"`` for the built-in threshold autoregression, or an import path
        ``"package.module:function"`` of a mean function ``f(theta, lags, exog) -> (n,)``.
    lags : sequence of int
        The autoregressive lags (distinct, >= 1); column j of the lag matrix is y_{t - lags[j]}.
        For SETAR the same lags are used in both regimes.
    start : dict[str, float] or None
        User function only: starting values by parameter name; their order is the order of
        theta and of the parameters.
    exog : sequence of str or None
        User function only: names of the exogenous columns the function receives, in order.
    delay : int or None
        SETAR only: the delay d of the threshold variable y_{t-d}; None searches 1 .. max(lags).
    trim : float
        SETAR only: thresholds are searched between the ``trim`` and ``1 - trim`` quantiles of
        the threshold variable (default 0.15).

    Notes
    -----
    Parameters: the user's names then ``sigma2``; for SETAR ``c1, ar1_<lag>..., c2,
    ar2_<lag>..., threshold, delay, sigma2`` (regime 1 is ``y_{t-delay} <= threshold``).  All
    count in AIC/BIC, delay and threshold included.

    ``extras["bse"]`` holds standard errors from the Gauss-Newton covariance
    ``sigma2 (J'J)^-1`` (J the Jacobian of the mean function; for SETAR the regression matrices of
    the two regimes, given threshold and delay, whose own standard errors are not defined) and
    ``bse(sigma2) = sigma2 sqrt(2 / n_eff)``.

    :meth:`n_dynamic_params` returns the number of lags, the count a linear AR of the same lags
    would deduct from the Ljung-Box degrees of freedom; for nonlinear mean functions this is a
    convention, not an exact result.

    Examples
    --------
    >>> from fitaudit.core.models.nonlinear import NonlinearAR
    >>> NonlinearAR(function="setar", lags=(1, 2)).param_names()
    ['c1', 'ar1_1', 'ar1_2', 'c2', 'ar2_1', 'ar2_2', 'threshold', 'delay', 'sigma2']
    >>> NonlinearAR(function="mypkg.means:expar", lags=(1,), start={"a": 0.5, "b": 0.1, "g": 1.0}).param_names()
    ['a', 'b', 'g', 'sigma2']
    """

    family = "nonlinear-ar"
    _parameter_constraints = {
        "delay": [Interval(int, 1, None, closed="left"), None],
        "trim": [Interval(float, 0.0, 0.5, closed="neither")],
    }

    def __init__(self, function="setar", lags=(1,), start=None, exog=None, delay=None, trim=0.15):
        owner = "NonlinearAR"
        if not isinstance(function, str) or not (function == SETAR or _IMPORT_PATH.match(function)):
            raise SpecificationError(
                f"{owner}: function must be 'setar' or an import path 'package.module:function'; got {function!r}."
            )
        lags = _check_lags(lags, owner)
        check_param(owner, "delay", delay, *self._parameter_constraints["delay"])
        check_param(owner, "trim", trim, *self._parameter_constraints["trim"])
        if function == SETAR:
            if start:
                raise SpecificationError(f"{owner}: SETAR estimates its own coefficients; drop start={start!r}.")
            if exog:
                raise SpecificationError(f"{owner}: SETAR takes no exogenous inputs; drop exog={exog!r}.")
            start, exog = None, None
        else:
            if delay is not None or trim != 0.15:
                raise SpecificationError(
                    f"{owner}: delay and trim apply to function='setar' only; drop them for {function!r}."
                )
            start = _check_start(start, function, owner)
            exog = _check_exog_names(exog, owner)
        self.function = function
        self.lags = lags
        self.start = start
        self.exog = exog
        self.delay = delay
        self.trim = float(trim)

    # -- description ------------------------------------------------------------------------
    @property
    def is_setar(self) -> bool:
        """True for the built-in threshold autoregression."""
        return self.function == SETAR

    def describe(self) -> str:
        """E.g. ``SETAR(2; lags 1,2; delay search)`` or ``NLAR[pkg.mod:f] lags 1,2``."""
        lags = ",".join(map(str, self.lags))
        if self.is_setar:
            return f"SETAR(2; lags {lags}; delay {self.delay or 'search'})"
        return f"NLAR[{self.function}] lags {lags}" + (f" exog {','.join(self.exog)}" if self.exog else "")

    def n_dynamic_params(self) -> int:
        """The number of lags (see the class notes)."""
        return len(self.lags)

    def param_names(self, exog_names: list[str] | None = None) -> list[str]:
        """User names then ``sigma2``; for SETAR ``c1, ar1_<lag>.., c2, ar2_<lag>.., threshold, delay, sigma2``."""
        if self.is_setar:
            regimes = [[f"c{r}"] + [f"ar{r}_{lag}" for lag in self.lags] for r in (1, 2)]
            return regimes[0] + regimes[1] + ["threshold", "delay", "sigma2"]
        return list(self.start) + ["sigma2"]

    def presample(self) -> int:
        """The observations before the first one with all lags available."""
        return self._origin()

    def _origin(self, delay: int | None = None) -> int:
        """First index with all lags (and the threshold variable) available."""
        return max(max(self.lags), delay or self.delay or 0)

    def min_length(self, n_exog: int = 0) -> int:
        """User function: four more usable observations than parameters.  SETAR: enough usable
        observations that each trimmed regime holds at least three more than its coefficients."""
        if self.is_setar:
            return self._origin() + math.ceil((len(self.lags) + 4) / self.trim)
        return self._origin() + len(self.start) + 4

    # -- data ----------------------------------------------------------------------------------
    def _lag_matrix(self, y: np.ndarray, origin: int) -> np.ndarray:
        n = y.size
        return np.column_stack([y[origin - lag : n - lag] for lag in self.lags])

    def _exog(self, exog, n: int) -> np.ndarray:
        """The declared exogenous columns, in declared order, as an (n, k) array."""
        if not self.exog:
            if exog is not None:
                raise SpecificationError(
                    f"{self.describe()}: the spec declares no exogenous inputs but exog was given; add "
                    "exog=[<column names>] to the spec or drop them."
                )
            return np.empty((n, 0))
        if exog is None:
            raise SpecificationError(
                f"{self.describe()}: the spec needs exogenous columns {list(self.exog)}; pass exog."
            )
        X, names = exog_matrix(exog, n, self.describe())
        missing = [name for name in self.exog if name not in names]
        if missing:
            raise SpecificationError(f"{self.describe()}: exogenous column(s) {missing} missing; got {names}.")
        return X[:, [names.index(name) for name in self.exog]]

    # -- the user mean function ------------------------------------------------------------------
    def _mean_function(self) -> Callable:
        return resolve_function(self.function, self.describe())

    def _call(self, f: Callable, theta: np.ndarray, lags: np.ndarray, X: np.ndarray) -> np.ndarray:
        """f(theta, lags, exog) with the user's errors contained and the output checked."""
        try:
            with np.errstate(all="ignore"):  # non-finite output is checked by the callers
                out = np.asarray(f(theta, lags, X), dtype=float)
        except (Exception, SystemExit) as exc:  # user code: any failure, sys.exit included, is this model's error
            raise SpecificationError(
                f"{self.describe()}: the mean function {self.function!r} raised {type(exc).__name__}: {exc}. "
                f"It is called as f(theta, lags, exog) with theta of length {theta.size}, lags of shape "
                f"{lags.shape} and exog of shape {X.shape}; fix the function or the spec."
            ) from exc
        if out.shape != (lags.shape[0],):
            raise SpecificationError(
                f"{self.describe()}: the mean function {self.function!r} returned shape {out.shape}; expected "
                f"({lags.shape[0]},), one value per row of lags."
            )
        return out

    # -- protocol ------------------------------------------------------------------------------
    def errors(self, y, params: Mapping[str, float], exog=None) -> np.ndarray:
        """One-step errors ``y_t - f(theta; lags, x_t)`` of frozen parameters; NaN before the first usable t.

        Parameters
        ----------
        y : array_like, shape (n,)
        params : mapping
            Exactly :meth:`param_names`.
        exog : mapping or array_like, optional
            The declared exogenous columns (user function only).

        Returns
        -------
        ndarray, shape (n,)

        Raises
        ------
        SpecificationError
            Parameters that do not match, a failing user function, or non-finite predictions.
        """
        vec = self._check_params(params, [])
        delay = self._delay_from(params) if self.is_setar else None
        origin = self._origin(delay)
        y = check_series(y, self.describe(), origin + 1)
        if self.is_setar:
            if exog is not None:
                raise SpecificationError(f"{self.describe()}: SETAR takes no exogenous inputs; drop exog.")
            e = _setar_errors(y, vec, self.lags, delay, origin)
        else:
            X = self._exog(exog, y.size)[origin:]
            e = np.full(y.size, np.nan)
            e[origin:] = y[origin:] - self._call(self._mean_function(), vec[:-1], self._lag_matrix(y, origin), X)
        if not np.isfinite(e[origin:]).all():
            raise SpecificationError(f"{self.describe()}: the predictions are not finite at parameters {dict(params)}.")
        return e

    def _delay_from(self, params: Mapping[str, float]) -> int:
        d = float(params["delay"])
        if d != round(d) or d < 1:
            raise SpecificationError(f"{self.describe()}: delay must be a positive integer; got {d!r}.")
        if self.delay is not None and int(d) != self.delay:
            raise SpecificationError(
                f"{self.describe()}: the parameters have delay {int(d)} but the spec fixes {self.delay}."
            )
        return int(d)

    def fit(self, y, exog=None, *, standard_errors: bool = True) -> FitResult:
        """Conditional least squares (user function) or the SETAR grid search (see the module notes).

        Parameters
        ----------
        y : array_like, shape (n,)
            Finite, not constant, at least :meth:`min_length` long.
        exog : mapping or array_like, optional
            The declared exogenous columns (user function only).

        Returns
        -------
        FitResult
            With ``extras["bse"]`` (a by-product of the fit; left out with ``standard_errors=False``);
            SETAR adds ``extras["regime_sizes"]``.

        Raises
        ------
        SpecificationError
            A failing or misbehaving user function, or non-finite values at the starting values.
        InsufficientDataError
            Too short for the lags (and, for SETAR, the trimmed regimes).

        Warns
        -----
        ConvergenceWarning
            When the least-squares search stops without meeting its tolerances.
        """
        y = check_series(y, self.describe(), self.min_length())
        if self.is_setar:
            if exog is not None:
                raise SpecificationError(f"{self.describe()}: SETAR takes no exogenous inputs; drop exog.")
            fit = self._fit_setar(y)
        else:
            fit = self._fit_user(y, exog)
        if not standard_errors:  # a by-product of both fits, left out for the same contract as the other families
            fit = dataclasses.replace(fit, extras={k: v for k, v in fit.extras.items() if k != "bse"})
        return fit

    def _fit_user(self, y: np.ndarray, exog) -> FitResult:
        origin = self._origin()
        X = self._exog(exog, y.size)[origin:]
        lags = self._lag_matrix(y, origin)
        target = y[origin:]
        f = self._mean_function()
        theta0 = np.array(list(self.start.values()), dtype=float)
        first = target - self._call(f, theta0, lags, X)
        if not np.isfinite(first).all():
            raise SpecificationError(
                f"{self.describe()}: the mean function returns NaN or infinite values at the starting values "
                f"{self.start}; choose other starting values."
            )

        def residuals(theta: np.ndarray) -> np.ndarray:
            r = target - self._call(f, theta, lags, X)
            return np.where(np.isfinite(r), r, _NONFINITE_PENALTY)

        res = optimize.least_squares(
            residuals, theta0, method="lm", xtol=1e-14, ftol=1e-14, gtol=1e-14, max_nfev=200 * (theta0.size + 1)
        )
        theta = res.x
        names = list(self.start)
        params = dict(zip(names, map(float, theta)))
        e = np.full(y.size, np.nan)
        e[origin:] = target - self._call(f, theta, lags, X)
        n_eff = target.size
        sigma2 = float(np.mean(e[origin:] ** 2))
        bse = _gauss_newton_bse(res.jac, sigma2, names, n_eff)
        converged = bool(res.success)
        if not converged:
            warnings.warn(
                f"{self.describe()}: nonlinear least squares stopped without converging ({res.message}); try other "
                "starting values.",
                ConvergenceWarning,
                stacklevel=3,
            )
        return self._result(
            params | {"sigma2": sigma2}, e, n_eff, converged, str(res.message), int(res.nfev), {"bse": bse}
        )

    def _fit_setar(self, y: np.ndarray) -> FitResult:
        delays = [self.delay] if self.delay else list(range(1, max(self.lags) + 1))
        origin = self._origin(max(delays))
        lags = self._lag_matrix(y, origin)
        search = _threshold_search(y, lags, delays, origin, self.trim)
        if search is None:
            raise InputError(
                f"{self.describe()}: no threshold between the {self.trim:g} and {1 - self.trim:g} quantiles leaves "
                f"both regimes with at least {len(self.lags) + 4} observations (too many tied values?); use a "
                "smaller trim or a longer series."
            )
        delay, threshold = search
        vec, bse_coef, sizes = _setar_coefficients(y, lags, delay, threshold, origin, self.lags)
        vec = np.concatenate([vec, [threshold, float(delay), 0.0]])
        e = _setar_errors(y, vec, self.lags, delay, origin)
        n_eff = y.size - origin
        sigma2 = float(np.mean(e[origin:] ** 2))
        names = self.param_names()
        params = {name: float(v) for name, v in zip(names[:-1], vec)} | {"sigma2": sigma2}
        bse = {name: float(np.sqrt(sigma2) * b) for name, b in zip(names, bse_coef)}
        bse["sigma2"] = sigma2 * math.sqrt(2.0 / n_eff)
        extras = {"bse": bse, "regime_sizes": sizes}
        return self._result(params, e, n_eff, True, "grid search over delay and threshold", 0, extras)

    def _result(self, params, e, n_eff, converged, message, iterations, extras) -> FitResult:
        sigma2 = params["sigma2"]
        if not sigma2 > 0:
            raise SpecificationError(
                f"{self.describe()}: the fit is exact (zero residuals); the series is deterministic."
            )
        loglik = -0.5 * n_eff * (math.log(2.0 * math.pi * sigma2) + 1.0)
        aic, bic = information_criteria(loglik, len(params), n_eff)
        return FitResult(
            spec=NonlinearAR(**self.get_params()),
            params=params,
            loglik=loglik,
            sigma2=sigma2,
            aic=aic,
            bic=bic,
            nobs=n_eff,
            residuals=e,
            converged=converged,
            message=message,
            iterations=iterations,
            extras=extras,
        )

    def simulate(
        self,
        params: Mapping[str, float],
        n: int,
        rng: np.random.Generator,
        exog=None,
        innovations=None,
        *,
        burn: int = BURN_IN,
    ) -> np.ndarray:
        """Simulate n observations after ``burn`` discarded ones started from zeros.

        Parameters
        ----------
        params : mapping
            Exactly :meth:`param_names`.
        n : int
        rng : numpy.random.Generator
            Draws the N(0, sigma2) burn-in innovations, and the others unless given.
        exog : mapping or array_like, optional
            The declared exogenous columns for the n returned observations; the burn-in repeats
            their first row.
        innovations : array_like, shape (n,), optional
            Innovations of the returned observations, used as given.
        burn : int
            Discarded start-up observations (default :data:`BURN_IN`).

        Returns
        -------
        ndarray, shape (n,)

        Notes
        -----
        The recursion calls the mean function once per time point (one row at a time).
        """
        vec = self._check_params(params, [])
        if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
            raise InputError(
                f"{self.describe()}: the number of observations to simulate must be a positive integer; got {n!r}."
            )
        sigma = math.sqrt(vec[-1]) if vec[-1] > 0 else 0.0
        if innovations is None:
            if not vec[-1] > 0:
                raise SpecificationError(f"{self.describe()}: sigma2 must be positive to draw innovations.")
            e = rng.normal(0.0, sigma, n)
        else:
            e = np.asarray(innovations, dtype=float)
            if e.shape != (n,) or not np.isfinite(e).all():
                raise InputError(f"{self.describe()}: innovations must be {n} finite values; got shape {e.shape}.")
        shocks = np.concatenate([rng.normal(0.0, sigma, burn), e])
        if self.is_setar:
            if exog is not None:
                raise SpecificationError(f"{self.describe()}: SETAR takes no exogenous inputs; drop exog.")
            path = _simulate_setar(vec, self.lags, self._delay_from(params), shocks)
        else:
            X = self._exog(exog, n)
            X = np.concatenate([np.repeat(X[:1], burn, axis=0), X]) if X.shape[1] else np.empty((burn + n, 0))
            path = self._simulate_user(vec[:-1], shocks, X)
        if not np.isfinite(path).all():
            raise SpecificationError(f"{self.describe()}: the simulated path diverges at parameters {dict(params)}.")
        return path[-n:]

    def _simulate_user(self, theta: np.ndarray, shocks: np.ndarray, X: np.ndarray) -> np.ndarray:
        f = self._mean_function()
        origin = max(self.lags)
        lags = np.array(self.lags)
        path = np.zeros(origin + shocks.size)
        for t in range(shocks.size):  # the recursion needs each value before the next
            row = path[origin + t - lags][None, :]
            path[origin + t] = self._call(f, theta, row, X[t : t + 1])[0] + shocks[t]
        return path[origin:]


# -- SETAR helpers -------------------------------------------------------------------------------
def _threshold_search(y: np.ndarray, lags: np.ndarray, delays: list[int], origin: int, trim: float):
    """(delay, threshold) with the smallest total RSS, or None when no candidate is admissible.

    For each delay the observations are sorted by the threshold variable z = y_{t-d}; cumulative
    sums of x x', x y and y^2 give both regimes' normal equations at every split at once, and
    RSS = y'y - b'(X'X)^-1 b for each.  The series is centred first (the intercepts absorb it),
    which keeps that difference accurate.
    """
    n = y.size
    yc = y - y.mean()
    X = np.column_stack([np.ones(n - origin), lags - y.mean()])
    target = yc[origin:]
    k = X.shape[1]
    minimum = k + 3
    best = None
    for d in delays:  # at most max(lags) delays
        z = y[origin - d : n - d]
        order = np.argsort(z, kind="stable")
        zs, Xs, ys = z[order], X[order], target[order]
        XX = np.cumsum(Xs[:, :, None] * Xs[:, None, :], axis=0)
        Xy = np.cumsum(Xs * ys[:, None], axis=0)
        yy = np.cumsum(ys * ys)
        low, high = np.quantile(z, [trim, 1.0 - trim])
        split = np.arange(zs.size - 1)  # regime 1 = sorted positions 0..split
        ok = (zs[:-1] < zs[1:]) & (zs[:-1] >= low) & (zs[:-1] <= high)
        ok &= (split + 1 >= minimum) & (zs.size - split - 1 >= minimum)
        split = split[ok]
        if split.size == 0:
            continue
        rss = _regime_rss(XX[split], Xy[split], yy[split]) + _regime_rss(
            XX[-1] - XX[split], Xy[-1] - Xy[split], yy[-1] - yy[split]
        )
        i = int(np.argmin(rss))
        if best is None or rss[i] < best[0]:
            best = (rss[i], d, float(zs[split[i]]))
    return None if best is None else best[1:]


def _regime_rss(XX: np.ndarray, Xy: np.ndarray, yy: np.ndarray) -> np.ndarray:
    """Least-squares RSS y'y - b'(X'X)^-1 b for a stack of normal equations."""
    try:
        coef = np.linalg.solve(XX, Xy[:, :, None])[:, :, 0]
    except np.linalg.LinAlgError:
        coef = (np.linalg.pinv(XX) @ Xy[:, :, None])[:, :, 0]
    return yy - np.einsum("ij,ij->i", coef, Xy)


def _setar_coefficients(y, lags, delay, threshold, origin, lag_list):
    """Per-regime least squares: (c1, ar1.., c2, ar2..), their unit-variance standard errors, sizes."""
    n = y.size
    z = y[origin - delay : n - delay]
    X = np.column_stack([np.ones(n - origin), lags])
    target = y[origin:]
    coefs, scales, sizes = [], [], []
    for mask in (z <= threshold, z > threshold):
        Xr, yr = X[mask], target[mask]
        coef, *_ = np.linalg.lstsq(Xr, yr, rcond=None)
        coefs.append(coef)
        scales.append(np.sqrt(np.diag(np.linalg.pinv(Xr.T @ Xr))))
        sizes.append(int(mask.sum()))
    return np.concatenate(coefs), np.concatenate(scales), sizes


def _setar_errors(y: np.ndarray, vec: np.ndarray, lag_list: tuple, delay: int, origin: int) -> np.ndarray:
    k = len(lag_list) + 1
    n = y.size
    X = np.column_stack([np.ones(n - origin)] + [y[origin - lag : n - lag] for lag in lag_list])
    upper = y[origin - delay : n - delay] > vec[2 * k]
    prediction = np.where(upper, X @ vec[k : 2 * k], X @ vec[:k])
    e = np.full(n, np.nan)
    e[origin:] = y[origin:] - prediction
    return e


def _simulate_setar(vec: np.ndarray, lag_list: tuple, delay: int, shocks: np.ndarray) -> np.ndarray:
    k = len(lag_list) + 1
    lower, upper, threshold = vec[:k], vec[k : 2 * k], vec[2 * k]
    origin = max(max(lag_list), delay)
    lags = np.array(lag_list)
    path = np.zeros(origin + shocks.size)
    for t in range(origin, path.size):  # the recursion needs each value before the next
        coef = lower if path[t - delay] <= threshold else upper
        path[t] = coef[0] + coef[1:] @ path[t - lags] + shocks[t - origin]
    return path[origin:]


# -- validation helpers ------------------------------------------------------------------------------
def _gauss_newton_bse(jac: np.ndarray, sigma2: float, names: list[str], n_eff: int) -> dict[str, float]:
    """sqrt(diag(sigma2 (J'J)^-1)) by name, plus bse(sigma2) = sigma2 sqrt(2 / n_eff)."""
    with np.errstate(invalid="ignore"):
        bse = np.sqrt(np.diag(sigma2 * np.linalg.pinv(jac.T @ jac)))
    out = {name: float(b) for name, b in zip(names, bse)}
    out["sigma2"] = sigma2 * math.sqrt(2.0 / n_eff)
    return out


def _check_lags(lags, owner: str) -> tuple[int, ...]:
    try:
        values = tuple(int(lag) for lag in lags)
    except (TypeError, ValueError):
        raise SpecificationError(f"{owner}: lags must be a sequence of positive integers; got {lags!r}.") from None
    if (
        not values
        or any(v < 1 for v in values)
        or len(set(values)) != len(values)
        or any(float(a) != b for a, b in zip(lags, values))
    ):
        raise SpecificationError(f"{owner}: lags must be distinct positive integers, e.g. (1, 2); got {lags!r}.")
    return values


def _check_start(start, function: str, owner: str) -> dict[str, float]:
    if not isinstance(start, Mapping) or not start:
        raise SpecificationError(
            f"{owner}: function={function!r} needs start={{name: value, ...}}, the starting values of its parameters "
            "in the order the function reads theta."
        )
    out = {}
    for name, value in start.items():
        if not isinstance(name, str) or not _IDENTIFIER.match(name) or name == "sigma2":
            raise SpecificationError(
                f"{owner}: parameter name {name!r} in start must be an identifier other than 'sigma2'."
            )
        try:
            value = float(value)
        except (TypeError, ValueError):
            raise SpecificationError(f"{owner}: start[{name!r}] must be a number; got {value!r}.") from None
        if not math.isfinite(value):
            raise SpecificationError(f"{owner}: start[{name!r}] must be finite; got {value!r}.")
        out[name] = value
    return out


def _check_exog_names(exog, owner: str) -> tuple[str, ...] | None:
    if exog is None:
        return None
    if isinstance(exog, str) or not all(isinstance(name, str) for name in exog):
        raise SpecificationError(f"{owner}: exog must be a list of column names; got {exog!r}.")
    return tuple(exog) or None
