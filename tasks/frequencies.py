"""Frequency codes a source may declare, defined once: meaning, time grid, season and longest period.

The registry accepts the codes of :data:`FREQUENCIES` (its messages quote the meanings) and the older
pandas spellings of :data:`ALIASES` (``H``, ``M``, ``Q``, ``A``, ...), which it rewrites to today's
codes (``h``, ``ME``, ``QE``, ``YE``).  The extract reader checks timestamps against each code's grid:
:data:`FIXED_STEPS` for steps of fixed length and, for calendar codes (business days, weekly on an
anchor day, month, quarter and year starts or ends), the pandas offset of :func:`calendar_offset`
(pandas' own calendar, holidays included).  Staging reads ``FREQUENCY_DAYS[code]`` days per
observation back from the as-of date.  All of them are views of one table,
:data:`FREQUENCY_TABLE`; a new code is one line there.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

__all__ = [
    "Frequency",
    "FREQUENCY_TABLE",
    "FREQUENCIES",
    "ALIASES",
    "FREQUENCY_DAYS",
    "FIXED_STEPS",
    "CALENDAR_CODES",
    "SUBDAILY",
    "SEASONS",
    "canonical_frequency",
    "calendar_offset",
    "default_staleness",
    "periods_after",
]


@dataclass(frozen=True)
class Frequency:
    """One frequency code.

    Parameters
    ----------
    code : str
        What a source entry writes (``frequency: D``); today's pandas spelling.
    meaning : str
        The grid in words, for messages.
    max_days : float
        Days per observation, an upper bound over any run of observations (31 for a month, 92 for
        a quarter; for business days 7/5 plus room for holidays), for the time range staging reads.
    step : numpy.timedelta64 or None
        The fixed step of the grid; None for calendar frequencies (their grid is the pandas
        offset ``code``).
    season : int
        The calendar's own seasonal period (5 business days a week, 7 days a week, 12 months, 4
        quarters; 1 when it has none), for the model entries' seasonal periods to be checked against.
    """

    code: str
    meaning: str
    max_days: float
    step: np.timedelta64 | None = None
    season: int = 1


_DAYS = ("MON", "TUE", "WED", "THU", "FRI", "SAT", "SUN")

#: Every frequency code, by code.
FREQUENCY_TABLE: dict[str, Frequency] = {
    f.code: f
    for f in (
        Frequency("15min", "every 15 minutes", 1 / 96, step=np.timedelta64(15, "m"), season=96),
        Frequency("30min", "every 30 minutes", 1 / 48, step=np.timedelta64(30, "m"), season=48),
        Frequency("h", "hourly", 1 / 24, step=np.timedelta64(1, "h"), season=24),
        Frequency("D", "daily", 1, step=np.timedelta64(1, "D"), season=7),
        Frequency("B", "business days (Monday to Friday; the source's holidays skipped)", 1.5, season=5),
        Frequency("W", "weekly (every 7 days, any weekday)", 7, step=np.timedelta64(7, "D"), season=52),
        *(Frequency(f"W-{day}", f"weekly, every {day.title()}", 7, season=52) for day in _DAYS),
        Frequency("MS", "monthly, on the first day of the month", 31, season=12),
        Frequency("ME", "monthly, on the last day of the month", 31, season=12),
        Frequency("QS", "quarterly, on 1 January, April, July and October", 92, season=4),
        Frequency("QE", "quarterly, on 31 March, 30 June, 30 September and 31 December", 92, season=4),
        Frequency("YS", "annual, on 1 January", 366),
        Frequency("YE", "annual, on 31 December", 366),
    )
}

#: Older pandas spellings accepted for today's codes (pandas 2.2 deprecated them).
ALIASES: dict[str, str] = {
    "H": "h",
    "15T": "15min",
    "30T": "30min",
    "M": "ME",
    "Q": "QE",
    "A": "YE",
    "Y": "YE",
    "AS": "YS",
    "QS-JAN": "QS",
    "Q-DEC": "QE",
    "QE-DEC": "QE",
    "A-DEC": "YE",
    "YE-DEC": "YE",
    "AS-JAN": "YS",
    "YS-JAN": "YS",
}

#: Frequency codes a source may declare, with their meaning (gaps are checked against them).
FREQUENCIES: dict[str, str] = {code: f.meaning for code, f in FREQUENCY_TABLE.items()}

#: Days per observation of each frequency, an upper bound (for the time range to read).
FREQUENCY_DAYS: dict[str, float] = {code: f.max_days for code, f in FREQUENCY_TABLE.items()}

#: The step of each fixed-length grid.
FIXED_STEPS: dict[str, np.timedelta64] = {code: f.step for code, f in FREQUENCY_TABLE.items() if f.step is not None}

#: Codes whose grid is a calendar (a pandas offset): business days, anchored weeks, months, quarters, years.
CALENDAR_CODES: tuple[str, ...] = tuple(code for code, f in FREQUENCY_TABLE.items() if f.step is None)

#: Codes whose step is shorter than a day (their timestamps carry a time of day).
SUBDAILY: tuple[str, ...] = tuple(code for code, step in FIXED_STEPS.items() if step < np.timedelta64(1, "D"))

#: The calendar's own seasonal period of each code (1: none).
SEASONS: dict[str, int] = {code: f.season for code, f in FREQUENCY_TABLE.items()}


def canonical_frequency(code: object) -> object:
    """Today's spelling of a frequency code (``M`` gives ``ME``); anything else is returned as given."""
    return ALIASES.get(code, code) if isinstance(code, str) else code


