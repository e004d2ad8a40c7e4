"""Backfill: audit past as-of dates so that trends and persistence exist from day one."""

from __future__ import annotations

import datetime as dt

from prefect import flow

from .audit import audit_flow

__all__ = ["backfill_flow", "as_of_dates"]


def as_of_dates(start: dt.date, end: dt.date, every_days: int = 7) -> list[dt.date]:
    """``start, start + every, ...`` up to and including ``end`` (oldest first)."""
    if every_days < 1:
        raise ValueError(f"every_days must be at least 1; got {every_days}")
    if end < start:
        raise ValueError(f"the backfill ends ({end}) before it starts ({start})")
    out, day = [], start
    while day <= end:
        out.append(day)
        day += dt.timedelta(days=every_days)
    return out


@flow(name="fitaudit-backfill", persist_result=False, log_prints=False)
def backfill_flow(
    registry: str, start: dt.date, end: dt.date, every_days: int = 7, archive: str | None = None, batch_size: int = 0
) -> list[dict]:
    """Run :func:`audit_flow` for each as-of date from ``start`` to ``end``, oldest first.

    Each audit sees the verdicts of the earlier ones (history, movement, persistence), exactly as
    weekly runs would have.
    """
    return [
        audit_flow(registry=registry, as_of=day, archive=archive, batch_size=batch_size)
        for day in as_of_dates(start, end, every_days)
    ]
