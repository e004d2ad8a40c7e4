"""Validation of one series: duplicates, time order, the declared calendar's grid and gaps, values."""

from __future__ import annotations

from collections.abc import Iterable, Mapping

import numpy as np

from fitaudit.core.exceptions import InputError

from ..frequencies import FIXED_STEPS, FREQUENCIES, SUBDAILY, calendar_offset, canonical_frequency
from .formatting import _NS, _SHOW, _iso, _listing, _stamps
from .records import SeriesProblem, _too_short

__all__ = ["series_problems"]


def series_problems(
    key: str,
    time: np.ndarray,
    columns: Mapping[str, np.ndarray],
    frequency: str,
    *,
    source: str,
    min_length: int = 0,
    exogenous: Iterable[str] = (),
    holidays: Iterable[str] = (),
) -> list[SeriesProblem]:
    """Validate one series; every problem names the rows concerned and the fix.

    Parameters
    ----------
    key : str
        Series key (for messages).
    time : ndarray of datetime64
        Timestamps in stored order.
    columns : mapping of str to ndarray
        Target and exogenous values aligned with ``time``.
    frequency : str
        A code of :data:`fitaudit.tasks.frequencies.FREQUENCIES` (or an alias of
        :data:`~fitaudit.tasks.frequencies.ALIASES`).
    source : str
        Source name (for messages).
    min_length : int
        Fewest observations a model needs; fewer gives an ``insufficient`` problem.
    exogenous : iterable of str
        Columns that are exogenous inputs (their missing values are reported as such).
    holidays : iterable of str
        ISO dates business days (``B``) skip, as the source declares them.

    Returns
    -------
    list of SeriesProblem
        Kinds: ``too-short`` (insufficient), ``duplicate-time``, ``unsorted``, ``off-grid``,
        ``gap``, ``non-finite``, ``missing-exogenous`` (errors).
    """
    frequency = canonical_frequency(frequency)
    if frequency not in FREQUENCIES:
        raise InputError(f"frequency {frequency!r} is not one of {_listing(FREQUENCIES)}")
    time = np.asarray(time).astype(_NS)
    prefix = f"source {source!r}, series {key!r}: "
    problems = []
    short = _too_short(key, source, time.size, min_length)
    if short is not None:
        problems.append(short)
    checks = (_duplicates(time), _unsorted(time), *_grid_problems(time, frequency, tuple(holidays)))
    problems += [SeriesProblem(key, kind, "error", prefix + message) for kind, message in checks if message]
    exogenous = set(exogenous)
    for name, values in columns.items():
        message = _non_finite(time, np.asarray(values, dtype=float), name, name in exogenous)
        if message:
            kind = "missing-exogenous" if name in exogenous else "non-finite"
            problems.append(SeriesProblem(key, kind, "error", prefix + message, name))
    return problems


def _duplicates(time: np.ndarray) -> tuple[str, str]:
    values, counts = np.unique(time, return_counts=True)
    dup = values[counts > 1]
    if not dup.size:
        return "duplicate-time", ""
    shown = []
    for value in dup[:_SHOW]:
        rows = np.flatnonzero(time == value)
        shown.append(f"{_iso(value)} (rows {', '.join(map(str, rows[:_SHOW]))})")
    more = f" and {dup.size - _SHOW} more" if dup.size > _SHOW else ""
    return "duplicate-time", (
        f"{dup.size} timestamp(s) appear more than once: {'; '.join(shown)}{more}. "
        "Fix: keep one row per series and timestamp in the extract."
    )


def _unsorted(time: np.ndarray) -> tuple[str, str]:
    back = np.flatnonzero(time[1:] < time[:-1]) + 1
    if not back.size:
        return "unsorted", ""
    shown = "; ".join(f"row {i} ({_iso(time[i])}) follows row {i - 1} ({_iso(time[i - 1])})" for i in back[:_SHOW])
    return "unsorted", (
        f"{back.size} row(s) out of time order: {shown}. "
        "Fix: sort the extract by series key and time before writing it."
    )


