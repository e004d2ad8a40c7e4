"""Run-level helpers: multiplicity adjustment across an audit run and the persistence rule.

They live in :mod:`fitaudit.core.verdict` with the rest of the fleet rules (``apply_fleet_rules``)
and the verdicts they change; this module keeps their names importable from here.
"""

from __future__ import annotations

from .verdict import adjust_pvalues, escalate_persistent_refit

__all__ = ["adjust_pvalues", "escalate_persistent_refit"]
