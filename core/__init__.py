"""fitaudit.core: pure computation (standard library, numpy and scipy only).

Divergences, cells, noise laws, calibration, diagnostics, change location, model families and
the audit protocol.  Nothing here does I/O or keeps global state.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from .divergence import DivergenceMap, divergence_map, power_generator, scaled_bregman

__all__ = ["DivergenceMap", "divergence_map", "power_generator", "scaled_bregman"]


def __getattr__(name: str):
    """The names of ``__all__`` on first use (PEP 562), so that importing a light submodule such as
    ``fitaudit.core.vocabulary`` (the command line does) does not load numpy and scipy."""
    if name in __all__:
        value = getattr(importlib.import_module(".divergence", __name__), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