def _grid_problems(time: np.ndarray, frequency: str, holidays: tuple = ()) -> list[tuple[str, str]]:
    """Off-grid timestamps and gaps against the declared frequency (on the sorted distinct times)."""
    t = _distinct_sorted(time[~np.isnat(time)])
    if t.size < 2:
        return []
    index, on_grid, to_time = _grid_index(t, frequency, holidays)
    name = f"frequency {frequency!r} ({FREQUENCIES[frequency]}" + (
        f"; {len(holidays)} holiday(s) declared)" if holidays else ")"
    )
    out = []
    off = t[~on_grid]
    if off.size:
        dst = (
            ""
            if frequency in SUBDAILY
            else (
                " (Time-zone-aware local timestamps shift by an hour in UTC across daylight-saving changes: store "
                "daily and coarser data as dates.)"
            )
        )
        out.append(
            (
                "off-grid",
                f"{off.size} timestamp(s) are off the grid of {name}: {_stamps(off)}. "
                f"Fix: align the timestamps to the grid in the extract, or correct the registered frequency.{dst}",
            )
        )
    idx = index[on_grid]
    if idx.size >= 2:
        steps = np.diff(idx)
        holes = np.flatnonzero(steps > 1)
        n_missing = int((steps[holes] - 1).sum())
        if n_missing:
            first = []
            for h in holes:
                first.extend(range(int(idx[h]) + 1, min(int(idx[h + 1]), int(idx[h]) + 1 + _SHOW - len(first))))
                if len(first) >= _SHOW:
                    break
            out.append(
                (
                    "gap",
                    f"{n_missing} timestamp(s) missing against {name}, first: {_stamps(to_time(np.array(first)))}. "
                    "Fix: fill the gaps in the extract (impute and flag the rows), or correct the registered "
                    "frequency.",
                )
            )
    return out


def _distinct_sorted(t: np.ndarray) -> np.ndarray:
    """``np.unique(t)``; for times already in order (the usual case) without sorting them again.

    >>> x = np.array(["2026-01-02", "2026-01-01", "2026-01-02"], dtype="datetime64[D]")
    >>> _distinct_sorted(x).tolist() == _distinct_sorted(np.sort(x)).tolist() == np.unique(x).tolist()
    True
    """
    if t.size < 2 or not (t[1:] >= t[:-1]).all():
        return np.unique(t)
    keep = np.empty(t.size, dtype=bool)
    keep[0] = True
    np.not_equal(t[1:], t[:-1], out=keep[1:])
    return t[keep]


def _grid_index(t: np.ndarray, frequency: str, holidays: tuple = ()):
    """(grid position of each time, on-grid mask, function from positions back to times)."""
    if frequency in FIXED_STEPS:
        step = FIXED_STEPS[frequency].astype("timedelta64[ns]").astype(np.int64)
        ns = t.astype(np.int64)
        residue = ns % step
        on_grid = residue == residue[0]
        if on_grid.all():  # the usual case: every time on one grid
            anchor = int(residue[0])
        else:  # the grid most times are on
            residues, counts = np.unique(residue, return_counts=True)
            anchor = int(residues[np.argmax(counts)])
            on_grid = residue == anchor
        base = ns[on_grid][0]
        index = (ns - base) // step

        def to_time(positions):
            return (base + positions.astype(np.int64) * step).astype(_NS)

        return index, on_grid, to_time
    # a calendar: pandas' own grid (business days with holidays, anchored weeks, month, quarter and
    # year starts or ends) from the first grid date on or after the first timestamp to the last
    import pandas as pd

    offset = calendar_offset(frequency, holidays)
    first = offset.rollforward(pd.Timestamp(t[0]).normalize())
    grid = pd.date_range(first, pd.Timestamp(t[-1]), freq=offset).as_unit("ns").to_numpy().astype(_NS)
    if not grid.size:
        return np.zeros(t.size, dtype=np.int64), np.zeros(t.size, dtype=bool), lambda positions: grid[positions]
    index = np.searchsorted(grid, t)
    on_grid = grid[np.minimum(index, grid.size - 1)] == t

    def to_time(positions):
        return grid[positions.astype(np.int64)]

    return index, on_grid, to_time


def _non_finite(time: np.ndarray, values: np.ndarray, name: str, exogenous: bool) -> str:
    bad = ~np.isfinite(values)
    if not bad.any():
        return ""
    nan, inf = int(np.isnan(values).sum()), int(np.isinf(values).sum())
    parts = [f"{nan} missing or NaN"] if nan else []
    parts += [f"{inf} infinite"] if inf else []
    rows = np.flatnonzero(bad)
    where = f"at {_stamps(time[rows])} (rows {', '.join(map(str, rows[:_SHOW]))})"
    if exogenous:
        return (
            f"exogenous column {name!r} has {' and '.join(parts)} value(s) {where}. Fix: fill them in the extract, "
            "or remove the column from the model's exogenous inputs."
        )
    return (
        f"column {name!r} has {' and '.join(parts)} value(s) {where}. Fix: impute or remove these rows in the extract "
        "(the audit does not fill values)."
    )
