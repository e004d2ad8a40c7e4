"""The scipy modules core computes with, imported when a computation first needs them.

Building model specifications, noise laws and audit settings (what ``fitaudit registry check``
does for every registered model) needs no scipy; importing ``scipy.signal``, ``scipy.optimize``,
``scipy.stats`` and ``scipy.linalg`` takes a second or more on a cold start, so core reaches
them through :class:`LazyModule`: the module is imported on the first attribute read, and each
attribute is then stored on the proxy, so later reads (the likelihood loops call ``lapack.dpotrf``
and ``signal.lfilter`` on every evaluation) are plain instance attribute look-ups.
"""

from __future__ import annotations

import importlib

__all__ = ["LazyModule", "blas", "integrate", "lapack", "lfilter", "optimize", "signal", "special", "stats"]


class LazyModule:
    """A module imported on first use; its attributes are cached on the proxy.

    Parameters
    ----------
    name : str
        The module's import name, e.g. ``"scipy.signal"``.

    Examples
    --------
    >>> math_proxy = LazyModule("math")
    >>> math_proxy.sqrt(4.0)
    2.0
    >>> "sqrt" in vars(math_proxy)
    True
    """

    def __init__(self, name: str) -> None:
        self._name = name

    def __getattr__(self, attr: str):
        if attr.startswith("__"):
            raise AttributeError(attr)  # copy/pickle probes must not trigger the import
        value = getattr(importlib.import_module(self._name), attr)
        setattr(self, attr, value)
        return value

    def __repr__(self) -> str:
        return f"LazyModule({self._name!r})"


blas = LazyModule("scipy.linalg.blas")
integrate = LazyModule("scipy.integrate")
lapack = LazyModule("scipy.linalg.lapack")
optimize = LazyModule("scipy.optimize")
signal = LazyModule("scipy.signal")
special = LazyModule("scipy.special")
stats = LazyModule("scipy.stats")


_FAST_FILTER: list = []  # [(scipy's compiled filter or None, numpy.ndarray, float64)], set on the first call


def lfilter(b, a, x, axis: int = -1, zi=None):
    """``scipy.signal.lfilter(b, a, x, axis, zi)``, calling scipy's compiled filter directly.

    The public function spends about 2.5 us per call on array-namespace dispatch and argument
    checks before it calls ``scipy.signal._sigtools._linear_filter``; the likelihood loops filter
    a few rows of float64 a few hundred times per fit, so they call that routine themselves.  The
    public function is used for anything else (another dtype, ``len(a) == 1``, an ``a[0]`` of 0)
    and whenever a scipy release no longer has the routine; tests/test_optimisations.py checks
    both give the same numbers.

    Examples
    --------
    >>> import numpy as np
    >>> lfilter(np.ones(1), np.array([1.0, -0.5]), np.array([1.0, 0.0, 0.0]))
    array([1.  , 0.5 , 0.25])
    """
    if not _FAST_FILTER:
        import numpy  # here, so that importing this module loads neither numpy nor scipy

        compiled = getattr(importlib.import_module("scipy.signal._sigtools"), "_linear_filter", None)
        _FAST_FILTER.append((compiled, numpy.ndarray, numpy.dtype(numpy.float64)))
    compiled, ndarray, f64 = _FAST_FILTER[0]
    if (
        compiled is not None
        and type(a) is ndarray
        and type(b) is ndarray
        and type(x) is ndarray
        and a.ndim == 1
        and a.size > 1
        and a[0] != 0.0
        and a.dtype == f64
        and b.dtype == f64
        and x.dtype == f64
        and (zi is None or (type(zi) is ndarray and zi.dtype == f64))
    ):
        return compiled(b, a, x, axis) if zi is None else compiled(b, a, x, axis, zi)
    return signal.lfilter(b, a, x, axis=axis, zi=zi)
