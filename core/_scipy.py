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
import sys

__all__ = [
    "LazyModule",
    "blas",
    "integrate",
    "lapack",
    "lfilter",
    "minimize_lbfgsb",
    "optimize",
    "signal",
    "special",
    "stats",
    "warm_imports",
]


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


#: The modules every fit and check uses, which :func:`warm_imports` imports ahead of use.
_FIT_MODULES = (blas, lapack, optimize, special)


def warm_imports() -> None:
    """Import the modules the fits and checks use, and scipy's compiled filter, now.

    For a process that will compute and has nothing else to do yet (a worker waiting for its
    first batch): the first fit then pays no import.  ``scipy.signal``, ``scipy.stats`` and
    ``scipy.integrate`` are left to their first use (a forecast audit, the asymptotic gate, a
    student-t law's shape derivative): the fits reach the filter without the ``scipy.signal``
    package (:func:`_compiled_filter`), whose imports (``scipy.stats`` among them) took 0.4-0.7 s
    of a worker's start, and ``scipy.integrate`` another 0.2 s.
    """
    for proxy in _FIT_MODULES:
        importlib.import_module(proxy._name)
    _fast_filter()


def _compiled_filter():
    """scipy's compiled ``_linear_filter`` (the routine ``scipy.signal.lfilter`` calls), or None.

    While ``scipy.signal`` is not imported, its extension module is loaded from its file
    (:func:`_extension_from_file`): importing it the usual way runs the package's ``__init__``,
    which imports most of scipy and none of which the filter needs.  Anything unexpected (another
    layout of scipy's files) falls back to the usual import.
    """
    name = "scipy.signal._sigtools"
    module = sys.modules.get(name)
    if module is None and "scipy.signal" not in sys.modules:
        module = _extension_from_file(name)
    if module is None:
        module = importlib.import_module(name)
    return getattr(module, "_linear_filter", None)


def _extension_from_file(name: str):
    """The compiled module ``name`` of scipy loaded from its file, or None when no such file is
    found or it does not load.

    The module is not left in ``sys.modules``: a later import of its package then loads it the
    usual way (Python keeps the loaded extension, so the same functions) and sets it as the
    package's attribute, which scipy's own code and users expect.
    """
    import importlib.machinery
    import importlib.util
    import pathlib

    try:
        import scipy

        *folders, leaf = name.split(".")[1:]
        folder = pathlib.Path(scipy.__file__).parent.joinpath(*folders)
        for suffix in importlib.machinery.EXTENSION_SUFFIXES:
            path = folder / (leaf + suffix)
            if path.is_file():
                spec = importlib.util.spec_from_file_location(name, path)
                module = importlib.util.module_from_spec(spec)
                spec.loader.exec_module(module)
                sys.modules.pop(name, None)  # the loader of a single-phase extension registers it
                return module
    except Exception:  # the usual import instead
        return None
    return None


def _fast_filter() -> tuple:
    """``(compiled filter or None, numpy.ndarray, float64)``, found on the first call."""
    if not _FAST_FILTER:
        import numpy  # here, so that importing this module loads neither numpy nor scipy

        _FAST_FILTER.append((_compiled_filter(), numpy.ndarray, numpy.dtype(numpy.float64)))
    return _FAST_FILTER[0]


_FAST_FILTER: list = []  # [(scipy's compiled filter or None, numpy.ndarray, float64)], set on the first call


def lfilter(b, a, x, axis: int = -1, zi=None):
    """``scipy.signal.lfilter(b, a, x, axis, zi)``, calling scipy's compiled filter directly.

    The public function spends about 2.5 us per call on array-namespace dispatch and argument
    checks before it calls ``scipy.signal._sigtools._linear_filter``; the likelihood loops filter
    a few rows of float64 a few hundred times per fit, so they call that routine themselves.  A
    list ``b`` of numbers is taken as float64 (as scipy takes it), and ``len(a) == 1`` is filtered
    as scipy filters it, by convolution with ``b / a[0]``, so that the fits never import the
    ``scipy.signal`` package (see :func:`warm_imports`).  The public function is used for anything
    else (another dtype, an ``a[0]`` of 0, ``zi`` with ``len(a) == 1``) and whenever a scipy release
    no longer has the routine; tests/test_optimisations.py checks both give the same numbers.

    Examples
    --------
    >>> import numpy as np
    >>> lfilter(np.ones(1), np.array([1.0, -0.5]), np.array([1.0, 0.0, 0.0]))
    array([1.  , 0.5 , 0.25])
    >>> lfilter([1.0, 1.0], np.array([2.0]), np.array([1.0, 2.0, 3.0]))
    array([0.5, 1.5, 2.5])
    """
    compiled, ndarray, f64 = _FAST_FILTER[0] if _FAST_FILTER else _fast_filter()
    if type(b) is list and all(type(v) is float for v in b):
        b = _as_float64(b)
    if (
        compiled is not None
        and type(a) is ndarray
        and type(b) is ndarray
        and type(x) is ndarray
        and a.ndim == 1
        and b.ndim == 1
        and a[0] != 0.0
        and a.dtype == f64
        and b.dtype == f64
        and x.dtype == f64
        and b.size > 0
    ):
        if a.size > 1 and (zi is None or (type(zi) is ndarray and zi.dtype == f64)):
            return compiled(b, a, x, axis) if zi is None else compiled(b, a, x, axis, zi)
        if a.size == 1 and zi is None:
            return _convolved(b / a[0], x, axis)
    return signal.lfilter(b, a, x, axis=axis, zi=zi)


