"""Reading runs back: the run listing of the archive index and the earlier runs a new run compares with."""

from __future__ import annotations

import datetime as _dt
import json
import os

from .._io import sha256_bytes
from .layout import _CHAIN, _MANIFEST, _as_date, _root
from .lock import _archive_lock
from .problems import ArchiveError
from .records import _intact_runs


def list_runs(archive_root: str | os.PathLike) -> list[dict]:
    """Runs recorded in the chain, oldest first, for an archive index page.

    Returns
    -------
    list of dict
        ``run_id``, ``path`` (relative to the archive), ``as_of``, ``time`` (of the chain entry),
        ``seq``, ``manifest_sha256``, ``report_sha256``, ``counts`` (the manifest's ``counts``, or
        None when absent or purged), ``purged`` (bool) and ``signoffs`` (name, role, time, note,
        report SHA-256 of each).
    """
    root = _root(archive_root)
    listing = []
    with _archive_lock(root, shared=True):
        _, runs = _intact_runs(root)
        for record in runs.values():
            counts = None
            if record.purged_line is None:
                data = (root / record.path / _MANIFEST).read_bytes()
                if sha256_bytes(data) != record.manifest_sha256:
                    raise ArchiveError(
                        f"{record.path}/{_MANIFEST} differs from {_CHAIN} line {record.line}; run `fitaudit verify`"
                    )
                counts = json.loads(data).get("counts")
            listing.append(
                {
                    "run_id": record.run_id,
                    "path": record.path,
                    "as_of": record.as_of,
                    "time": record.time,
                    "seq": record.line,
                    "manifest_sha256": record.manifest_sha256,
                    "report_sha256": record.report_sha256,
                    "counts": counts,
                    "purged": record.purged_line is not None,
                    "signoffs": [
                        {k: s.get(k) for k in ("name", "role", "time", "note", "report_sha256")}
                        for s in record.signoffs
                    ],
                }
            )
    return listing


def history_runs(archive_root: str | os.PathLike, before: _dt.date) -> list[dict]:
    """The published, unpurged runs with an as-of date before ``before``, in chain order.

    Each is ``{"run_id", "path", "as_of", "seq", "manifest", "problem"}``: ``manifest`` is the run's
    manifest when it matches the chain's record of it, else None and ``problem`` says why.
    """
    before = _as_date(before, "before")
    root = _root(archive_root)
    if not (root / _CHAIN).exists():
        return []
    out = []
    with _archive_lock(root, shared=True):
        _, runs = _intact_runs(root)
        for record in runs.values():
            if record.purged_line is not None or _dt.date.fromisoformat(record.as_of) >= before:
                continue
            item = {
                "run_id": record.run_id,
                "path": record.path,
                "as_of": record.as_of,
                "seq": record.line,
                "manifest": None,
                "problem": None,
            }
            try:
                data = (root / record.path / _MANIFEST).read_bytes()
            except OSError as exc:
                item["problem"] = f"{record.path}/{_MANIFEST} cannot be read ({exc.strerror or exc})"
            else:
                if sha256_bytes(data) != record.manifest_sha256:
                    item["problem"] = (
                        f"{record.path}/{_MANIFEST} differs from its record at {_CHAIN} line {record.line}"
                    )
                else:
                    try:
                        item["manifest"] = json.loads(data)
                    except ValueError:
                        item["problem"] = f"{record.path}/{_MANIFEST} is not valid JSON"
            out.append(item)
    return out
