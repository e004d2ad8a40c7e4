"""Warnings and errors raised by :mod:`fitaudit.core`, in one place.

Core computations warn and record; the task layer turns warnings into log lines and report
flags; only flows decide whether a run fails.  Every message says what happened and how to
fix it.
"""

from __future__ import annotations

__all__ = [
    "FitauditError",
    "InputError",
    "InsufficientDataError",
    "SpecificationError",
    "FitauditWarning",
    "ConvergenceWarning",
]


class FitauditError(Exception):
    """Base class of every error raised deliberately by fitaudit."""


class InputError(FitauditError, ValueError):
    """Input data or arguments are malformed (wrong shape, NaN, negative counts, ...)."""


class SpecificationError(FitauditError, ValueError):
    """A model specification is invalid or does not match the data or parameters given."""


class InsufficientDataError(FitauditError):
    """Too little data for the requested check; the message says how much is needed.

    The audit protocol turns this into an ``insufficient`` verdict rather than an error.
    """


class FitauditWarning(UserWarning):
    """Base class of fitaudit warnings."""


class ConvergenceWarning(FitauditWarning):
    """The optimiser stopped without meeting its convergence criterion.

    Fix: check the series for level shifts or outliers, try other starting values, or
    simplify the model orders.
    """