def _as_float64(values: list):
    import numpy

    return numpy.array(values, dtype=numpy.float64)


def _convolved(kernel, x, axis: int):
    """scipy.signal.lfilter's path for ``len(a) == 1``: each lane of ``x`` along ``axis``
    convolved with ``kernel`` (``b / a[0]``), cut to the lane's length."""
    import numpy

    lanes = numpy.moveaxis(x, axis, -1)
    out = numpy.empty(lanes.shape)
    n = lanes.shape[-1]
    for index in numpy.ndindex(lanes.shape[:-1]):
        out[index] = numpy.convolve(kernel, lanes[index])[:n]
    return numpy.moveaxis(out, -1, axis)


_LBFGSB: list = []  # [scipy's compiled L-BFGS-B step or None], decided on the first call
#: scipy's texts for the codes its L-BFGS-B routine leaves in ``task`` (scipy.optimize._lbfgsb_py).
_LBFGSB_STATUS = {
    0: "START",
    1: "NEW_X",
    2: "RESTART",
    3: "FG",
    4: "CONVERGENCE",
    5: "STOP",
    6: "WARNING",
    7: "ERROR",
    8: "ABNORMAL",
}
_LBFGSB_TASK = {
    0: "",
    301: "",
    302: "",
    401: "NORM OF PROJECTED GRADIENT <= PGTOL",
    402: "RELATIVE REDUCTION OF F <= FACTR*EPSMCH",
    502: "TOTAL NO. OF F,G EVALUATIONS EXCEEDS LIMIT",
    503: "PROJECTED GRADIENT IS SUFFICIENTLY SMALL",
    504: "TOTAL NO. OF ITERATIONS REACHED LIMIT",
    601: "ROUNDING ERRORS PREVENT PROGRESS",
    602: "STP = STPMAX",
    603: "STP = STPMIN",
    604: "XTOL TEST SATISFIED",
}
_MAXCOR, _MAXLS, _MAXFUN = 10, 20, 15000  # scipy's defaults for method="L-BFGS-B"
_EPS = sys.float_info.epsilon  # np.finfo(float).eps, without numpy's finfo machinery


def minimize_lbfgsb(fun, x0, bounds, *, ftol: float, gtol: float, maxiter: int):
    """``scipy.optimize.minimize(fun, x0, method="L-BFGS-B", jac=True, bounds=bounds,
    options={"ftol": ftol, "gtol": gtol, "maxiter": maxiter})``, driving scipy's compiled step directly.

    ``fun(x)`` returns ``(value, gradient)``.  scipy's wrapper spends about 25 us per evaluation
    and 50 us per call on its function object, result objects and checks around its compiled
    routine (L-BFGS-B 3.0, Byrd, Lu, Nocedal and Zhu 1995 and Morales and Nocedal 2011, which
    scipy ships translated to C); the smoothing fits evaluate a 60 us objective some fifty times
    per fit, so they drive the routine here with the same reverse-communication loop.  The result
    is scipy's: the same iterates, ``x``, ``fun``, ``jac``, ``nfev``, ``nit``, ``status``,
    ``message`` and ``success`` (without ``hess_inv``).  On the first call the loop is checked
    against ``scipy.optimize.minimize`` on a small bounded problem; if it differs, or the routine
    is missing or takes other arguments (the loop follows scipy 1.17's), scipy's function is used
    for every call.

    Examples
    --------
    >>> import numpy as np
    >>> res = minimize_lbfgsb(lambda x: (float(x @ x), 2 * x), np.array([1.0, 2.0]), [(0.5, 3.0), (-1.0, 1.0)],
    ...                       ftol=1e-12, gtol=1e-10, maxiter=100)
    >>> res.x.tolist(), res.success
    ([0.5, 0.0], True)
    """
    if not _LBFGSB:
        _LBFGSB.append(_checked_lbfgsb_step())
    step = _LBFGSB[0]
    if step is None:
        return optimize.minimize(
            fun,
            x0,
            method="L-BFGS-B",
            jac=True,
            bounds=bounds,
            options={"ftol": ftol, "gtol": gtol, "maxiter": maxiter},
        )
    return _lbfgsb_loop(step, fun, x0, bounds, ftol, gtol, maxiter)


