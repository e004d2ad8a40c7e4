"""Frequency codes a source may declare, defined once: meaning, time grid and longest period.

The registry accepts the codes of :data:`FREQUENCIES` (its messages quote the meanings), the
extract reader checks timestamps against each code's grid (:data:`FIXED_STEPS` for steps of fixed
length, :data:`CALENDAR_STEPS` for month and quarter ends or starts) and staging reads
``FREQUENCY_DAYS[code]`` days per observation back from the as-of date.  All of them are views of
one table, :data:`FREQUENCY_TABLE`; a new code is one line there.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = [
    "Frequency",
    "FREQUENCY_TABLE",
    "FREQUENCIES",
    "FREQUENCY_DAYS",
    "FIXED_STEPS",
    "CALENDAR_STEPS",
    "SUBDAILY",
]


@dataclass(frozen=True)
class Frequency:
    """One frequency code.

    Parameters
    ----------
    code : str
        What a source entry writes (``frequency: D``).
    meaning : str
        The grid in words, for messages.
    max_days : float
        Upper bound of one period in days (31 for a month, 92 for a quarter), for the time range
        staging reads.
    step : numpy.timedelta64 or None
        The fixed step of the grid; None for calendar frequencies.
    months : int
        Months per step of a calendar frequency (0 for a fixed step).
    anchor : {"", "start", "end"}
        Whether a calendar frequency stamps the first or the last day of its month.
    """

    code: str
    meaning: str
    max_days: float
    step: np.timedelta64 | None = None
    months: int = 0
    anchor: str = ""


#: Every frequency code, by code.
FREQUENCY_TABLE: dict[str, Frequency] = {
    f.code: f
    for f in (
        Frequency("15min", "every 15 minutes", 1 / 96, step=np.timedelta64(15, "m")),
        Frequency("30min", "every 30 minutes", 1 / 48, step=np.timedelta64(30, "m")),
        Frequency("H", "hourly", 1 / 24, step=np.timedelta64(1, "h")),
        Frequency("D", "daily", 1, step=np.timedelta64(1, "D")),
        Frequency("W", "weekly (every 7 days, any weekday)", 7, step=np.timedelta64(7, "D")),
        Frequency("MS", "monthly, on the first day of the month", 31, months=1, anchor="start"),
        Frequency("M", "monthly, on the last day of the month", 31, months=1, anchor="end"),
        Frequency("QS", "quarterly, on 1 January, April, July and October", 92, months=3, anchor="start"),
        Frequency("Q", "quarterly, on 31 March, 30 June, 30 September and 31 December", 92, months=3, anchor="end"),
    )
}

#: Frequency codes a source may declare, with their meaning (gaps are checked against them).
FREQUENCIES: dict[str, str] = {code: f.meaning for code, f in FREQUENCY_TABLE.items()}

#: Upper bound of one period of each frequency, in days (for the time range to read).
FREQUENCY_DAYS: dict[str, float] = {code: f.max_days for code, f in FREQUENCY_TABLE.items()}

#: The step of each fixed-length grid.
FIXED_STEPS: dict[str, np.timedelta64] = {code: f.step for code, f in FREQUENCY_TABLE.items() if f.step is not None}

#: ``(months per step, "start" or "end")`` of each calendar grid.
CALENDAR_STEPS: dict[str, tuple[int, str]] = {
    code: (f.months, f.anchor) for code, f in FREQUENCY_TABLE.items() if f.step is None
}

#: Codes whose step is shorter than a day (their timestamps carry a time of day).
SUBDAILY: tuple[str, ...] = tuple(code for code, step in FIXED_STEPS.items() if step < np.timedelta64(1, "D"))
