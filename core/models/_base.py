"""The protocol every forecasting model family follows, and the fit result.

A model *spec* stores hyperparameters only (orders, trend, seasonality, ...).  Fitting never
mutates it: ``spec.fit(y, exog)`` returns a new frozen :class:`FitResult` that carries a copy of
the spec, the estimated parameters and the one-step innovations, so an audit always shows exactly
what was fitted.  ``spec.errors(y, params, exog)`` runs *given* (frozen, production) parameters
over a series; ``spec.simulate(params, n, rng, ...)`` draws a series for bootstrap calibration.

Exogenous inputs are passed as a mapping ``{column name: 1-D array}`` (or a 2-D array, whose
columns are then named ``x0, x1, ...``); regression parameters are named ``x:<column>``.
"""

from __future__ import annotations

import abc
import copy
import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from ..exceptions import InputError, SpecificationError

__all__ = ["FitResult", "ForecastModel", "exog_matrix", "check_series"]


@dataclass(frozen=True)
class FitResult:
    """Result of fitting a model spec to a series.

    Attributes
    ----------
    spec : ForecastModel
        A copy of the spec that was fitted.
    params : dict[str, float]
        Estimated parameters by name (``sigma2`` included).
    loglik : float
        Maximised Gaussian log-likelihood (the family's convention; see its docstring).
    sigma2 : float
        Innovation variance.
    aic, bic : float
        ``-2 loglik + 2 k`` and ``-2 loglik + k log(nobs)``, k = number of estimated parameters
        (including sigma2).
    nobs : int
        Number of observations entering the likelihood (after differencing / lags).
    residuals : ndarray
        One-step innovations aligned to the input series; NaN where undefined.
    converged : bool
        Whether the optimiser met its convergence criterion.
    message : str
        The optimiser's message.
    iterations : int
        Function evaluations (or iterations) used.
    """

    spec: ForecastModel
    params: dict
    loglik: float
    sigma2: float
    aic: float
    bic: float
    nobs: int
    residuals: np.ndarray
    converged: bool
    message: str = ""
    iterations: int = 0
    extras: dict = field(default_factory=dict)

    @property
    def family(self) -> str:
        """Family name of the fitted spec (``arima``, ``smoothing``, ``nonlinear-ar``)."""
        return self.spec.family

    @property
    def n_params(self) -> int:
        """Number of estimated parameters, sigma2 included."""
        return len(self.params)

    def to_dict(self) -> dict:
        """Plain-Python view without the residual array (use ``residuals`` for that)."""
        return {
            "family": self.family,
            "spec": self.spec.to_dict(),
            "params": {k: float(v) for k, v in self.params.items()},
            "loglik": float(self.loglik),
            "sigma2": float(self.sigma2),
            "aic": float(self.aic),
            "bic": float(self.bic),
            "nobs": int(self.nobs),
            "converged": bool(self.converged),
            "message": str(self.message),
            "iterations": int(self.iterations),
        }


def information_criteria(loglik: float, k: int, nobs: int) -> tuple[float, float]:
    """AIC = -2 loglik + 2k and BIC = -2 loglik + k log(nobs)."""
    return -2.0 * loglik + 2.0 * k, -2.0 * loglik + k * math.log(max(nobs, 1))


def exog_matrix(exog: Any, n: int, owner: str) -> tuple[np.ndarray, list[str]]:
    """Normalise exogenous inputs to an (n, k) float array and their names.

    ``exog`` may be None, a mapping of column name to 1-D array, or a 1-D/2-D array.
    Raises :class:`InputError` on wrong length or non-finite values, naming the column.
    """
    if exog is None:
        return np.empty((n, 0)), []
    if isinstance(exog, Mapping):
        names = [str(k) for k in exog]
        cols = []
        for name in names:
            col = np.asarray(exog[name], dtype=float)
            if col.ndim != 1 or col.shape[0] != n:
                raise InputError(
                    f"{owner}: exogenous column {name!r} has shape {col.shape}, expected ({n},) "
                    "to match the series; align the extract's exogenous columns with the target."
                )
            cols.append(col)
        X = np.column_stack(cols) if cols else np.empty((n, 0))
    else:
        X = np.asarray(exog, dtype=float)
        if X.ndim == 1:
            X = X[:, None]
        if X.ndim != 2 or X.shape[0] != n:
            raise InputError(f"{owner}: exog has shape {X.shape}, expected ({n}, k) to match the series.")
        names = [f"x{i}" for i in range(X.shape[1])]
    bad = ~np.isfinite(X)
    if bad.any():
        rows, cols = np.nonzero(bad)
        raise InputError(
            f"{owner}: exogenous column {names[cols[0]]!r} has {int(bad.sum())} missing or non-finite "
            f"value(s), first at position {int(rows[0])}; fill them in the extract or drop the input."
        )
    return X, names


def check_series(y: Any, owner: str, min_length: int = 1) -> np.ndarray:
    """Validate a target series: 1-D, finite, long enough, not constant.

    Raises :class:`InputError` (non-finite values, wrong shape, constant series) or
    :class:`~fitaudit.core.exceptions.InsufficientDataError` (too short), naming the fix.
    """
    from ..exceptions import InsufficientDataError

    a = np.asarray(y, dtype=float)
    if a.ndim != 1:
        raise InputError(f"{owner}: the series must be 1-D; got shape {a.shape}.")
    bad = ~np.isfinite(a)
    if bad.any():
        idx = np.nonzero(bad)[0]
        raise InputError(
            f"{owner}: the series has {idx.size} NaN or infinite value(s), first at position {int(idx[0])}; "
            "impute or remove them in the extract before auditing."
        )
    if a.size < min_length:
        raise InsufficientDataError(
            f"{owner}: the series has {a.size} observations but the model needs at least {min_length}; "
            "extend the fit window or choose lower orders."
        )
    if a.size > 1 and np.ptp(a) == 0.0:
        raise InputError(
            f"{owner}: the series is constant ({a[0]:g}); a stochastic model cannot be fitted. "
            "Check the extract, or register this series with a deterministic rule instead."
        )
    return a