def _lbfgsb_loop(step, fun, x0, bounds, ftol, gtol, maxiter):
    """scipy.optimize._lbfgsb_py._minimize_lbfgsb's loop (as in scipy 1.17), without its wrappers.

    Like scipy's function object, a point is evaluated once: a request for the last point reuses
    its value and gradient (and is not counted in ``nfev``).
    """
    import numpy as np

    lo = np.array([-np.inf if b[0] is None else b[0] for b in bounds], dtype=np.float64)
    hi = np.array([np.inf if b[1] is None else b[1] for b in bounds], dtype=np.float64)
    x = np.clip(np.array(x0, dtype=np.float64).ravel(), lo, hi)
    n = x.size
    has_lo, has_hi = np.isfinite(lo), np.isfinite(hi)
    lower, upper = np.where(has_lo, lo, 0.0), np.where(has_hi, hi, 0.0)
    kinds = np.where(has_lo, np.where(has_hi, 2, 1), np.where(has_hi, 3, 0)).astype(np.int32)  # scipy's bound codes
    m = _MAXCOR
    f, g = np.array(0.0), np.zeros(n)
    work, iwork = np.zeros(2 * m * n + 5 * n + 11 * m * m + 8 * m), np.zeros(3 * n, np.int32)
    task, line_task = np.zeros(2, np.int32), np.zeros(2, np.int32)
    lsave, isave, dsave = np.zeros(4, np.int32), np.zeros(44, np.int32), np.zeros(29)
    factr = ftol / _EPS
    nfev = nit = 0
    last_x = None
    while True:
        step(m, x, lower, upper, kinds, f, g, factr, gtol, work, iwork, task, lsave, isave, dsave, _MAXLS, line_task)
        if task[0] == 3:  # evaluate at x
            here = x.tolist()  # compared as Python floats: as np.array_equal, at a fraction of its cost
            if here != last_x:
                last_x = here
                value, gradient = fun(x.copy())
                last_f, last_g = float(value), np.array(gradient, dtype=np.float64).ravel()
                nfev += 1
            f, g = last_f, last_g.copy()
        elif task[0] == 1:  # a new iterate
            nit += 1
            if nit >= maxiter:
                task[0], task[1] = 5, 504
            elif nfev > _MAXFUN:
                task[0], task[1] = 5, 502
        else:
            break
    status = 0 if task[0] == 4 else (1 if nfev > _MAXFUN or nit >= maxiter else 2)
    message = f"{_LBFGSB_STATUS.get(int(task[0]), task[0])}: {_LBFGSB_TASK.get(int(task[1]), task[1])}"
    return optimize.OptimizeResult(
        fun=f, jac=g, nfev=nfev, njev=nfev, nit=nit, status=status, message=message, x=x, success=status == 0
    )


def _checked_lbfgsb_step():
    """scipy's compiled L-BFGS-B step if :func:`_lbfgsb_loop` reproduces ``scipy.optimize.minimize`` with it
    on a bounded test problem (one bound active at the end), else None."""
    import numpy as np

    step = getattr(importlib.import_module("scipy.optimize._lbfgsb"), "setulb", None)
    if step is None:
        return None
    centre = np.array([0.3, -0.4, 2.0])

    def fun(x):
        d = x - centre
        return float(d @ d + (d[0] * d[1]) ** 2 + d[2] ** 4), 2 * d + np.array(
            [2 * d[0] * d[1] ** 2, 2 * d[1] * d[0] ** 2, 4 * d[2] ** 3]
        )

    x0, bounds = np.array([0.9, 0.5, 0.1]), [(0.0, 1.0), (None, 0.2), (-1.0, 1.5)]
    try:
        ours = _lbfgsb_loop(step, fun, x0, bounds, 1e-13, 1e-9, 500)
    except Exception:  # another signature: use scipy's function
        return None
    theirs = optimize.minimize(
        fun, x0, method="L-BFGS-B", jac=True, bounds=bounds, options={"ftol": 1e-13, "gtol": 1e-9, "maxiter": 500}
    )
    same = (
        np.array_equal(ours.x, theirs.x)
        and ours.fun == theirs.fun
        and np.array_equal(ours.jac, theirs.jac)
        and (ours.nfev, ours.nit, ours.status, ours.message) == (theirs.nfev, theirs.nit, theirs.status, theirs.message)
    )
    return step if same else None