def calendar_offset(code: str, holidays: Iterable[str] = ()):
    """The pandas offset of a calendar code, with the source's holidays for business days.

    Parameters
    ----------
    code : str
        One of :data:`CALENDAR_CODES` (aliases are accepted).
    holidays : iterable of str
        ISO dates skipped by business days (``B``); must be empty for other codes.

    Returns
    -------
    pandas.DateOffset
        ``pandas.tseries.frequencies.to_offset(code)``, or ``CustomBusinessDay(holidays=...)``.
    """
    import pandas as pd  # pandas is a runtime dependency; imported here to keep registry loading light

    code = canonical_frequency(code)
    if code not in CALENDAR_CODES:
        raise ValueError(f"frequency {code!r} has a fixed step, not a calendar")
    holidays = tuple(holidays)
    if holidays and code != "B":
        raise ValueError(f"holidays apply to business days ('B') only, not to {code!r}")
    if holidays:
        return pd.offsets.CustomBusinessDay(holidays=list(holidays))
    return pd.tseries.frequencies.to_offset(code)


def default_staleness(code: str) -> int:
    """Periods a source may lag behind the as-of date when it sets no ``max_staleness``.

    One period of the calendar (the as-of day's own observation may still be on its way), and
    for grids finer than a day one day's worth of periods (96 for ``15min``, 24 for ``h``).
    """
    step = FIXED_STEPS.get(canonical_frequency(code))
    if step is not None and step < np.timedelta64(1, "D"):
        return int(np.timedelta64(1, "D") // step)
    return 1


def periods_after(code: str, last: np.datetime64, end: np.datetime64, holidays: Iterable[str] = ()) -> int:
    """Grid periods of ``code`` after the timestamp ``last``, up to and including ``end``.

    For a fixed step, ``floor((end - last) / step)``; for a calendar, the dates of pandas'
    ``date_range`` from the day after ``last`` to ``end`` (weekends and the source's holidays
    skipped for business days).  Zero when ``last`` is at or after ``end``.
    """
    code = canonical_frequency(code)
    last, end = np.datetime64(last, "ns"), np.datetime64(end, "ns")
    if last >= end:
        return 0
    if code in FIXED_STEPS:
        return int((end - last) // FIXED_STEPS[code].astype("timedelta64[ns]"))
    import pandas as pd

    start = pd.Timestamp(last).normalize() + pd.Timedelta(days=1)
    return int(pd.date_range(start, pd.Timestamp(end), freq=calendar_offset(code, holidays)).size)
