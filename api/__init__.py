"""fitaudit: weekly goodness-of-fit audits of registered forecasting models.

The public surface for notebooks and scripts:

* :func:`audit_series` and :class:`AuditSettings`: audit one series against its model entry
  (production and refit checks, verdict);
* :func:`audit_forecasts`: audit forecasts made elsewhere against their stated predictive
  distributions (mean and scale, a count law, or quantiles; no refit check);
* :func:`divergence_map` and :func:`scaled_bregman`: the family of scaled Bregman divergences
  that scores the checks;
* :func:`locate_change`: the most likely break in a series of forecast errors;
* :func:`load_results`: a published run's verdicts and checks as pandas DataFrames.

Everything else lives in the subpackages: ``fitaudit.core`` (pure computation),
``fitaudit.tasks`` (the stages' I/O and Prefect tasks), ``fitaudit.flows`` (the flows and the
``fitaudit`` command).  Names are imported on first use, so ``import fitaudit.flows.cli`` does not
load numpy, scipy or pandas before it needs them, and Prefect is configured before it is imported.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from fitaudit.core.audit import AuditSettings, audit_series
    from fitaudit.core.change import locate_change
    from fitaudit.core.divergence import divergence_map, scaled_bregman
    from fitaudit.core.forecasts import audit_forecasts
    from fitaudit.tasks.frames import load_results

__all__ = [
    "audit_series",
    "audit_forecasts",
    "AuditSettings",
    "divergence_map",
    "scaled_bregman",
    "locate_change",
    "load_results",
]

#: Where each public name is defined.
_HOMES = {
    "audit_series": "fitaudit.core.audit",
    "audit_forecasts": "fitaudit.core.forecasts",
    "AuditSettings": "fitaudit.core.audit",
    "divergence_map": "fitaudit.core.divergence",
    "scaled_bregman": "fitaudit.core.divergence",
    "locate_change": "fitaudit.core.change",
    "load_results": "fitaudit.tasks.frames",
}


def __getattr__(name: str):
    if name == "__version__":  # read on first use: importlib.metadata costs every command ~30 ms
        from importlib import metadata

        value = globals()["__version__"] = metadata.version("fitaudit")
        return value
    if name in _HOMES:
        value = getattr(importlib.import_module(_HOMES[name]), name)
        globals()[name] = value  # later look-ups skip this function
        return value
    raise AttributeError(f"module 'fitaudit' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted({*globals(), *__all__})
