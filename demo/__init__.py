"""The demo: an invented water board's forecasting fleet and its data, for ``fitaudit demo`` and the tests.

Everything here is our own fiction, generated from a fixed seed (:mod:`fitaudit.demo.scenario` says what
is planted); the audit itself never imports this package (docs/architecture.md §1).
"""

from __future__ import annotations

from .scenario import DEMO_AS_OF, DEMO_START, demo_as_of_dates, write_demo

__all__ = ["DEMO_AS_OF", "DEMO_START", "write_demo", "demo_as_of_dates"]