class ForecastModel(abc.ABC):
    """Base class of model specs (ARIMA, exponential smoothing, nonlinear autoregression).

    Subclasses define ``family`` and implement the protocol below. ``__init__`` only stores
    keyword hyperparameters (scikit-learn's rule); validation happens there too, and fitted
    state never lives on the spec.
    """

    family: ClassVar[str] = ""
    _parameter_constraints: ClassVar[dict] = {}

    # -- protocol -------------------------------------------------------------------------
    @abc.abstractmethod
    def param_names(self, exog_names: list[str] | None = None) -> list[str]:
        """Names of the parameters, ``sigma2`` last."""

    @abc.abstractmethod
    def fit(self, y, exog=None, *, standard_errors: bool = True) -> FitResult:
        """Estimate the parameters on ``y`` (and ``exog``); returns a new :class:`FitResult`.

        ``standard_errors=False`` leaves ``extras["bse"]`` out: the audit reads only the estimates,
        the likelihood and the residuals, and for some families the standard errors (a numerical
        Hessian) cost a third of the fit.
        """

    @abc.abstractmethod
    def errors(self, y, params: Mapping[str, float], exog=None) -> np.ndarray:
        """One-step-ahead forecast errors of the given parameters, aligned to ``y`` (NaN where undefined)."""

    def production_errors(self, y, params: Mapping[str, float], exog=None) -> np.ndarray:
        """One-step errors of frozen production parameters on a new stretch of data.

        Equal to :meth:`errors` for families whose parameters hold no initial states (ARIMA with
        its exact initialisation, nonlinear autoregressions).  Families whose parameters include
        initial states tied to the origin of the original fit window override this: the states
        are re-estimated on ``y`` with every other parameter frozen.
        """
        return self.errors(y, params, exog)

    @abc.abstractmethod
    def simulate(
        self, params: Mapping[str, float], n: int, rng: np.random.Generator, exog=None, innovations=None
    ) -> np.ndarray:
        """Simulate ``n`` observations from the model with the given parameters.

        ``innovations`` (length ``n``, standardised or not: they are used as the one-step
        innovations as given) replace Gaussian draws with variance ``sigma2`` when supplied.
        """

    @abc.abstractmethod
    def min_length(self, n_exog: int = 0) -> int:
        """Smallest series length for which a fit is attempted."""

    def n_dynamic_params(self) -> int:
        """Number of ARMA-type dynamic coefficients (degrees of freedom for Ljung-Box)."""
        return 0

    def presample(self) -> int:
        """Leading observations that get no residual (lost to differencing or lags)."""
        return 0

    def has_location(self) -> bool:
        """True when the model estimates a level/intercept (the residual mean is then not free)."""
        return True

    def seasonal_period(self) -> int:
        """Seasonal period m (1 when non-seasonal); sets the Ljung-Box lag."""
        return 1

    # -- conveniences ---------------------------------------------------------------------
    def get_params(self) -> dict:
        """The hyperparameters as a dict (the spec's identity)."""
        return {k: copy.deepcopy(v) for k, v in vars(self).items() if not k.startswith("_")}

    def to_dict(self) -> dict:
        """``{"family": ..., **hyperparameters}`` with tuples as lists (JSON-ready)."""

        def plain(v):
            if isinstance(v, tuple):
                return [plain(x) for x in v]
            return v

        return {"family": self.family, **{k: plain(v) for k, v in self.get_params().items()}}

    def describe(self) -> str:
        """A short human-readable description, e.g. ``ARIMA(1,1,1)(0,1,1)7 with drift``."""
        return f"{self.family}({', '.join(f'{k}={v!r}' for k, v in self.get_params().items())})"

    def __repr__(self) -> str:
        return f"{type(self).__name__}({', '.join(f'{k}={v!r}' for k, v in self.get_params().items())})"

    def __eq__(self, other: object) -> bool:
        return type(self) is type(other) and self.get_params() == other.get_params()

    def __hash__(self) -> int:
        return hash((type(self).__name__, repr(sorted(self.to_dict().items()))))

    def _check_params(self, params: Mapping[str, float], exog_names: list[str]) -> np.ndarray:
        """Vector of parameters in ``param_names`` order; errors name missing/extra keys."""
        names = self.param_names(exog_names)
        missing = [n for n in names if n not in params]
        extra = [k for k in params if k not in names]
        if missing or extra:
            raise SpecificationError(
                f"{self.describe()}: parameters do not match the spec"
                + (f"; missing {missing}" if missing else "")
                + (f"; unexpected {extra}" if extra else "")
                + f". Expected exactly {names} (was the parameter version made for another spec?)."
            )
        vec = np.array([float(params[n]) for n in names])
        if not np.isfinite(vec).all():
            raise SpecificationError(f"{self.describe()}: parameters contain NaN or infinite values: {dict(params)}.")
        return vec
