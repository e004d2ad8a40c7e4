"""Noise laws: the assumed distribution of a model's standardised innovations.

Continuous laws are location-scale families ``F(x; loc, scale, shape) = F0((x - loc) / scale; shape)``:

=============  ==========================  ===========================  =========================
law            standard density f0(z)      variance of the standard law  shape
=============  ==========================  ===========================  =========================
``normal``     exp(-z^2/2) / sqrt(2 pi)    1                             --
``student-t``  t density with nu d.f.      nu / (nu - 2)                 nu = df > 2
``laplace``    exp(-|z|) / 2               2                             --
``logistic``   e^-z / (1 + e^-z)^2         pi^2 / 3                      --
=============  ==========================  ===========================  =========================

Count laws work with a predictive mean ``mu_t`` per time point: ``poisson`` (variance mu) and
``negative-binomial`` (NB2: variance ``mu + mu^2 / size``, shape = size).

Each law estimates its parameters by maximum likelihood from residuals (the location only when the
model's intercept or mean makes it effectively estimated, docs/method.md §8.2), supplies the per-observation
Fisher information of the estimated parameters and the derivatives of equiprobable-cell probabilities
(both needed by the Nikulin-Rao-Robson correction, docs/method.md §5.4), and simulates.  Count laws supply
the randomised probability integral transform of docs/method.md §6.2.

References
----------
.. [1] K. L. Lange, R. J. A. Little and J. M. G. Taylor, "Robust statistical modeling using the t
       distribution", JASA 84, 1989, p. 881 (Fisher information of the t; from memory).
.. [2] C. Liu and D. B. Rubin, "ML estimation of the t distribution using EM and its extensions,
       ECM and ECME", Statistica Sinica 5, 1995, p. 19 (from memory).
.. [3] N. L. Johnson, S. Kotz and N. Balakrishnan, "Continuous Univariate Distributions", vol. 2,
       2nd ed., Wiley 1995, chapters 23 (logistic) and 24 (Laplace) (from memory).
.. [4] P. K. Dunn and G. K. Smyth, "Randomized quantile residuals", J. Comput. Graph. Statist. 5,
       1996, p. 236; C. Czado, T. Gneiting and L. Held, "Predictive model assessment for count
       data", Biometrics 65, 2009, p. 1254 (both from memory).
.. [5] A. C. Cameron and P. K. Trivedi, "Regression Analysis of Count Data", 2nd ed., Cambridge
       2013, section 3.3 (NB2; from memory).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from ._scipy import integrate, special
from .cells import CountsBelow, count_below_rows
from .exceptions import ConvergenceWarning, InputError, InsufficientDataError, SpecificationError

__all__ = [
    "NOISE_LAWS",
    "PARAMETER_NAMES",
    "STUDENT_T_DF_BOUNDS",
    "NB_SIZE_BOUNDS",
    "NoiseParams",
    "NoiseLaw",
    "NormalLaw",
    "StudentTLaw",
    "LaplaceLaw",
    "LogisticLaw",
    "PoissonLaw",
    "NegativeBinomialLaw",
    "get_law",
    "as_noise_law",
]

#: Names of the noise parameters, in the order used by ``NoiseParams.estimated``, Fisher
#: information matrices and cell-probability gradients.
PARAMETER_NAMES: tuple[str, str, str] = ("loc", "scale", "shape")

#: Range searched by the maximum-likelihood estimate of the student-t degrees of freedom.
STUDENT_T_DF_BOUNDS: tuple[float, float] = (2.1, 200.0)

#: Range searched by the maximum-likelihood estimate of the negative-binomial size.
NB_SIZE_BOUNDS: tuple[float, float] = (1e-3, 1e6)

_NEWTON_MAX_ITER = 100  # Newton iterations per row
_NEWTON_STEP_TOL = 1e-10  # convergence: largest step in standardised units
#: convergence: Newton decrement per observation below which the predicted increase (half the
#: decrement) is lost in the rounding of the n-term log-likelihood sum (about n x 1e-16 per unit)
_NEWTON_DECREMENT_TOL = 1e-14
_MAX_HALVINGS = 40  # backtracking steps per Newton iteration
_ARMIJO = 1e-4  # sufficient-increase constant of the line search


# --------------------------------------------------------------------------------------------
# Parameters
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class NoiseParams:
    """Parameters of a noise law, fitted or frozen.

    Parameters
    ----------
    law : str
        Name of the noise law (a key of :data:`NOISE_LAWS`).
    loc, scale : float
        Location and scale of a continuous law (``x = loc + scale * z``).  Count laws take their
        mean per time point from the model and store ``loc = 0`` and ``scale = 1``.
    shape : float or None
        Student-t degrees of freedom or negative-binomial size; None for laws without a shape.
    estimated : tuple of str
        Which of ``("loc", "scale", "shape")`` were estimated from the data, in that order; ``()``
        for frozen production parameters.
    """

    law: str
    loc: float
    scale: float
    shape: float | None
    estimated: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        object.__setattr__(self, "loc", float(self.loc))
        object.__setattr__(self, "scale", float(self.scale))
        if self.shape is not None:
            object.__setattr__(self, "shape", float(self.shape))
        estimated = tuple(self.estimated)
        object.__setattr__(self, "estimated", estimated)
        if not (math.isfinite(self.loc) and math.isfinite(self.scale) and self.scale > 0):
            raise InputError(
                f"NoiseParams for the {self.law!r} law need a finite loc and a finite positive scale; "
                f"got loc={self.loc!r}, scale={self.scale!r}."
            )
        if self.shape is not None and not (math.isfinite(self.shape) and self.shape > 0):
            raise InputError(
                f"NoiseParams for the {self.law!r} law: shape must be finite and positive; got {self.shape!r}."
            )
        order = [PARAMETER_NAMES.index(e) if e in PARAMETER_NAMES else -1 for e in estimated]
        if -1 in order or order != sorted(set(order)):
            raise InputError(
                f"NoiseParams.estimated must list distinct names from {PARAMETER_NAMES} in that order; got "
                f"{estimated!r}."
            )
        if "shape" in estimated and self.shape is None:
            raise InputError(f"NoiseParams for the {self.law!r} law list 'shape' as estimated but carry no shape.")

    def to_dict(self) -> dict:
        """Plain-Python form: ``{"law", "loc", "scale", "shape", "estimated"}``."""
        return {
            "law": self.law,
            "loc": self.loc,
            "scale": self.scale,
            "shape": self.shape,
            "estimated": list(self.estimated),
        }


# --------------------------------------------------------------------------------------------
# Input checks
# --------------------------------------------------------------------------------------------
def _as_rows(x, owner: str, name: str) -> np.ndarray:
    """A finite float array of shape (R, n) (a 1-D input becomes one row)."""
    try:
        a = np.array(x, dtype=float, ndmin=1)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{owner}: {name!r} must be numeric; {exc}.") from None
    if a.ndim == 1:
        a = a[None, :]
    if a.ndim != 2 or a.shape[1] == 0:
        raise InputError(
            f"{owner}: {name!r} must be a non-empty 1-D series or a 2-D array (replicates, n); got shape {a.shape}."
        )
    bad = ~np.isfinite(a)
    if bad.any():
        first = np.argwhere(bad)[0].tolist()
        raise InputError(
            f"{owner}: {name!r} contains {int(bad.sum())} NaN or infinite value(s) (first at {first}); "
            "drop the positions outside the fit window before fitting the noise law."
        )
    return a


def _as_counts(y, owner: str) -> np.ndarray:
    try:
        a = np.array(y, dtype=float, ndmin=1)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{owner}: the counts must be numeric; {exc}.") from None
    if a.size == 0:
        raise InputError(f"{owner}: the counts are empty.")
    bad = ~np.isfinite(a) | (a < 0) | (a != np.round(a))
    if bad.any():
        raise InputError(
            f"{owner}: counts must be finite non-negative integers; got values such as {a[bad][:3].tolist()}."
        )
    return a


def _as_means(mean, shape: tuple[int, ...], owner: str) -> np.ndarray:
    try:
        m = np.asarray(mean, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{owner}: the predictive means must be numeric; {exc}.") from None
    try:
        m = np.broadcast_to(m, shape)
    except ValueError:
        raise InputError(
            f"{owner}: the predictive means have shape {m.shape}, which does not match the counts' shape {shape}."
        ) from None
    if not np.isfinite(m).all() or (m <= 0).any():
        raise InputError(f"{owner}: predictive means must be finite and positive; the smallest is {np.min(m)!r}.")
    return m


def _check_rng(rng, owner: str) -> np.random.Generator:
    if not isinstance(rng, np.random.Generator):
        raise InputError(
            f"{owner}: rng must be a numpy.random.Generator (np.random.default_rng(seed)); got {type(rng).__name__}."
        )
    return rng


# --------------------------------------------------------------------------------------------
# Batched Newton ascent with box bounds (used by the logistic and student-t fits)
# --------------------------------------------------------------------------------------------
def _newton_ascent(loglik, data: np.ndarray, theta0: np.ndarray, lower: np.ndarray, upper: np.ndarray):
    """Maximise ``loglik`` separately for every row by projected Newton steps.

    ``loglik(theta (r, k), data (r, n), derivatives)`` returns the log-likelihood (r,) and, when
    ``derivatives`` is true, also its gradient (r, k) and Hessian (r, k, k).  Each iteration takes
    the Newton direction of the Hessian with its eigenvalues replaced by their absolute values
    (floored), so the direction always ascends; components at a bound whose gradient points
    outward are held fixed; an Armijo backtracking search guarantees an increase.  A row stops
    when its step falls below ``_NEWTON_STEP_TOL`` or its Newton decrement ``g' H^-1 g`` (twice the
    increase the quadratic model predicts) below ``_NEWTON_DECREMENT_TOL * n``, the rounding level
    of the log-likelihood: a line search there compares values equal to rounding and would only
    halve its step until it gives up (the Newton decrement stopping rule, Boyd and Vandenberghe
    2004, *Convex Optimization*, sec. 9.5.1).  Rows stop independently, so a row's result does not
    depend on the other rows.

    The first trial point of each line search is evaluated with the derivatives: most steps take
    it, and then its gradient and Hessian are the next iteration's, which saves the separate
    value-only evaluation per iteration (a row whose step was halved gets its derivatives afresh;
    the same numbers either way, since a row's value does not depend on the other rows).

    Returns
    -------
    theta : ndarray (R, k)
    converged : ndarray of bool (R,)
    """
    theta = theta0.copy()
    n = data.shape[1]
    converged = np.zeros(len(theta), dtype=bool)
    todo = np.arange(len(theta))
    eye = np.eye(theta.shape[1], dtype=bool)
    y = data  # the rows of `todo`, gathered again only when some of them stop
    known = None  # (value, gradient, Hessian, whether computed) at theta[todo], from the last line search
    for _ in range(_NEWTON_MAX_ITER):
        if todo.size == 0:
            break
        th = theta[todo]
        if known is None:
            ll, grad, hess = loglik(th, y, True)
        else:
            ll, grad, hess, have = known
            if not have.all():
                miss = np.flatnonzero(~have)
                ll[miss], grad[miss], hess[miss] = loglik(th[miss], y[miss], True)
        frozen = ((th <= lower) & (grad < 0)) | ((th >= upper) & (grad > 0))
        grad = np.where(frozen, 0.0, grad)
        coupled = ~(frozen[:, :, None] | frozen[:, None, :])
        curvature = np.where(coupled, -hess, np.where(eye, 1.0, 0.0))
        evals, evecs = np.linalg.eigh(curvature)
        evals = np.abs(evals)
        evals = np.maximum(evals, 1e-8 * evals.max(axis=1, keepdims=True) + 1e-12)
        coef = np.einsum("rji,rj->ri", evecs, grad) / evals
        direction = np.einsum("rij,rj->ri", evecs, coef)
        decrement = np.einsum("ri,ri->r", grad, direction)
        flat = decrement <= _NEWTON_DECREMENT_TOL * n  # at the maximum to rounding: stop without a search

        new_th = th.copy()
        step = np.ones(len(todo))
        pending = ~flat
        next_ll, next_grad, next_hess = np.empty_like(ll), np.empty_like(grad), np.empty_like(hess)
        have = np.zeros(len(todo), dtype=bool)
        for trial in range(_MAX_HALVINGS):
            idx = np.flatnonzero(pending)
            if idx.size == 0:
                break
            cand = np.clip(th[idx] + step[idx, None] * direction[idx], lower, upper)
            rows = y if idx.size == len(y) else y[idx]
            with np.errstate(all="ignore"):
                if trial == 0:  # the full step, which most rows take: with its derivatives
                    ll_cand, grad_cand, hess_cand = loglik(cand, rows, True)
                else:
                    ll_cand = loglik(cand, rows, False)
            ok = ll_cand >= ll[idx] + _ARMIJO * step[idx] * decrement[idx]
            if trial == 0:
                taken = idx[ok]
                next_ll[taken], next_grad[taken], next_hess[taken] = ll_cand[ok], grad_cand[ok], hess_cand[ok]
                have[taken] = True
            new_th[idx[ok]] = cand[ok]
            pending[idx[ok]] = False
            step[idx[~ok]] *= 0.5
        moved = np.max(np.abs(new_th - th), axis=1)
        small_step = ~pending & (moved <= _NEWTON_STEP_TOL)
        # no acceptable step: the attainable increase is below rounding if the decrement is tiny
        stalled = pending
        theta[todo] = new_th
        done = small_step | stalled | flat
        converged[todo[small_step | flat]] = True
        converged[todo[stalled & (decrement <= 1e-6 * n)]] = True
        known = (next_ll, next_grad, next_hess, have)
        if done.any():
            keep = ~done
            todo, y = todo[keep], y[keep]
            known = tuple(a[keep] for a in known)
    return theta, converged


# --------------------------------------------------------------------------------------------
# The base class
# --------------------------------------------------------------------------------------------
class NoiseLaw:
    """A noise law: the distribution assumed for a model's standardised innovations.

    Parameters
    ----------
    shape : float, optional
        A fixed shape (student-t degrees of freedom, negative-binomial size); None means the shape
        is estimated from the data.  Laws without a shape accept only None.

    Attributes
    ----------
    name : str
        Registry name (a key of :data:`NOISE_LAWS`).
    discrete : bool
        True for count laws (``poisson``, ``negative-binomial``); descriptive only: callers use the
        protocol below and the capability flags, never this attribute, to decide what to do.
    has_shape : bool
        Whether the law has a shape parameter.
    shape : float or None
        The fixed shape, or None.
    pivotal : bool
        The PIT of residuals whose noise parameters were re-estimated has a null distribution that
        does not depend on the true parameters, simulated from standard draws refitted by the same
        estimator (:func:`fitaudit.core.calibration.refit_table`, the parametric bootstrap).  False
        for count laws, whose law depends on a predictive mean per time point.
    has_fisher_information : bool
        The per-observation Fisher information and the cell-probability gradients exist (the
        Nikulin-Rao-Robson term, docs/method.md §5.4).  False for count laws: their cells are
        cells of the randomised PIT, whose probabilities do not move with the parameters in the
        way the term assumes.
    iid_errors : bool
        The one-step errors of a correct model with frozen parameters are identically distributed,
        so the Ljung-Box statistic of the errors has a null simulated from i.i.d. draws and a split
        scan of their PIT values locates a change (:func:`fitaudit.core.change.locate_change`).
        False for count laws, whose error variance follows the mean.

    Notes
    -----
    **The protocol.**  Every law implements the methods callers need, with one signature, in terms
    of the one-step errors ``e_t = y_t - mean_t`` (``y`` the observations, ``mean`` the model's
    one-step forecasts):

    ``fit_errors(errors, location, y=None)``
        maximum-likelihood noise parameters from the errors (count laws: given the means);
    ``frozen_params(production, errors, y=None)``
        the parameters of a frozen production version (variance ``sigma2`` and stored shape);
    ``pit(errors, params, rng=None, y=None)``
        probability integral transform: ``F((e - loc) / scale)`` for location-scale laws, the
        randomised PIT of docs/method.md §6.2 for count laws;
    ``simulate(mean, rng, params)``
        observations with the given one-step means;
    ``check_observations(y, label)``
        refuse observations the law cannot describe (non-counts under a count law);
    ``standardise(errors, params)``, ``reference_quantiles(probs, params)``,
    ``reference_density(z, params)``
        the report's residual histogram and Q-Q plot;
    ``estimated_names(location)``, ``n_estimated(location)``
        the estimated parameters.

    The errors are passed, and the observations only where a law needs them, so callers use
    the errors they have as they are (no round trip through ``y - (y - e)``).  Location-scale
    laws add ``fit``, ``fit_batch``, ``from_variance``, ``cdf``, ``cdf_batch``, ``ppf``,
    ``logpdf``, ``pdf``, ``sample``, ``sample_standard``, ``fisher_information``,
    ``cell_probabilities`` and ``cell_probability_gradient``; count laws add ``fit_counts``,
    ``fit_counts_batch``, ``randomized_pit``, ``sample_counts`` and ``logpmf``.  Asking a law
    for a method of the other kind raises :class:`SpecificationError` (also an
    ``AttributeError``, so ``hasattr`` answers False).
    """

    name: ClassVar[str] = ""
    kind: ClassVar[str] = ""
    discrete: ClassVar[bool] = False
    has_shape: ClassVar[bool] = False
    pivotal: ClassVar[bool] = False
    has_fisher_information: ClassVar[bool] = False
    iid_errors: ClassVar[bool] = False
    #: Methods only one kind of law has, and the hint given when the other kind is asked for them.
    _KIND_METHODS: ClassVar[dict[str, tuple[str, ...]]] = {
        "continuous location-scale": (
            "fit",
            "fit_batch",
            "from_variance",
            "cdf",
            "cdf_batch",
            "ppf",
            "logpdf",
            "pdf",
            "sample",
            "sample_standard",
            "fisher_information",
            "cell_probabilities",
            "cell_probability_gradient",
        ),
        "count": ("fit_counts", "fit_counts_batch", "randomized_pit", "sample_counts", "logpmf"),
    }

    def __init__(self, shape: float | None = None):
        if shape is not None:
            if not self.has_shape:
                raise InputError(f"The {self.name!r} noise law has no shape parameter; got shape={shape!r}. Omit it.")
            shape = self._check_shape(shape)
        self.shape = shape

    # -- identity ----------------------------------------------------------------------------
    def __repr__(self) -> str:
        return f"get_law({self.name!r}, shape={self.shape!r})"

    def __eq__(self, other) -> bool:
        return isinstance(other, NoiseLaw) and (self.name, self.shape) == (other.name, other.shape)

    def __hash__(self) -> int:
        return hash((self.name, self.shape))

    def __getattr__(self, method: str):
        # only reached for names the law does not have: explain the methods of the other kind
        for kind, methods in NoiseLaw._KIND_METHODS.items():
            if method in methods and kind != self.kind:
                hint = ", ".join(methods)
                raise _WrongKindError(
                    f"{method} does not apply to the {self.name!r} noise law, a {self.kind} law; {kind} laws use "
                    f"{hint}. Every law has fit_errors, frozen_params, pit and simulate."
                )
        raise AttributeError(f"{type(self).__name__!r} object has no attribute {method!r}")

    def _check_shape(self, shape) -> float:
        raise NotImplementedError  # laws with a shape override this

    # -- estimated parameters ----------------------------------------------------------------
    def estimated_names(self, location: bool = True) -> tuple[str, ...]:
        """Names of the parameters estimated from the data, in :data:`PARAMETER_NAMES` order.

        Continuous laws: ``loc`` when ``location`` is true, always ``scale``, and ``shape`` when the
        law has one and it is not fixed.  Count laws: ``loc`` when ``location`` is true (the level
        of the predictive mean is fitted, e.g. an intercept) and ``shape`` when the
        negative-binomial size is estimated.
        """
        names = ["loc"] if location else []
        names.extend(self._free_scale)
        if self.has_shape and self.shape is None:
            names.append("shape")
        return tuple(names)

    _free_scale: ClassVar[tuple[str, ...]] = ()

    def n_estimated(self, location: bool) -> int:
        """k, the number of noise parameters estimated from the residuals (docs/method.md §8.2).

        Parameters
        ----------
        location : bool
            Whether the location counts as estimated (the model has an intercept or mean).

        Returns
        -------
        int
            ``len(self.estimated_names(location))``.
        """
        return len(self.estimated_names(location))

    @property
    def needs_stored_shape(self) -> bool:
        """True when frozen parameters of this law need a stored shape.

        A location-scale law whose shape is estimated (student-t without fixed degrees of freedom)
        takes its scale from the production variance and cannot estimate a shape without
        refitting, so the production version must store it; a count law estimates a missing
        negative-binomial size from the audit window given the predictive means.
        """
        return False

    # -- guards ------------------------------------------------------------------------------
    def _check_params(self, params: NoiseParams, owner: str) -> NoiseParams:
        if not isinstance(params, NoiseParams):
            raise InputError(f"{self.name} {owner}: params must be NoiseParams; got {type(params).__name__}.")
        if params.law != self.name:
            raise InputError(f"{self.name} {owner}: params belong to the {params.law!r} law, not {self.name!r}.")
        if self.has_shape:
            if params.shape is None:
                raise InputError(f"{self.name} {owner}: params carry no shape; the {self.name!r} law needs one.")
            self._check_shape(params.shape)
        elif params.shape is not None:
            raise InputError(
                f"{self.name} {owner}: the {self.name!r} law has no shape; params carry shape={params.shape!r}."
            )
        return params

    # -- the protocol every law implements ---------------------------------------------------
    def fit_errors(self, errors, location: bool = True, *, y=None) -> NoiseParams:
        """Maximum-likelihood noise parameters from one-step errors.

        Parameters
        ----------
        errors : array_like, 1-D
            Finite one-step errors ``e_t = y_t - mean_t``.
        location : bool, default True
            Whether the location counts as estimated (the model has an intercept or mean).
        y : array_like, 1-D, optional
            The observations; count laws need them (the means are ``y - errors``).

        Returns
        -------
        NoiseParams
            With ``estimated`` naming what was estimated; ``len(estimated)`` is the k of the
            number-of-cells rule (docs/method.md §8.2).
        """
        raise NotImplementedError

    def frozen_params(
        self, production: Mapping[str, float], errors=None, *, y=None, label: str | None = None
    ) -> NoiseParams:
        """Noise parameters of a frozen production version, nothing re-estimated that it fixes.

        Location-scale laws: the law with the version's innovation variance ``production["sigma2"]``
        (:meth:`from_variance`).  Count laws: the law with means ``y - errors``; a negative-binomial
        size that is not fixed is estimated on the window given the means.

        Parameters
        ----------
        production : mapping of str to float
            The production version's parameters.
        errors : array_like, 1-D
            The audit window's one-step errors.
        y : array_like, 1-D, optional
            The window's observations (count laws).
        label : str, optional
            The model's name, for messages.

        Returns
        -------
        NoiseParams
        """
        raise NotImplementedError

    def pit(self, errors, params: NoiseParams, rng: np.random.Generator | None = None, *, y=None) -> np.ndarray:
        """Probability integral transform of one-step errors under the law (docs/method.md §6).

        Location-scale laws: ``u_t = F0((e_t - loc) / scale; shape)``, i.i.d. U(0, 1) under the
        law; ``rng`` and ``y`` are not used.  Count laws: the randomised PIT
        ``u_t = F_t(y_t - 1) + V_t P_t(Y = y_t)`` with means ``y - errors`` [4]_, exactly
        i.i.d. U(0, 1) under the law.

        Parameters
        ----------
        errors : array_like
            One-step errors.
        params : NoiseParams
        rng : numpy.random.Generator, optional
            Seeded generator (count laws).
        y : array_like, optional
            The observations (count laws).

        Returns
        -------
        ndarray
            Values in [0, 1], shaped like ``errors``.
        """
        raise NotImplementedError

    def simulate(self, mean, rng: np.random.Generator, params: NoiseParams) -> np.ndarray:
        """Observations ``y_t`` with one-step means ``mean_t`` drawn from the law.

        Location-scale laws: ``mean_t + loc + scale Z_t``; count laws: counts with mean ``mean_t``.

        Parameters
        ----------
        mean : array_like
            One-step means (positive for count laws), any shape.
        rng : numpy.random.Generator
        params : NoiseParams

        Returns
        -------
        ndarray of float
            Shaped like ``mean``.
        """
        raise NotImplementedError

    def check_observations(self, y: np.ndarray, label: str) -> None:
        """Raise :class:`InputError`, naming ``label`` and the fix, for observations the law
        cannot describe (count laws: values that are not non-negative integers)."""

    def standardise(self, errors, params: NoiseParams) -> np.ndarray:
        """Errors on the scale of the standard law, for the report's histogram and Q-Q plot.

        Location-scale laws: ``(e - loc) / scale``; count laws: ``e / sd(e)`` (1 when the
        errors are constant).
        """
        raise NotImplementedError

    def reference_quantiles(self, probs, params: NoiseParams) -> np.ndarray:
        """Quantiles of the reference law of :meth:`standardise` at ``probs`` (the Q-Q plot)."""
        raise NotImplementedError

    def reference_density(self, z, params: NoiseParams) -> np.ndarray | None:
        """Density of the reference law of :meth:`standardise` at ``z``; None when there is none."""
        return None


class _WrongKindError(SpecificationError, AttributeError):
    """A method of the other kind of law (a location-scale method asked of a count law, or back)."""


# --------------------------------------------------------------------------------------------
# Continuous location-scale laws
# --------------------------------------------------------------------------------------------
class _LocationScaleLaw(NoiseLaw):
    """Shared machinery of the location-scale laws ``F0((x - loc) / scale; shape)``.

    Subclasses supply the standard law (``_std_cdf``, ``_std_ppf``, ``_std_logpdf``,
    ``_std_variance``, ``_std_fisher``, ``_draw_standard``) and the estimator ``_fit_rows``.
    """

    kind = "continuous location-scale"
    pivotal = True
    has_fisher_information = True
    iid_errors = True
    _free_scale = ("scale",)

    # -- the protocol (see NoiseLaw) ---------------------------------------------------------
    @property
    def needs_stored_shape(self) -> bool:
        """True for a law whose shape is estimated (see :attr:`NoiseLaw.needs_stored_shape`)."""
        return self.has_shape and self.shape is None

    def fit_errors(self, errors, location: bool = True, *, y=None) -> NoiseParams:
        """:meth:`fit` of the errors (``y`` is not used); see :meth:`NoiseLaw.fit_errors`."""
        return self.fit(errors, location=location)

    def frozen_params(
        self, production: Mapping[str, float], errors=None, *, y=None, label: str | None = None
    ) -> NoiseParams:
        """The law with the production variance: ``from_variance(production["sigma2"])``.

        See :meth:`NoiseLaw.frozen_params`.  A variance that is not finite and positive is an
        :class:`InputError` naming ``label`` and the fix.
        """
        sigma2 = float(production["sigma2"])
        if not (np.isfinite(sigma2) and sigma2 > 0):
            raise InputError(
                f"{label + ': ' if label else ''}the production parameter version's sigma2 = {sigma2:g} is not a "
                "positive variance; refit the model and promote a new parameter version."
            )
        return self.from_variance(sigma2)

    def pit(self, errors, params: NoiseParams, rng: np.random.Generator | None = None, *, y=None) -> np.ndarray:
        """``F0((e - loc) / scale; shape)``, i.e. :meth:`cdf` of the errors; see :meth:`NoiseLaw.pit`."""
        return self.cdf(errors, params)

    def simulate(self, mean, rng: np.random.Generator, params: NoiseParams) -> np.ndarray:
        """``mean + loc + scale Z`` with ``Z`` from the standard law; see :meth:`NoiseLaw.simulate`."""
        mean = np.asarray(mean, dtype=float)
        return mean + self.sample(mean.shape, rng, params)

    def standardise(self, errors, params: NoiseParams) -> np.ndarray:
        """``(e - loc) / scale``; see :meth:`NoiseLaw.standardise`."""
        return (errors - params.loc) / params.scale

    def _standard(self, params: NoiseParams) -> NoiseParams:
        return NoiseParams(law=params.law, loc=0.0, scale=1.0, shape=params.shape, estimated=())

    def reference_quantiles(self, probs, params: NoiseParams) -> np.ndarray:
        """Quantiles of the standard law at ``params.shape``: ``F0^{-1}(p; shape)``."""
        return self.ppf(probs, self._standard(params))

    def reference_density(self, z, params: NoiseParams) -> np.ndarray:
        """Density of the standard law at ``params.shape``: ``f0(z; shape)``."""
        return self.pdf(z, self._standard(params))

    # -- maximum likelihood ------------------------------------------------------------------
    def fit(self, x, location: bool = True) -> NoiseParams:
        """Maximum-likelihood fit of the law to one residual series.

        Exactly :meth:`fit_batch` applied to one row, so simulated and observed fits use the same
        estimator.

        Parameters
        ----------
        x : array_like, 1-D
            Residuals (finite; drop positions outside the fit window first).
        location : bool, default True
            Estimate the location (the model has an intercept or mean); False fixes ``loc = 0``.

        Returns
        -------
        NoiseParams
            With ``estimated = self.estimated_names(location)``.
        """
        if np.ndim(x) != 1:
            raise InputError(
                f"{self.name} fit: the residuals must be 1-D; got shape {np.shape(x)}. Use fit_batch for many rows."
            )
        loc, scale, shape = self.fit_batch(np.asarray(x)[None, :], location)
        return NoiseParams(
            law=self.name,
            loc=float(loc[0]),
            scale=float(scale[0]),
            shape=None if shape is None else float(shape[0]),
            estimated=self.estimated_names(location),
        )

    def fit_batch(self, X, location: bool = True):
        """Maximum-likelihood fit of the law to every row of ``X`` (vectorised over rows).

        Parameters
        ----------
        X : array_like (R, n)
            One residual series per row (a 1-D input is one row).
        location : bool, default True
            Estimate the location; False fixes it at 0.

        Returns
        -------
        loc, scale : ndarray (R,)
        shape : ndarray (R,) or None
            The estimated or fixed shape per row; None for laws without a shape.

        Raises
        ------
        InsufficientDataError
            Fewer than ``k + 1`` observations per row.
        InputError
            Non-finite values, or a row whose residuals are all equal (scale 0).

        Warns
        -----
        ConvergenceWarning
            When an iterative fit did not converge for some rows within its iteration budget.
        """
        X = _as_rows(X, f"{self.name} fit", "residuals")
        k = self.n_estimated(location)
        if X.shape[1] < k + 1:
            raise InsufficientDataError(
                f"Fitting the {self.name!r} noise law estimates {k} parameter(s) and needs at least {k + 1} residuals; "
                f"got {X.shape[1]}."
            )
        center = np.median(X, axis=1) if location else np.zeros(len(X))
        flat = np.all(X == center[:, None], axis=1)
        if flat.any():
            raise InputError(
                f"{self.name} fit: row(s) {np.flatnonzero(flat)[:5].tolist()} have all residuals equal"
                f"{' to their median' if location else ' to 0'}; the scale cannot be estimated (is the model an exact "
                "fit?)."
            )
        return self._fit_rows(X, bool(location))

    def _fit_rows(self, X: np.ndarray, location: bool):
        raise NotImplementedError  # each law supplies its estimator

    # -- parameters from a variance ----------------------------------------------------------
    def from_variance(self, sigma2: float, loc: float = 0.0, shape: float | None = None) -> NoiseParams:
        """Frozen production parameters: the law whose variance is ``sigma2``.

        ``scale = sqrt(sigma2 / Var0)`` with ``Var0`` the variance of the standard law: normal
        ``sigma``; student-t ``sigma sqrt((df - 2) / df)``; laplace ``b = sigma / sqrt(2)``;
        logistic ``s = sigma sqrt(3) / pi``.

        Parameters
        ----------
        sigma2 : float
            Innovation variance (e.g. a model's ``sigma2`` parameter), > 0.
        loc : float, default 0.0
        shape : float, optional
            The shape (student-t df) if the law was built without a fixed one.

        Returns
        -------
        NoiseParams
            With ``estimated = ()``.
        """
        sigma2 = float(sigma2)
        if not (math.isfinite(sigma2) and sigma2 > 0):
            raise InputError(f"{self.name} from_variance: sigma2 must be finite and positive; got {sigma2!r}.")
        if self.has_shape:
            if shape is None:
                shape = self.shape
            if shape is None:
                raise InputError(
                    f"{self.name} from_variance: the {self.name!r} law needs its shape (degrees of freedom); "
                    "pass shape=... or build the law with a fixed shape."
                )
            shape = self._check_shape(shape)
        elif shape is not None:
            raise InputError(f"{self.name} from_variance: the {self.name!r} law has no shape; got shape={shape!r}.")
        scale = math.sqrt(sigma2 / self._std_variance(shape))
        return NoiseParams(law=self.name, loc=float(loc), scale=scale, shape=shape, estimated=())

    # -- distribution functions --------------------------------------------------------------
    def _standardise(self, x, params: NoiseParams, owner: str) -> np.ndarray:
        self._check_params(params, owner)
        x = np.asarray(x, dtype=float)
        if np.isnan(x).any():
            raise InputError(f"{self.name} {owner}: x contains NaN; drop those positions first.")
        return (x - params.loc) / params.scale

    def cdf(self, x, params: NoiseParams):
        """Distribution function ``F0((x - loc) / scale; shape)``.

        Parameters
        ----------
        x : array_like
        params : NoiseParams

        Returns
        -------
        ndarray or float
            Values in [0, 1], shaped like ``x``.
        """
        z = self._standardise(x, params, "cdf")
        return _squeeze(self._std_cdf(z, params.shape))

    def ppf(self, u, params: NoiseParams):
        """Quantile function ``loc + scale * F0^{-1}(u; shape)``; ``u`` in [0, 1] (0 and 1 map to -inf, +inf)."""
        self._check_params(params, "ppf")
        u = np.asarray(u, dtype=float)
        if np.isnan(u).any() or (u < 0).any() or (u > 1).any():
            raise InputError(f"{self.name} ppf: probabilities must lie in [0, 1]; got values outside.")
        return _squeeze(params.loc + params.scale * self._std_ppf(u, params.shape))

    def logpdf(self, x, params: NoiseParams):
        """Log density ``log f0((x - loc) / scale; shape) - log(scale)``."""
        z = self._standardise(x, params, "logpdf")
        return _squeeze(self._std_logpdf(z, params.shape) - math.log(params.scale))

    def pdf(self, x, params: NoiseParams):
        """Density ``f0((x - loc) / scale; shape) / scale``."""
        return np.exp(self.logpdf(x, params))

    def cdf_batch(self, X, loc, scale, shape=None):
        """Row-wise distribution function (probability integral transform of many replicates).

        ``U[r, t] = F0((X[r, t] - loc[r]) / scale[r]; shape[r])``.

        Parameters
        ----------
        X : array_like (R, n)
        loc, scale : array_like (R,)
        shape : array_like (R,) or None
            Per-row shape; None uses the law's fixed shape (required for student-t otherwise).

        Returns
        -------
        ndarray (R, n)
        """
        X = _as_rows(X, f"{self.name} cdf_batch", "X")
        R = len(X)
        loc = np.broadcast_to(np.asarray(loc, dtype=float), (R,))
        scale = np.broadcast_to(np.asarray(scale, dtype=float), (R,))
        if not (np.isfinite(loc).all() and np.isfinite(scale).all() and (scale > 0).all()):
            raise InputError(f"{self.name} cdf_batch: loc must be finite and scale finite and positive in every row.")
        shape_col = self._shape_column(shape, R, "cdf_batch")
        return self._std_cdf((X - loc[:, None]) / scale[:, None], shape_col)

    def counts_below_batch(self, X, loc, scale, shape, boundaries) -> CountsBelow:
        """Row-wise counts of PIT values below ``boundaries``, without the PIT values themselves.

        ``below[r, j] = #{t : F0((X[r, t] - loc[r]) / scale[r]; shape[r]) < b_j}
        = #{t : X[r, t] < loc[r] + scale[r] F0^-1(b_j; shape[r])}``, since ``F0`` is continuous
        and increasing: one quantile per row and boundary instead of one distribution-function
        value per observation (a student-t table's 2,000 rows of 700 values: 0.36 s of
        incomplete beta functions for the PIT, 0.1 s this way).  A value equal to an edge counts
        above it, as a PIT value equal to a boundary lies in the upper cell (:func:`cell_counts`).

        Parameters
        ----------
        X : array_like (R, n)
        loc, scale : array_like (R,)
        shape : array_like (R,) or None
            As for :meth:`cdf_batch`.
        boundaries : array_like (E,)
            Interior PIT boundaries, increasing, in (0, 1).

        Returns
        -------
        CountsBelow
        """
        X = _as_rows(X, f"{self.name} counts_below_batch", "X")
        R, n = X.shape
        b = np.asarray(boundaries, dtype=float)
        if b.ndim != 1 or np.any(b <= 0.0) or np.any(b >= 1.0) or np.any(np.diff(b) <= 0):
            raise InputError(f"{self.name} counts_below_batch: boundaries must increase strictly within (0, 1).")
        loc = np.broadcast_to(np.asarray(loc, dtype=float), (R,))[:, None]
        scale = np.broadcast_to(np.asarray(scale, dtype=float), (R,))[:, None]
        if not (np.isfinite(X).all() and np.isfinite(loc).all() and np.isfinite(scale).all() and (scale > 0).all()):
            raise InputError(
                f"{self.name} counts_below_batch: X and loc must be finite and scale finite and positive in every row."
            )
        edges = loc + scale * self._std_ppf(b[None, :], self._shape_column(shape, R, "counts_below_batch"))
        return CountsBelow(b, count_below_rows(X, edges), n)

    def _shape_column(self, shape, R: int, owner: str):
        if not self.has_shape:
            if shape is not None:
                raise InputError(f"{self.name} {owner}: the {self.name!r} law has no shape; pass shape=None.")
            return None
        if shape is None:
            if self.shape is None:
                raise InputError(
                    f"{self.name} {owner}: pass the per-row shape (the law's shape is estimated, not fixed)."
                )
            return self.shape
        shape = np.broadcast_to(np.asarray(shape, dtype=float), (R,))
        if not (np.isfinite(shape).all() and (shape > 2).all()):
            raise InputError(f"{self.name} {owner}: every shape must be finite and > 2.")
        return shape[:, None]

    # -- simulation ---------------------------------------------------------------------------
    def sample_standard(self, size, rng: np.random.Generator, shape: float | None = None):
        """Draws of the standard law (loc 0, scale 1), for pivotal simulation.

        Parameters
        ----------
        size : int or tuple of int
        rng : numpy.random.Generator
        shape : float, optional
            Shape of the law (student-t df); defaults to the law's fixed shape.

        Returns
        -------
        ndarray
        """
        _check_rng(rng, f"{self.name} sample_standard")
        if self.has_shape:
            shape = self.shape if shape is None else shape
            if shape is None:
                raise InputError(f"{self.name} sample_standard: pass the shape (degrees of freedom).")
            shape = self._check_shape(shape)
        elif shape is not None:
            raise InputError(f"{self.name} sample_standard: the {self.name!r} law has no shape; got shape={shape!r}.")
        return self._draw_standard(size, rng, shape)

    def sample(self, size, rng: np.random.Generator, params: NoiseParams):
        """Draws ``loc + scale * Z`` with ``Z`` from the standard law."""
        self._check_params(params, "sample")
        return params.loc + params.scale * self.sample_standard(size, rng, params.shape)

    # -- information and cell derivatives ----------------------------------------------------
    def _indices(self, params: NoiseParams) -> list[int]:
        return [PARAMETER_NAMES.index(e) for e in params.estimated]

    def fisher_information(self, params: NoiseParams) -> np.ndarray:
        """Per-observation Fisher information of the estimated parameters (analytic).

        ``J = D J0 D`` with ``J0`` the information of the standard law in (loc, scale, shape) and
        ``D = diag(1/scale, 1/scale, 1)``, restricted to ``params.estimated`` (in that order).
        Standard-law information (off-diagonal loc terms vanish for these symmetric laws):

        * normal: ``J0 = diag(1, 2)``;
        * laplace: ``J0 = diag(1, 1)``;
        * logistic: ``J0 = diag(1/3, (pi^2 + 3)/9)``;
        * student-t with nu d.f. [1]_: ``J_loc = (nu + 1)/(nu + 3)``, ``J_scale = 2 nu/(nu + 3)``,
          ``J_scale,nu = -2/((nu + 1)(nu + 3))``,
          ``J_nu = [psi'(nu/2) - psi'((nu + 1)/2)]/4 - (nu + 5)/(2 nu (nu + 1)(nu + 3))``.

        Parameters
        ----------
        params : NoiseParams

        Returns
        -------
        ndarray (k, k)
            ``k = len(params.estimated)``.
        """
        self._check_params(params, "fisher_information")
        d = np.array([1.0 / params.scale, 1.0 / params.scale, 1.0])
        j0 = self._std_fisher(params.shape)
        p = j0.shape[0]
        full = d[:p, None] * j0 * d[None, :p]
        idx = self._indices(params)
        return full[np.ix_(idx, idx)]

    def cell_probability_gradient(self, s: int, params: NoiseParams) -> np.ndarray:
        """Derivatives of cell probabilities with respect to the estimated parameters.

        Cells are ``[c_{j-1}, c_j)`` with ``c_j = F^{-1}(b_j; params)`` held fixed (``b_j = j/s``
        for equiprobable cells, or given PIT boundaries), so ``q_j(theta) = F(c_j; theta) -
        F(c_{j-1}; theta)`` equals ``b_j - b_{j-1}`` at ``theta = params``.
        With ``z_j = F0^{-1}(b_j)``: ``dF(c_j)/dloc = -f0(z_j)/scale``,
        ``dF(c_j)/dscale = -z_j f0(z_j)/scale`` and, for the student-t,
        ``dF(c_j)/dnu = int_0^{z_j} f0(t) d log f0(t)/dnu dt`` (a one-dimensional integral of the
        closed-form score, by adaptive quadrature); derivatives vanish at ``z = +-inf``.

        Parameters
        ----------
        s : int or array_like
            Number of equiprobable cells (>= 2), or the PIT boundaries ``0 = b_0 < ... < b_s = 1``
            of unequal cells.
        params : NoiseParams

        Returns
        -------
        ndarray (s, k)
            Row j is ``d q_j / d theta``, columns in the order of ``params.estimated``; every
            column sums to 0.
        """
        self._check_params(params, "cell_probability_gradient")
        interior = self._interior_boundaries(s, "cell_probability_gradient")
        s = interior.size + 1
        z = self._std_ppf(interior, params.shape)  # interior boundaries
        f = np.exp(self._std_logpdf(z, params.shape))
        dF = np.zeros((s + 1, 3))
        dF[1:s, 0] = -f / params.scale
        dF[1:s, 1] = -z * f / params.scale
        if self.has_shape:
            dF[1:s, 2] = self._std_cdf_shape_derivative(z, params.shape)
        dq = np.diff(dF, axis=0)
        return dq[:, self._indices(params)]

    def cell_probabilities(self, s, params: NoiseParams, at: NoiseParams | None = None) -> np.ndarray:
        """Probabilities under ``at`` of the cells that ``params`` makes equiprobable (or sets).

        The cells are ``[c_{j-1}, c_j)`` with ``c_j = F^{-1}(b_j; params)``; their probabilities
        under ``at`` are ``q_j = F(c_j; at) - F(c_{j-1}; at)``, equal to ``b_j - b_{j-1}`` when
        ``at`` is ``params``.  :meth:`cell_probability_gradient` is the derivative of ``q`` in the
        estimated parameters of ``at``, at ``at = params``.

        Parameters
        ----------
        s : int or array_like
            Number of equiprobable cells (>= 2), or the PIT boundaries ``0 = b_0 < ... < b_s = 1``.
        params : NoiseParams
            The parameters that fix the cells.
        at : NoiseParams, optional
            The parameters under which the cells are measured; ``params`` when omitted.

        Returns
        -------
        ndarray (s,)
            Non-negative, summing to 1.
        """
        self._check_params(params, "cell_probabilities")
        at = params if at is None else self._check_params(at, "cell_probabilities")
        interior = self._interior_boundaries(s, "cell_probabilities")
        c = params.loc + params.scale * self._std_ppf(interior, params.shape)
        inner = self._std_cdf((c - at.loc) / at.scale, at.shape)
        return np.diff(np.concatenate([[0.0], np.asarray(inner, dtype=float), [1.0]]))

    def _interior_boundaries(self, s, owner: str) -> np.ndarray:
        """The interior PIT boundaries ``b_1 < ... < b_{s-1}`` of ``s`` equiprobable cells or of
        the boundaries ``0 = b_0 < ... < b_s = 1``."""
        if isinstance(s, (int, np.integer)) and not isinstance(s, bool):
            if s < 2:
                raise InputError(f"{self.name} {owner}: s must be an int >= 2; got {s!r}.")
            return np.arange(1, s) / s
        b = np.asarray(s, dtype=float) if not isinstance(s, (bool, str)) else np.array([])
        if b.ndim != 1 or b.size < 3 or b[0] != 0.0 or b[-1] != 1.0 or np.any(np.diff(b) <= 0):
            raise InputError(
                f"{self.name} {owner}: give the number of equiprobable cells (an int >= 2) or "
                f"increasing PIT boundaries from 0 to 1; got {s!r}."
            )
        return b[1:-1]

    # -- hooks for subclasses ----------------------------------------------------------------
    def _std_cdf(self, z, shape):
        raise NotImplementedError

    def _std_ppf(self, u, shape):
        raise NotImplementedError

    def _std_logpdf(self, z, shape):
        raise NotImplementedError

    def _std_variance(self, shape) -> float:
        raise NotImplementedError

    def _std_fisher(self, shape) -> np.ndarray:
        raise NotImplementedError

    def _draw_standard(self, size, rng, shape):
        raise NotImplementedError


def _squeeze(a):
    a = np.asarray(a)
    return a[()] if a.ndim == 0 else a


class NormalLaw(_LocationScaleLaw):
    """Normal noise, ``f(x) = exp(-z^2/2) / (scale sqrt(2 pi))``, ``z = (x - loc)/scale``.

    Maximum likelihood in closed form: ``loc = mean(x)`` (or 0) and
    ``scale = sqrt(mean((x - loc)^2))`` (denominator n).  Fisher information
    ``diag(1, 2) / scale^2`` (docs/method.md §5.3).
    """

    name = "normal"

    def _fit_rows(self, X, location):
        loc = X.mean(axis=1) if location else np.zeros(len(X))
        scale = np.sqrt(np.mean((X - loc[:, None]) ** 2, axis=1))
        return loc, scale, None

    def _std_cdf(self, z, shape):
        return special.ndtr(z)

    def _std_ppf(self, u, shape):
        return special.ndtri(u)

    def _std_logpdf(self, z, shape):
        return -0.5 * np.square(z) - 0.5 * math.log(2.0 * math.pi)

    def _std_variance(self, shape):
        return 1.0

    def _std_fisher(self, shape):
        return np.diag([1.0, 2.0])

    def _draw_standard(self, size, rng, shape):
        return rng.standard_normal(size)


class LaplaceLaw(_LocationScaleLaw):
    """Laplace (double exponential) noise, ``f(x) = exp(-|x - loc|/b) / (2 b)``.

    Maximum likelihood in closed form: ``loc = median(x)`` (or 0) and ``b = mean(|x - loc|)``
    (Norton, Am. Statist. 38, 1984, p. 135, from memory).  Fisher information ``diag(1, 1)/b^2``
    [3]_.
    """

    name = "laplace"

    def _fit_rows(self, X, location):
        loc = np.median(X, axis=1) if location else np.zeros(len(X))
        scale = np.mean(np.abs(X - loc[:, None]), axis=1)
        return loc, scale, None

    def _std_cdf(self, z, shape):
        z = np.asarray(z, dtype=float)
        half_tail = 0.5 * np.exp(-np.abs(z))
        return np.where(z < 0, half_tail, 1.0 - half_tail)

    def _std_ppf(self, u, shape):
        u = np.asarray(u, dtype=float)
        with np.errstate(divide="ignore"):
            return np.where(u < 0.5, np.log(2.0 * u), -np.log(2.0 * (1.0 - u)))

    def _std_logpdf(self, z, shape):
        return -np.abs(z) - math.log(2.0)

    def _std_variance(self, shape):
        return 2.0

    def _std_fisher(self, shape):
        return np.diag([1.0, 1.0])

    def _draw_standard(self, size, rng, shape):
        return rng.laplace(0.0, 1.0, size)


class _NewtonFittedLaw(_LocationScaleLaw):
    """Laws fitted by batched Newton ascent on the log-likelihood.

    Each row is standardised by a robust start (median, law-specific spread); the optimiser works
    in (loc', log scale' [, log shape]) of the standardised data, so the fit is location-scale
    equivariant and the same for a row whether it is fitted alone or with others.
    Subclasses supply ``_std_terms(z, shape, with_shape)`` returning ``g = log f0`` and its
    derivatives ``g_z``, ``g_zz`` (and, with the shape, ``g_v``, ``g_zv``, ``g_vv``), the start
    ``_start_spread`` and, with a free shape, ``_shape_start`` and ``_shape_bounds``.
    """

    def _fit_rows(self, X, location):
        R = len(X)
        center = np.median(X, axis=1) if location else np.zeros(R)
        dev = X - center[:, None]
        spread = self._start_spread(dev)
        Y = dev / spread[:, None]
        shape_free = self.has_shape and self.shape is None
        k = int(location) + 1 + int(shape_free)
        theta0 = np.zeros((R, k))
        lower = np.full(k, -np.inf)
        upper = np.full(k, np.inf)
        if shape_free:
            lo, hi = self._shape_bounds
            theta0[:, -1] = math.log(self._shape_start)
            lower[-1], upper[-1] = math.log(lo), math.log(hi)

        def loglik(theta, data, derivatives):
            return self._loglik(theta, data, derivatives, location, shape_free)

        theta, converged = _newton_ascent(loglik, Y, theta0, lower, upper)
        if not converged.all():
            warnings.warn(
                ConvergenceWarning(
                    f"The {self.name!r} maximum-likelihood fit did not converge for {int((~converged).sum())} of {R} "
                    f"series within {_NEWTON_MAX_ITER} Newton iterations; the last iterate is used. Check the "
                    "residuals for outliers or a level shift."
                ),
                stacklevel=3,
            )
        loc = center + spread * theta[:, 0] if location else np.zeros(R)
        scale = spread * np.exp(theta[:, int(location)])
        if shape_free:
            # report the bounds exactly when the estimate sits on them
            log_shape = theta[:, -1]
            shape = np.where(log_shape <= lower[-1], lo, np.where(log_shape >= upper[-1], hi, np.exp(log_shape)))
        elif self.has_shape:
            shape = np.full(R, self.shape)
        else:
            shape = None
        return loc, scale, shape

    def _loglik(self, theta, Y, derivatives, location, shape_free):
        """Log-likelihood of standardised rows and its derivatives in (m, log s [, log nu])."""
        n = Y.shape[1]
        m = theta[:, 0] if location else np.zeros(len(theta))
        tau = theta[:, int(location)]
        sig = np.exp(tau)
        nu = np.exp(theta[:, -1])[:, None] if shape_free else self.shape
        Z = (Y - m[:, None]) / sig[:, None]
        terms = self._std_terms(Z, nu, with_shape=shape_free, derivatives=derivatives)
        ll = terms["g"].sum(axis=1) - n * tau
        if not derivatives:
            return ll
        g1, g2 = terms["g_z"], terms["g_zz"]
        k = theta.shape[1]
        t = int(location)
        grad = np.empty((len(theta), k))
        hess = np.empty((len(theta), k, k))
        grad[:, t] = -(g1 * Z).sum(axis=1) - n
        hess[:, t, t] = (g2 * Z * Z + g1 * Z).sum(axis=1)
        if location:
            grad[:, 0] = -g1.sum(axis=1) / sig
            hess[:, 0, 0] = g2.sum(axis=1) / sig**2
            hess[:, 0, t] = hess[:, t, 0] = (g2 * Z + g1).sum(axis=1) / sig
        if shape_free:
            v = k - 1
            nu1 = nu[:, 0]
            gv = terms["g_v"].sum(axis=1)
            gzv = terms["g_zv"]
            grad[:, v] = nu1 * gv
            hess[:, v, v] = nu1**2 * terms["g_vv"].sum(axis=1) + nu1 * gv
            hess[:, t, v] = hess[:, v, t] = -nu1 * (gzv * Z).sum(axis=1)
            if location:
                hess[:, 0, v] = hess[:, v, 0] = -nu1 * gzv.sum(axis=1) / sig
        return ll, grad, hess


class LogisticLaw(_NewtonFittedLaw):
    """Logistic noise, ``f(x) = e^{-z} / (s (1 + e^{-z})^2)``, ``z = (x - loc)/s``.

    Maximum likelihood by batched Newton ascent (score equations ``sum tanh(z_t/2) = 0`` and
    ``sum z_t tanh(z_t/2) = n``).  Fisher information ``diag(1/3, (pi^2 + 3)/9) / s^2`` [3]_.
    """

    name = "logistic"

    def _std_terms(self, z, shape, with_shape, derivatives=True):
        a = np.abs(z)
        out = {"g": -a - 2.0 * np.log1p(np.exp(-a))}
        if derivatives:
            th = np.tanh(0.5 * z)
            out["g_z"] = -th
            out["g_zz"] = -0.5 * (1.0 - th * th)
        return out

    def _start_spread(self, dev):
        return np.sqrt(np.mean(dev**2, axis=1)) * math.sqrt(3.0) / math.pi

    def _std_cdf(self, z, shape):
        return special.expit(z)

    def _std_ppf(self, u, shape):
        return special.logit(u)

    def _std_logpdf(self, z, shape):
        a = np.abs(z)
        return -a - 2.0 * np.log1p(np.exp(-a))

    def _std_variance(self, shape):
        return math.pi**2 / 3.0

    def _std_fisher(self, shape):
        return np.diag([1.0 / 3.0, (math.pi**2 + 3.0) / 9.0])

    def _draw_standard(self, size, rng, shape):
        return rng.logistic(0.0, 1.0, size)


class StudentTLaw(_NewtonFittedLaw):
    """Student-t noise with ``nu`` degrees of freedom (shape), location and scale.

    ``log f0(z) = lgamma((nu+1)/2) - lgamma(nu/2) - log(nu pi)/2 - (nu+1)/2 log(1 + z^2/nu)``.
    Maximum likelihood by batched Newton ascent in (loc, log scale, log nu), with ``nu`` held in
    :data:`STUDENT_T_DF_BOUNDS` (the variance must exist; beyond 200 the law is practically
    normal).  A fixed ``nu`` must exceed 2.  Fisher information from Lange, Little and Taylor
    (1989) [1]_; see :meth:`fisher_information`.
    """

    name = "student-t"
    has_shape = True
    _shape_bounds = STUDENT_T_DF_BOUNDS
    _shape_start = 8.0

    def _check_shape(self, shape) -> float:
        try:
            value = float(shape)
        except (TypeError, ValueError):
            value = float("nan")
        if isinstance(shape, bool) or not (math.isfinite(value) and value > 2):
            raise InputError(
                f"The shape (degrees of freedom) of the 'student-t' noise law must be a finite number > 2 so that "
                f"the variance exists; got {shape!r}."
            )
        return value

    def _std_terms(self, z, nu, with_shape, derivatives=True):
        z2 = z * z
        den = nu + z2
        log_kernel = np.log1p(z2 / nu)
        const = special.gammaln((nu + 1) / 2) - special.gammaln(nu / 2) - 0.5 * np.log(nu * math.pi)
        out = {"g": const - 0.5 * (nu + 1) * log_kernel}
        if not derivatives:
            return out
        out["g_z"] = -(nu + 1) * z / den
        out["g_zz"] = -(nu + 1) * (nu - z2) / den**2
        if with_shape:
            c1 = 0.5 * special.digamma((nu + 1) / 2) - 0.5 * special.digamma(nu / 2) - 0.5 / nu
            c2 = 0.25 * special.polygamma(1, (nu + 1) / 2) - 0.25 * special.polygamma(1, nu / 2) + 0.5 / nu**2
            out["g_v"] = c1 - 0.5 * log_kernel + (nu + 1) * z2 / (2 * nu * den)
            out["g_zv"] = -z * (z2 - 1) / den**2
            out["g_vv"] = c2 + z2 / (2 * nu * den) - z2 * (nu * nu + 2 * nu + z2) / (2 * nu * nu * den**2)
        return out

    def _loglik(self, theta, Y, derivatives, location, shape_free):
        """:meth:`_NewtonFittedLaw._loglik` for the t law from eight row sums.

        With ``w = 1 / (nu + z^2)`` every derivative of ``g = log f0`` in ``_std_terms`` is a
        polynomial in ``z`` times a power of ``w``, so the sums the Newton step needs are
        ``sum log(1 + z^2/nu)`` and ``sum z^a w^b`` for a few (a, b): the same quantities as the
        generic form (equal to rounding), without its dozen temporary arrays per evaluation.
        """
        n = Y.shape[1]
        m = theta[:, 0] if location else np.zeros(len(theta))
        tau = theta[:, int(location)]
        sig = np.exp(tau)
        nu = np.exp(theta[:, -1]) if shape_free else np.full(len(theta), float(self.shape))
        Z = (Y - m[:, None]) / sig[:, None]
        z2 = Z * Z
        col = nu[:, None]
        lk = np.log1p(z2 / col).sum(axis=1)
        const = special.gammaln((nu + 1) / 2) - special.gammaln(nu / 2) - 0.5 * np.log(nu * math.pi)
        ll = n * const - 0.5 * (nu + 1) * lk - n * tau
        if not derivatives:
            return ll
        w = 1.0 / (col + z2)
        z2w = z2 * w
        zw = Z * w

        def dot(a, b):
            return np.einsum("ij,ij->i", a, b)

        a = z2w.sum(axis=1)  # sum z^2 w
        b = dot(z2w, w)  # sum z^2 w^2
        k = theta.shape[1]
        t = int(location)
        grad = np.empty((len(theta), k))
        hess = np.empty((len(theta), k, k))
        grad[:, t] = (nu + 1) * a - n
        hess[:, t, t] = -2.0 * nu * (nu + 1) * b
        if location:
            c = zw.sum(axis=1)  # sum z w
            d = dot(zw, w)  # sum z w^2
            e = dot(w, w)  # sum w^2
            grad[:, 0] = (nu + 1) * c / sig
            hess[:, 0, 0] = -(nu + 1) * (nu * e - b) / sig**2
            hess[:, 0, t] = hess[:, t, 0] = -2.0 * nu * (nu + 1) * d / sig
        if shape_free:
            v = k - 1
            f = dot(z2w, z2w)  # sum z^4 w^2
            c1 = 0.5 * special.digamma((nu + 1) / 2) - 0.5 * special.digamma(nu / 2) - 0.5 / nu
            c2 = 0.25 * special.polygamma(1, (nu + 1) / 2) - 0.25 * special.polygamma(1, nu / 2) + 0.5 / nu**2
            gv = n * c1 - 0.5 * lk + (nu + 1) * a / (2 * nu)
            gvv = n * c2 + a / (2 * nu) - ((nu * nu + 2 * nu) * b + f) / (2 * nu * nu)
            grad[:, v] = nu * gv
            hess[:, v, v] = nu**2 * gvv + nu * gv
            hess[:, t, v] = hess[:, v, t] = nu * (f - b)  # -nu sum g_zv z, g_zv = -z (z^2 - 1) w^2
            if location:
                g3 = dot(z2w, zw)  # sum z^3 w^2
                hess[:, 0, v] = hess[:, v, 0] = nu * (g3 - d) / sig
        return ll, grad, hess

    def _start_spread(self, dev):
        mad = 1.482602218505602 * np.median(np.abs(dev), axis=1)
        rms = np.sqrt(np.mean(dev**2, axis=1))
        return np.where(mad > 0, mad, rms)

    def _std_cdf(self, z, nu):
        return special.stdtr(nu, z)

    def _std_ppf(self, u, nu):
        u = np.asarray(u, dtype=float)
        inner = np.clip(u, np.finfo(float).tiny, 1.0 - np.finfo(float).epsneg)
        # scipy.special.stdtrit returns +inf at u = 0, so the end points are set explicitly
        return np.where(u <= 0, -np.inf, np.where(u >= 1, np.inf, special.stdtrit(nu, inner)))

    def _std_logpdf(self, z, nu):
        return self._std_terms(np.asarray(z, dtype=float), nu, with_shape=False, derivatives=False)["g"]

    def _std_variance(self, nu):
        return nu / (nu - 2.0)

    def _std_fisher(self, nu):
        j = np.zeros((3, 3))
        j[0, 0] = (nu + 1) / (nu + 3)
        j[1, 1] = 2 * nu / (nu + 3)
        j[1, 2] = j[2, 1] = -2.0 / ((nu + 1) * (nu + 3))
        j[2, 2] = 0.25 * (special.polygamma(1, nu / 2) - special.polygamma(1, (nu + 1) / 2)) - (nu + 5) / (
            2 * nu * (nu + 1) * (nu + 3)
        )
        return j

    def _std_cdf_shape_derivative(self, z, nu):
        """``dF0(z; nu)/dnu = int_0^z f0(t) g_v(t) dt`` for each z (F0(0) = 1/2 for every nu)."""
        z = np.asarray(z, dtype=float)

        def integrand(tau):
            t = tau * z
            terms = self._std_terms(t, nu, with_shape=True)
            return z * np.exp(terms["g"]) * terms["g_v"]

        value, _ = integrate.quad_vec(integrand, 0.0, 1.0, epsabs=1e-14, epsrel=1e-12)
        return value

    def _draw_standard(self, size, rng, nu):
        return rng.standard_t(nu, size)


# --------------------------------------------------------------------------------------------
# Count laws
# --------------------------------------------------------------------------------------------
class _CountLaw(NoiseLaw):
    """Count laws with a predictive mean per time point (docs/method.md §6.2)."""

    kind = "count"
    discrete = True

    # -- the protocol (see NoiseLaw) ---------------------------------------------------------
    def _observations(self, y, owner: str) -> np.ndarray:
        if y is None:
            raise InputError(
                f"{self.name} {owner}: a count law needs the observations y as well as the errors "
                "(its law depends on the mean y - errors); pass y=..."
            )
        return np.asarray(y, dtype=float)

    def fit_errors(self, errors, location: bool = True, *, y=None) -> NoiseParams:
        """:meth:`fit_counts` of ``y`` given the means ``y - errors`` (nothing else depends on
        ``location``); see :meth:`NoiseLaw.fit_errors`."""
        y = self._observations(y, "fit_errors")
        return self.fit_counts(y, y - errors)

    def frozen_params(
        self, production: Mapping[str, float], errors=None, *, y=None, label: str | None = None
    ) -> NoiseParams:
        """The law at means ``y - errors``: :meth:`fit_counts`, which estimates a size that is not
        fixed (negative binomial) and nothing else; see :meth:`NoiseLaw.frozen_params`."""
        y = self._observations(y, "frozen_params")
        return self.fit_counts(y, y - errors)

    def pit(self, errors, params: NoiseParams, rng: np.random.Generator | None = None, *, y=None) -> np.ndarray:
        """:meth:`randomized_pit` of ``y`` with means ``y - errors``; see :meth:`NoiseLaw.pit`."""
        y = self._observations(y, "pit")
        return self.randomized_pit(y, y - errors, params, rng)

    def simulate(self, mean, rng: np.random.Generator, params: NoiseParams) -> np.ndarray:
        """:meth:`sample_counts` with the given means; see :meth:`NoiseLaw.simulate`."""
        return self.sample_counts(mean, rng, params)

    def check_observations(self, y: np.ndarray, label: str) -> None:
        """Refuse values that are not non-negative integers, naming the first and the fix."""
        bad = np.flatnonzero((y < 0) | (y != np.round(y)))
        if bad.size:
            raise InputError(
                f"{label}: the {self.name} noise law needs counts (non-negative integers), but {bad.size} value(s) are "
                f"not, first at position {int(bad[0])} ({y[bad[0]]:g}). Register a continuous noise law (normal, "
                "student-t, laplace, logistic) for this series, or correct the extract."
            )

    def standardise(self, errors, params: NoiseParams) -> np.ndarray:
        """``e / sd(e)`` (1 for constant errors): counts have no standard law of their own."""
        return errors / (np.std(errors) or 1.0)

    def reference_quantiles(self, probs, params: NoiseParams) -> np.ndarray:
        """Quantiles of the standard normal reference of :meth:`standardise` (the large-mean
        limit), as sample quantiles of 4,000 normal draws with seed 0 (a fixed picture)."""
        return np.quantile(np.random.default_rng(0).standard_normal(4000), probs)

    # -- counts given the means --------------------------------------------------------------

    def _count_params(self, params, owner):
        return self._check_params(params, owner)

    def _cdf(self, y, mean, shape):
        raise NotImplementedError

    def logpmf(self, y, mean, params: NoiseParams):
        """Log probability ``log P(Y_t = y_t)`` under the law with mean ``mean_t``.

        Parameters
        ----------
        y : array_like
            Non-negative integer counts.
        mean : array_like
            Predictive means, broadcastable to ``y``; positive.
        params : NoiseParams

        Returns
        -------
        ndarray
        """
        self._count_params(params, "logpmf")
        y = _as_counts(y, f"{self.name} logpmf")
        mean = _as_means(mean, y.shape, f"{self.name} logpmf")
        return self._logpmf(y, mean, params.shape)

    def randomized_pit(self, y, mean, params: NoiseParams, rng: np.random.Generator):
        """Randomised probability integral transform of counts.

        ``u_t = F_t(y_t - 1) + V_t P_t(Y = y_t)`` with ``V_t ~ U(0, 1)`` independent (``F_t(-1) = 0``);
        exactly i.i.d. U(0, 1) when ``y_t`` follows the law with mean ``mean_t`` [4]_ (docs/method.md §6.2).

        Parameters
        ----------
        y : array_like
            Non-negative integer counts.
        mean : array_like
            Predictive means, broadcastable to ``y``.
        params : NoiseParams
        rng : numpy.random.Generator
            Seeded generator; record its seed with the result.

        Returns
        -------
        ndarray
            Shaped like ``y``, values in [0, 1].
        """
        self._count_params(params, "randomized_pit")
        rng = _check_rng(rng, f"{self.name} randomized_pit")
        y = _as_counts(y, f"{self.name} randomized_pit")
        mean = _as_means(mean, y.shape, f"{self.name} randomized_pit")
        below = np.where(y > 0, self._cdf(np.maximum(y - 1, 0), mean, params.shape), 0.0)
        mass = np.exp(self._logpmf(y, mean, params.shape))
        return np.clip(below + rng.uniform(size=y.shape) * mass, 0.0, 1.0)

    def sample_counts(self, mean, rng: np.random.Generator, params: NoiseParams):
        """Random counts with the given means (any shape; e.g. (R, n) for R replicates).

        Parameters
        ----------
        mean : array_like
            Positive predictive means.
        rng : numpy.random.Generator
        params : NoiseParams

        Returns
        -------
        ndarray of float
            Integer-valued counts shaped like ``mean``.
        """
        self._count_params(params, "sample_counts")
        rng = _check_rng(rng, f"{self.name} sample_counts")
        mean = np.asarray(mean, dtype=float)
        mean = _as_means(mean, mean.shape, f"{self.name} sample_counts")
        return self._draw(mean, rng, params.shape).astype(float)

    def fit_counts(self, y, mean) -> NoiseParams:
        """Maximum-likelihood fit of the law's free parameters given the predictive means.

        Poisson: nothing is estimated.  Negative binomial: the size, unless fixed.  Exactly
        :meth:`fit_counts_batch` on one row.

        Parameters
        ----------
        y : array_like, 1-D
            Non-negative integer counts.
        mean : array_like
            Predictive means, broadcastable to ``y``.

        Returns
        -------
        NoiseParams
            ``loc = 0``, ``scale = 1`` (unused by count laws), ``shape`` the size (NB),
            ``estimated = ("shape",)`` when the size was estimated, else ``()``.
        """
        y = _as_counts(y, f"{self.name} fit_counts")
        if y.ndim != 1:
            raise InputError(
                f"{self.name} fit_counts: the counts must be 1-D; got shape {y.shape}. Use fit_counts_batch."
            )
        mean = _as_means(mean, y.shape, f"{self.name} fit_counts")
        shape = self.fit_counts_batch(y[None, :], mean[None, :])
        estimated = ("shape",) if self.has_shape and self.shape is None else ()
        return NoiseParams(
            law=self.name, loc=0.0, scale=1.0, shape=None if shape is None else float(shape[0]), estimated=estimated
        )

    def fit_counts_batch(self, Y, mean):
        """Row-wise fit given the predictive means (vectorised over rows).

        Parameters
        ----------
        Y : array_like (R, n)
            Counts, one series per row.
        mean : array_like
            Means broadcastable to ``(R, n)``.

        Returns
        -------
        ndarray (R,) or None
            The size per row (negative binomial; the fixed size if given); None for Poisson.
        """
        Y = _as_counts(Y, f"{self.name} fit_counts_batch")
        if Y.ndim != 2:
            raise InputError(f"{self.name} fit_counts_batch: counts must be 2-D (replicates, n); got shape {Y.shape}.")
        mean = _as_means(mean, Y.shape, f"{self.name} fit_counts_batch")
        return self._fit_shape(Y, mean)

    def _fit_shape(self, Y, mean):
        raise NotImplementedError


class PoissonLaw(_CountLaw):
    """Poisson counts, ``P(Y_t = y) = mu_t^y e^{-mu_t} / y!``; nothing to estimate beyond the means."""

    name = "poisson"

    def _logpmf(self, y, mean, shape):
        return special.xlogy(y, mean) - mean - special.gammaln(y + 1.0)

    def _cdf(self, y, mean, shape):
        return special.pdtr(y, mean)

    def _draw(self, mean, rng, shape):
        return rng.poisson(mean)

    def _fit_shape(self, Y, mean):
        return None


class NegativeBinomialLaw(_CountLaw):
    """Negative-binomial (NB2) counts with mean ``mu_t`` and size ``r`` (shape).

    ``P(Y = y) = Gamma(y + r) / (Gamma(r) y!) p^r (1 - p)^y`` with ``p = r / (r + mu)``, so
    ``Var(Y) = mu + mu^2 / r`` [5]_ (scipy's ``nbinom(n=r, p=r/(r + mu))``).  The size is estimated
    by maximum likelihood given the means: the root of the score
    ``sum_t [psi(y_t + r) - psi(r) - log(1 + mu_t/r) + (mu_t - y_t)/(r + mu_t)]`` by a safeguarded
    Newton-bisection in ``log r`` within :data:`NB_SIZE_BOUNDS` (the upper bound when the counts
    show no over-dispersion, the lower bound when the score stays negative).
    """

    name = "negative-binomial"
    has_shape = True

    def _check_shape(self, shape) -> float:
        try:
            value = float(shape)
        except (TypeError, ValueError):
            value = float("nan")
        if isinstance(shape, bool) or not (math.isfinite(value) and value > 0):
            raise InputError(
                f"The shape (size) of the 'negative-binomial' noise law must be a finite number > 0; got {shape!r}."
            )
        return value

    def _logpmf(self, y, mean, r):
        return (
            special.gammaln(y + r)
            - special.gammaln(r)
            - special.gammaln(y + 1.0)
            - r * np.log1p(mean / r)
            + special.xlogy(y, mean)
            - y * np.log(r + mean)
        )

    def _cdf(self, y, mean, r):
        return special.betainc(r, y + 1.0, r / (r + mean))

    def _draw(self, mean, rng, r):
        return rng.negative_binomial(r, r / (r + mean))

    @staticmethod
    def _score(eta, Y, mean):
        """Score in r and its derivative in r, at r = exp(eta) per row."""
        r = np.exp(eta)[:, None]
        score = (special.digamma(Y + r) - special.digamma(r) - np.log1p(mean / r) + (mean - Y) / (r + mean)).sum(axis=1)
        slope = (
            special.polygamma(1, Y + r)
            - special.polygamma(1, r)
            + mean / (r * (r + mean))
            - (mean - Y) / (r + mean) ** 2
        ).sum(axis=1)
        return score, slope

    def _fit_shape(self, Y, mean):
        R = len(Y)
        if self.shape is not None:
            return np.full(R, self.shape)
        lo = np.full(R, math.log(NB_SIZE_BOUNDS[0]))
        hi = np.full(R, math.log(NB_SIZE_BOUNDS[1]))
        s_lo, _ = self._score(lo, Y, mean)
        s_hi, _ = self._score(hi, Y, mean)
        size = np.where(s_lo <= 0, NB_SIZE_BOUNDS[0], NB_SIZE_BOUNDS[1])  # boundary solutions
        inside = np.flatnonzero((s_lo > 0) & (s_hi < 0))
        if inside.size:
            size[inside] = np.exp(
                self._score_root(lo[inside], hi[inside], s_lo[inside], s_hi[inside], Y[inside], mean[inside])
            )
        return size

    def _score_root(self, lo, hi, s_lo, s_hi, Y, mean):
        """Safeguarded Newton iteration for the root of the score in log r.

        The bracket ``[lo, hi]`` has ``score(lo) > 0 > score(hi)`` and shrinks at every step.
        Starts from the moment estimate ``r = sum mu^2 / sum((y - mu)^2 - y)`` (clipped into the
        bracket); a Newton step that leaves the bracket, or is taken where the score is not
        decreasing, is replaced by the secant of the bracket ends (regula falsi with the Illinois
        modification, Dowell and Jarratt, BIT 11, 1971, p. 168, from memory).
        """
        excess = np.sum((Y - mean) ** 2 - Y, axis=1)
        with np.errstate(divide="ignore"):
            moment = np.log(np.sum(mean**2, axis=1)) - np.log(np.maximum(excess, 0.0))
        eta = np.clip(moment, lo + 0.1 * (hi - lo), hi - 0.1 * (hi - lo))
        todo = np.arange(len(eta))
        last_up = np.zeros(len(eta), dtype=np.int8)  # +1 / -1: which end moved last (0: none yet)
        for _ in range(200):
            if todo.size == 0:
                break
            e = eta[todo]
            score, slope = self._score(e, Y[todo], mean[todo])
            up = score > 0
            # Illinois rule: when the same end moves twice, halve the score kept at the other end
            repeat = last_up[todo] == np.where(up, 1, -1)
            last_up[todo] = np.where(up, 1, -1)
            left, right = np.where(up, e, lo[todo]), np.where(up, hi[todo], e)
            sl = np.where(up, score, np.where(repeat, 0.5, 1.0) * s_lo[todo])
            sh = np.where(up, np.where(repeat, 0.5, 1.0) * s_hi[todo], score)
            d_eta = np.exp(e) * slope  # d score / d eta
            with np.errstate(divide="ignore", invalid="ignore"):
                newton = e - score / d_eta
                secant = left - sl * (right - left) / (sh - sl)
            newton_ok = (d_eta < 0) & (newton > left) & (newton < right)
            # the secant of a bracket lies inside it; on an end only when that end is the root to rounding
            secant_at_end = ~newton_ok & ((secant <= left) | (secant >= right))
            secant = np.clip(secant, left, right)
            nxt = np.where(newton_ok, newton, np.where(np.isfinite(secant), secant, 0.5 * (left + right)))
            lo[todo], hi[todo], s_lo[todo], s_hi[todo], eta[todo] = left, right, sl, sh, nxt
            finished = (np.abs(nxt - e) < 1e-10) | (right - left < 1e-10) | (score == 0) | secant_at_end
            todo = todo[~finished]
        if todo.size:
            warnings.warn(
                ConvergenceWarning(
                    f"The negative-binomial size estimate did not converge for {todo.size} of {len(eta)} series "
                    "within 200 iterations; the last iterate is used. Check the predictive means and the counts."
                ),
                stacklevel=4,
            )
        return eta


#: The noise laws by name.
NOISE_LAWS: dict[str, type[NoiseLaw]] = {
    "normal": NormalLaw,
    "student-t": StudentTLaw,
    "laplace": LaplaceLaw,
    "logistic": LogisticLaw,
    "poisson": PoissonLaw,
    "negative-binomial": NegativeBinomialLaw,
}


def get_law(name: str, shape: float | None = None) -> NoiseLaw:
    """The noise law called ``name``, with an optional fixed shape.

    Parameters
    ----------
    name : {"normal", "student-t", "laplace", "logistic", "poisson", "negative-binomial"}
    shape : float, optional
        Fixed student-t degrees of freedom (> 2) or negative-binomial size (> 0); None estimates
        it.  Laws without a shape accept only None.

    Returns
    -------
    NoiseLaw

    Raises
    ------
    InputError
        Unknown name (the message lists the valid names) or invalid shape.

    Examples
    --------
    >>> law = get_law("normal")
    >>> law.n_estimated(location=True)
    2
    >>> get_law("student-t", shape=5).from_variance(5 / 3).scale
    1.0
    """
    if name not in NOISE_LAWS:
        valid = ", ".join(repr(k) for k in NOISE_LAWS)
        raise InputError(f"Unknown noise law {name!r}; valid noise laws are {valid}.")
    return NOISE_LAWS[name](shape)


def as_noise_law(noise: str | Mapping[str, Any] | NoiseLaw, shape: float | None = None) -> NoiseLaw:
    """A noise law from its name, ``{"law": name, "shape": value}`` or an instance.

    Parameters
    ----------
    noise : str, mapping or NoiseLaw
        ``"normal"``, ``{"law": "student-t", "shape": 5}`` or a law built by :func:`get_law`.
    shape : float, optional
        A fixed shape to use when ``noise`` gives none (an instance is rebuilt with it).

    Returns
    -------
    NoiseLaw

    Examples
    --------
    >>> as_noise_law({"law": "student-t", "shape": 5})
    get_law('student-t', shape=5.0)
    """
    if isinstance(noise, NoiseLaw):
        return noise if shape is None else get_law(noise.name, shape=shape)
    if isinstance(noise, Mapping):
        return get_law(str(noise.get("law")), shape=noise.get("shape", shape))
    return get_law(str(noise), shape=shape)
