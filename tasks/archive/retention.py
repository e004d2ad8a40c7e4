"""Retention: purging old runs, logged in the chain before anything is deleted."""

from __future__ import annotations

import datetime as _dt
import os
import pathlib
import secrets

from .chain import _append_locked, _settle_append
from .checks import _check_run_folder
from .durable import _fsync_dir, _mkdirs, _remove_journal, _remove_tree, _step, _write_journal
from .layout import _CHAIN, _JOURNAL, _PURGE_JOURNAL, _TRASH, _as_date, _rel, _root, _text
from .lock import _archive_lock
from .problems import ArchiveError
from .records import _intact_runs


def _delete_run_folders(root: pathlib.Path, items: list[dict]) -> list[str]:
    removed = []
    for item in items:
        folder = root / item["path"]
        if folder.exists():
            trash = _mkdirs(root, _TRASH) / f"{item['run_id']}.{secrets.token_hex(4)}"
            os.rename(folder, trash)
            _fsync_dir(folder.parent)
            _step("purge-moved")
            _remove_tree(trash)
            removed.append(item["run_id"])
    return removed


def purge_runs(archive_root: str | os.PathLike, *, before: _dt.date, reason: str, approved_by: str) -> dict | None:
    """Delete the runs whose as-of date is before ``before``, logging one ``purge`` chain entry.

    The entry (``before``, ``reason``, ``approved_by`` and each purged run's id, path and manifest
    SHA-256) is appended before anything is deleted; each folder is then moved to ``.trash/`` and
    deleted.  Runs that fail verification are not purged (that would destroy the evidence).

    Returns
    -------
    dict or None
        The chain entry, or None when no run is old enough.

    Raises
    ------
    ArchiveError
        A publication or purge is pending (call ``recover()``), the chain is damaged, or a run to purge
        fails verification.
    """
    before = _as_date(before, "before")
    reason, approved_by = _text(reason, "reason"), _text(approved_by, "approved_by")
    root = _root(archive_root)
    with _archive_lock(root):
        _settle_append(root)
        pending = sorted((root / _JOURNAL).glob("*.json")) if (root / _JOURNAL).is_dir() else []
        if pending:
            raise ArchiveError(f"interrupted work is pending ({_rel(root, pending[0])}); call recover() before purging")
        _, runs = _intact_runs(root)
        victims = [r for r in runs.values() if r.purged_line is None and _dt.date.fromisoformat(r.as_of) < before]
        if not victims:
            return None
        for record in victims:
            problems = _check_run_folder(
                root, record.path, record.run_id, record.manifest_sha256, f"{_CHAIN} line {record.line}"
            )
            if problems:
                raise ArchiveError(
                    f"run {record.run_id} fails verification ({problems[0]}); purging it would destroy the evidence, "
                    "investigate first"
                )
        items = [{"run_id": r.run_id, "path": r.path, "manifest_sha256": r.manifest_sha256} for r in victims]
        payload = {"before": before.isoformat(), "reason": reason, "approved_by": approved_by, "runs": items}
        _write_journal(root, _PURGE_JOURNAL, {"payload": payload})
        _step("purge-journal-written")
        entry = _append_locked(root, "purge", payload)
        _step("purge-appended")
        _delete_run_folders(root, items)
        _remove_journal(root, _PURGE_JOURNAL)
        return entry
