"""Cost of fingerprinting a source on the first run (cold cache) and on the next (warm cache).

The extract is one Parquet file of 10,000 daily series of 730 days (7.3 million rows: a text key,
a date and a day's revenue in float64, as warehouses export them; about 60 MB), written to
a temporary folder and dated an hour back (past the cache's racy window).  The first call of
:func:`~fitaudit.tasks.extracts.fingerprint_source` hashes every byte and fills a
:class:`~fitaudit.tasks.extracts.FingerprintCache`; the second, with the cache read back from its
file as a later run (or a one-model refit) would, takes the digest and the file's time range from
the cache and reads only the footer (the manifest's row count and columns).  Both runs happen in
the same process, with the file in the page cache alike, so the ratio is the hashing saved, not
the disk.  ``--quick``: 1,000 series.
"""

from __future__ import annotations

import os
import pathlib
import tempfile
import time

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from fitaudit.tasks.extracts import FingerprintCache, fingerprint_source
from fitaudit.tasks.registry import SourceEntry

N_DAYS = 730
SERIES = 10_000
PER_GROUP = 1_000  # series per row group (and per write, so memory stays small)
GOAL = 5.0  # the second run at least this many times faster than the first


def write_extract(path: pathlib.Path, n_series: int, seed: int = 2026) -> int:
    """Write ``n_series`` daily series of :data:`N_DAYS` days (sorted by key and date); returns the bytes."""
    rng = np.random.default_rng(seed)
    dates = np.arange(np.datetime64("2024-12-01"), np.datetime64("2024-12-01") + N_DAYS).astype("datetime64[D]")
    schema = pa.schema([("series", pa.string()), ("date", pa.date32()), ("y", pa.float64())])
    with pq.ParquetWriter(path, schema) as writer:
        for start in range(0, n_series, PER_GROUP):
            count = min(PER_GROUP, n_series - start)
            keys = np.repeat([f"s-{i:05d}" for i in range(start, start + count)], N_DAYS)
            level = rng.uniform(20, 200, size=(count, 1))
            week = 1 + 0.2 * np.sin(2 * np.pi * np.arange(N_DAYS) / 7)
            price = rng.uniform(2, 40, size=(count, N_DAYS))  # a day's revenue: units times a varying price
            y = np.round(rng.poisson(level * week) * price, 2).ravel()
            table = pa.table({"series": keys, "date": np.tile(dates, count), "y": y}, schema=schema)
            writer.write_table(table)
    hour_ago = time.time() - 3600
    os.utime(path, (hour_ago, hour_ago))
    return path.stat().st_size


def main(quick: bool = False) -> list[dict]:
    n_series = 1_000 if quick else SERIES
    with tempfile.TemporaryDirectory(prefix="fitaudit-bench-fp-") as tmp:
        root = pathlib.Path(tmp)
        size = write_extract(root / "fleet.parquet", n_series)
        source = SourceEntry(name="fleet", uri="fleet.parquet", key="series", time="date", value="y", frequency="D")
        cache_file = root / "archive" / ".fingerprints" / "cache.json"
        cold_cache = FingerprintCache(cache_file)
        t0 = time.perf_counter()
        first = fingerprint_source(source, root, cache=cold_cache)
        cold = time.perf_counter() - t0
        cold_cache.save()
        warm_cache = FingerprintCache(cache_file)  # a later run reads it back from the archive
        t0 = time.perf_counter()
        second = fingerprint_source(source, root, cache=warm_cache)
        warm = time.perf_counter() - t0
    if second.to_dict() != first.to_dict() or (warm_cache.hits, warm_cache.misses) != (1, 0):
        raise AssertionError("the warm run did not reuse the cached digest or recorded something else")
    ratio = cold / warm
    return [
        {
            "benchmark": "Source fingerprint, first and second run (micro)",
            "size": f"{n_series:,} daily series x {N_DAYS} days, one Parquet file of {size / 1e6:.0f} MB "
            f"({first.rows:,} rows)",
            "measured": f"first run (cold cache: SHA-256 of every byte, time column read) {1e3 * cold:.1f} ms, "
            f"second run (digest and time range from the cache, footer read) {1e3 * warm:.1f} ms",
            "ratio": ratio,
            "ratio_text": f"{ratio:.1f}x",
            "goal": f">= {GOAL:g}x faster on the second run",
            "met": ratio >= GOAL,
        }
    ]


if __name__ == "__main__":
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="1,000 series instead of 10,000")
    for row in main(quick=parser.parse_args().quick):
        print(row)
