"""Extracts: reading series from Parquet sources, fingerprinting them, validating every series.

Modules: :mod:`.stores` (where the files are: local paths and object stores), :mod:`.reading`
(:func:`read_series`), :mod:`.conversion` (Arrow columns to numpy, the pushed-down filter),
:mod:`.validation` (:func:`series_problems`, the grid checks), :mod:`.fingerprints`
(:func:`fingerprint_source`, :class:`FingerprintCache`), :mod:`.records` (what they return) and
:mod:`.credentials` (:class:`ObjectStoreCredentials`, a Prefect Block for an object store's credentials).

A source (see :class:`~fitaudit.tasks.registry.SourceEntry`) is a Parquet file, a folder of
Parquet files, a hive-partitioned folder, or a URI that :func:`pyarrow.fs.FileSystem.from_uri`
understands (``file://``, ``s3://``, ...); relative paths resolve against the registry's folder.
The data are in long format: one row per (series key, timestamp) with the value and exogenous
columns.

:func:`read_series` scans a source once for all the series (keys) its models need, reading only
the needed columns, with the key filter (and the time range, when the time column is a
timestamp) pushed down to the scan.  Files that cannot be read are skipped and named; the other
files go on.  When the files disagree (a column missing in some, different types, time-zone-aware
timestamps in some and naive in others) they are read one by one and the disagreement is reported
on the series it touches.  Timestamps come back as UTC-naive ``datetime64[ns]``; time-zone-aware
timestamps are converted to UTC, naive ones are taken as they are.

Every series is validated by :func:`series_problems`: duplicate timestamps, rows out of time
order (in the order stored: files in path order, rows in file order), timestamps off the declared
frequency's grid and gaps, NaN/inf or missing target values, missing exogenous values, and (on
request) too few observations.  Each problem names the rows (timestamps and row positions) and the
fix; ``error`` problems become that model's ``error`` verdict, ``insufficient`` ones its
``insufficient`` verdict.  Large finite values (1e300) pass: the numerics deal with scale.

:func:`fingerprint_source` records what was read for the manifest: every file's path, size and
SHA-256, the rows, the time range, the columns, and the unreadable files.  With a
:class:`FingerprintCache` (staging keeps one in the archive) a file's SHA-256 is computed once per
version, the version being its path, size and modification time; a file modified within
:data:`RACY_SECONDS` of its hashing is hashed again next time (its timestamp cannot tell a later
write in the same tick apart).
"""

from .fingerprints import RACY_SECONDS, FingerprintCache, fingerprint_source
from .reading import read_series
from .records import ExtractError, ExtractFingerprint, FileFingerprint, SeriesData, SeriesProblem
from .validation import series_problems

__all__ = [
    "ExtractError",
    "FileFingerprint",
    "ExtractFingerprint",
    "SeriesProblem",
    "SeriesData",
    "fingerprint_source",
    "FingerprintCache",
    "RACY_SECONDS",
    "read_series",
    "series_problems",
    "ObjectStoreCredentials",
]


def __getattr__(name: str):
    # the Block imports Prefect: loaded when asked for (``fitaudit registry check`` stays light)
    if name == "ObjectStoreCredentials":
        from .credentials import ObjectStoreCredentials

        return ObjectStoreCredentials
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
