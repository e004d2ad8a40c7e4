"""Sign-off: a reviewer's record of a run's exact report, appended to the chain."""

from __future__ import annotations

import os

from .chain import _append_locked, _settle_append
from .checks import _check_run_folder
from .durable import _read_json
from .layout import _CHAIN, _MANIFEST, _REPORT, _check_name, _root, _text
from .lock import _archive_lock
from .problems import ArchiveError
from .records import _intact_runs


def record_signoff(archive_root: str | os.PathLike, run_id: str, *, name: str, role: str, note: str = "") -> dict:
    """Record a reviewer's sign-off of a run's report in the chain (docs/architecture.md §3.8).

    The run folder is verified first; the entry holds the SHA-256 of the exact ``index.html`` and
    ``manifest.json`` signed, the reviewer's name and role, the note, and (as the entry's ``time``)
    the UTC timestamp.  A report is never edited; a regenerated report is a new run to sign.

    Returns
    -------
    dict
        The chain entry.
    """
    _check_name(run_id, "run id")
    name, role = _text(name, "name"), _text(role, "role")
    note = _text(note, "note", allow_empty=True)
    root = _root(archive_root)
    with _archive_lock(root):
        _settle_append(root)
        _, runs = _intact_runs(root)
        record = runs.get(run_id)
        if record is None or record.purged_line is not None:
            raise ArchiveError(f"run {run_id} is not a published run in this archive (or was purged); nothing to sign")
        problems = _check_run_folder(root, record.path, run_id, record.manifest_sha256, f"{_CHAIN} line {record.line}")
        if problems:
            raise ArchiveError(f"cannot sign run {run_id}: {problems[0]}")
        files = _read_json(root / record.path / _MANIFEST)["files"]
        if _REPORT not in files:
            raise ArchiveError(f"run {run_id} has no {_REPORT} to sign")
        payload = {
            "run_id": run_id,
            "path": record.path,
            "report": _REPORT,
            "report_sha256": files[_REPORT]["sha256"],
            "manifest_sha256": record.manifest_sha256,
            "name": name,
            "role": role,
            "note": note,
        }
        return _append_locked(root, "signoff", payload)
