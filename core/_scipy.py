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

__all__ = ["LazyModule", "blas", "integrate", "lapack", "optimize", "signal", "special", "stats"]


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
