"""What reading a source gives: series, their problems, fingerprints, and the source-level error."""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass, field

import numpy as np

from fitaudit.core.exceptions import FitauditError

from .formatting import _iso

__all__ = ["ExtractError", "FileFingerprint", "ExtractFingerprint", "SeriesProblem", "SeriesData"]


class ExtractError(FitauditError):
    """A whole source cannot be opened (missing path, no readable file, no key or time column).

    The message names the source, its URI and the fix; every model of the source gets an
    ``error`` verdict with it, the other sources go on.
    """


@dataclass(frozen=True)
class FileFingerprint:
    """One file of a source: its path (as the file system names it), size in bytes and SHA-256."""

    path: str
    size: int
    sha256: str

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {"path": self.path, "size": self.size, "sha256": self.sha256}


@dataclass(frozen=True)
class ExtractFingerprint:
    """What a source held when it was read (data lineage for the manifest).

    ``rows`` counts the rows of the readable files; ``time_min``/``time_max`` are the UTC
    timestamps (ISO 8601, seconds) over all series; ``unreadable`` lists files that are not
    readable Parquet (they are still hashed); ``digest`` is the SHA-256 of the canonical JSON list
    of ``[relative path, size, sha256]`` of every file, so it depends on content and layout, not
    on where the source folder lives.
    """

    source: str
    uri: str
    files: tuple[FileFingerprint, ...]
    rows: int
    time_min: str | None
    time_max: str | None
    columns: tuple[str, ...]
    unreadable: tuple[str, ...]
    digest: str

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {
            "source": self.source,
            "uri": self.uri,
            "files": [f.to_dict() for f in self.files],
            "rows": self.rows,
            "time_min": self.time_min,
            "time_max": self.time_max,
            "columns": list(self.columns),
            "unreadable": list(self.unreadable),
            "digest": self.digest,
        }


@dataclass(frozen=True)
class SeriesProblem:
    """A problem with one series.

    ``severity`` is ``"error"`` (the model gets an ``error`` verdict) or ``"insufficient"`` (too
    little data). ``column`` names the column concerned when the problem is about one column
    only, so that a model not using that column is not affected; None means the whole series.
    """

    key: str
    kind: str
    severity: str
    message: str
    column: str | None = None

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {
            "key": self.key,
            "kind": self.kind,
            "severity": self.severity,
            "message": self.message,
            "column": self.column,
        }


@dataclass(frozen=True)
class SeriesData:
    """One series as read: UTC-naive timestamps, float64 columns, and its problems."""

    source: str
    key: str
    time: np.ndarray
    columns: dict
    problems: tuple[SeriesProblem, ...] = field(default=())

    def problems_for(self, columns: Iterable[str]) -> tuple[SeriesProblem, ...]:
        """The problems that concern a model using ``columns`` (whole-series ones included)."""
        wanted = set(columns)
        return tuple(p for p in self.problems if p.column is None or p.column in wanted)

    def length_problem(self, min_length: int) -> SeriesProblem | None:
        """An ``insufficient`` problem when the series has fewer than ``min_length`` rows."""
        return _too_short(self.key, self.source, len(self.time), min_length)

    def to_dict(self) -> dict:
        """Lineage view: rows and first/last timestamp (no data)."""
        return {
            "source": self.source,
            "key": self.key,
            "rows": int(self.time.size),
            "first": _iso(self.time[0]) if self.time.size else None,
            "last": _iso(self.time[-1]) if self.time.size else None,
            "columns": sorted(self.columns),
            "problems": [p.to_dict() for p in self.problems],
        }


def _too_short(key: str, source: str, n: int, min_length: int) -> SeriesProblem | None:
    if n >= min_length:
        return None
    return SeriesProblem(
        key,
        "too-short",
        "insufficient",
        f"source {source!r}, series {key!r}: {n} observation(s), but at least {min_length} are needed for the "
        "registered windows and model orders. Fix: extend the extract's history, or shorten the windows in the "
        "registry.",
    )
