"""The registry: a YAML file of the policy, extract sources and model entries, read and validated.

Three layers, one module each:

* :mod:`.yaml_safety` reads the YAML as composed nodes: object-constructing tags, merge keys,
  duplicate keys and alias bombs are refused, and every value keeps its line.
* :mod:`.schema` states what a registry may say, once, as strict pydantic models (bounds from
  :data:`fitaudit.core.vocabulary.SETTING_BOUNDS`, cross-field rules as model validators);
  ``fitaudit registry schema`` prints it as JSON Schema.  The validated models are the values
  the rest of fitaudit uses: a :class:`ModelEntry` builds its own audit settings
  (:meth:`ModelEntry.audit_settings`) and noise law (:meth:`ModelEntry.noise_law`).
* :mod:`.problems` writes every problem as ``file:line: field: message``, the line being the one a
  person would edit, e.g. ``registry.yaml:14: models[2].spec.order: ...``; unknown keys suggest
  the closest valid key.

:mod:`.loader` ties them together and decides which problems refuse the run (registry-level) and
which reject one entry (entry-level); see :func:`load_registry`.

Schema (version 1)
------------------
``version: 1``; ``policy`` (thresholds fixed before the run, with ``justification`` and
``approved_by``); ``sources`` (name -> ``uri``, ``key``, ``time``, ``value``, ``exogenous``,
``forecasts``, ``frequency``, ``partitioning``); ``models`` (a list of entries with ``id``, ``owner``, ``tier``,
``description``, ``source``, ``series``, ``value``, ``exogenous``, ``spec``, ``noise``,
``windows``, ``settings``, ``last_validated``; or, for forecasts made elsewhere, ``forecasts``
and ``windows: {audit, history}`` instead of ``exogenous``, ``spec`` and ``noise``: a
:class:`ForecastEntry`).  :data:`FREQUENCIES` lists the frequency codes.
"""

from __future__ import annotations

from .loader import (
    Registry,
    RejectedEntry,
    check_registry,
    load_registry,
    parse_registry,
    require_digest,
)
from .problems import RegistryChangedError, RegistryError, RegistryProblem
from .schema import (
    FREQUENCIES,
    MAX_ID_LENGTH,
    SAFE_ID,
    EntryBase,
    ForecastEntry,
    Forecasts,
    ForecastWindows,
    ModelEntry,
    ModelSettings,
    Noise,
    Persistence,
    Policy,
    RegistryDocument,
    RegistryEntry,
    SourceEntry,
    Windows,
    entry_from_dict,
    is_safe_id,
    registry_json_schema,
)

__all__ = [
    "SAFE_ID",
    "MAX_ID_LENGTH",
    "FREQUENCIES",
    "is_safe_id",
    "RegistryProblem",
    "RegistryError",
    "RegistryChangedError",
    "Policy",
    "Persistence",
    "SourceEntry",
    "Noise",
    "Windows",
    "ModelSettings",
    "EntryBase",
    "ModelEntry",
    "Forecasts",
    "ForecastWindows",
    "ForecastEntry",
    "RegistryEntry",
    "RegistryDocument",
    "RejectedEntry",
    "Registry",
    "entry_from_dict",
    "registry_json_schema",
    "parse_registry",
    "load_registry",
    "check_registry",
    "require_digest",
    "load_registry_task",
]


def __getattr__(name: str):
    """``load_registry_task`` on first use: its module imports Prefect, which checking a registry does not need."""
    if name == "load_registry_task":
        from .task import load_registry_task

        globals()[name] = load_registry_task
        return load_registry_task
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
