"""fitaudit.core: pure computation (standard library, numpy and scipy only).

Divergences, cells, noise laws, calibration, diagnostics, change location, model families and
the audit protocol.  Nothing here does I/O or keeps global state.
"""

from .divergence import DivergenceMap, divergence_map, power_generator, scaled_bregman

__all__ = ["DivergenceMap", "divergence_map", "power_generator", "scaled_bregman"]
