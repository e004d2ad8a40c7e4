"""Refusing a damaged archive and recording damage that cannot be repaired (``acknowledgement`` entries)."""

from __future__ import annotations

import contextlib
import json
import os
import pathlib

from .._io import canonical_json, sha256_bytes
from .chain import _append_locked, _load_chain, _settle_append
from .checks import _check_run_folder
from .durable import _append_bytes, _fsync_dir
from .layout import _CHAIN, _JOURNAL, _MANIFEST, _PARAMS_PATH, _REPORT, _RUN_PATH, _root, _text
from .lock import _archive_lock
from .problems import ArchiveError, ArchiveProblem
from .records import _run_payload_problem
from .verify import _verify_locked

_ADVICE = {
    "chain": (
        "restore chain.jsonl from a backup (lines cut from its end can be put back only while nothing else was "
        "appended)"
    ),
    "unrecorded": (
        "a run folder without its chain entry: restore chain.jsonl from a backup, or move the folder out of runs/ if "
        "it does not belong there"
    ),
    "changed": "restore the named files from a backup of the archive",
    "missing": "restore the named files or folders from a backup of the archive",
    "added": "remove what was added to the run folders",
    "params": (
        "restore the named parameter files from a backup (versions are never edited; promote with `fitaudit promote`)"
    ),
    "journal": "move the named journal files out of the archive",
    "layout": "move the named entries out of runs/",
}


def _refusal(root: pathlib.Path, problems: list[ArchiveProblem]) -> str:
    more = f"; and {len(problems) - 3} more" if len(problems) > 3 else ""
    shown = "; ".join(str(p) for p in problems[:3]) + more
    advice = list(dict.fromkeys(_ADVICE.get(p.kind, _ADVICE["missing"]) for p in problems))
    return (
        f"the archive {root} fails verification, so nothing is added to it: {shown} "
        f"(`fitaudit verify {root}` lists every problem). To go on: {'; '.join(advice)}. "
        "If the originals cannot be restored, record the damage in the chain "
        f"with `fitaudit acknowledge {root} --by NAME --note TEXT` and run again"
    )


def require_intact(archive_root: str | os.PathLike) -> list[ArchiveProblem]:
    """Refuse to add to an archive that :func:`verify_archive` rejects (call after :func:`recover`).

    Returns
    -------
    list of ArchiveProblem
        The ``acknowledged`` notes (damage an ``acknowledgement`` entry records), for the manifest.

    Raises
    ------
    ArchiveError
        Naming the first problems, what to restore, and how to record the damage when the originals
        are lost (:func:`acknowledge_damage`).
    """
    root = _root(archive_root)
    if not root.is_dir():
        return []
    with _archive_lock(root, shared=True):
        found = _verify_locked(root)
    problems = [p for p in found if not p.is_note]
    if problems:
        raise ArchiveError(_refusal(root, problems))
    return [p for p in found if p.kind == "acknowledged"]


def _adoptable_run(root: pathlib.Path, rel: str) -> dict | None:
    """The run payload of an unrecorded run folder whose manifest names it, else None."""
    match = _RUN_PATH.fullmatch(rel)
    manifest_path = root / rel / _MANIFEST
    if not match or manifest_path.is_symlink() or not manifest_path.is_file():
        return None
    data = manifest_path.read_bytes()
    try:
        manifest = json.loads(data)
        files = manifest["files"]
        payload = {
            "run_id": manifest["run_id"],
            "path": rel,
            "as_of": manifest["as_of"],
            "manifest_sha256": sha256_bytes(data),
            "report_sha256": files.get(_REPORT, {}).get("sha256"),
        }
    except (ValueError, KeyError, TypeError, AttributeError):
        return None
    return payload if payload["run_id"] == match["run_id"] and _run_payload_problem(payload) is None else None


def _self_hash(path: pathlib.Path) -> str | None:
    """The ``sha256`` field of a parameter version whose content matches it, else None."""
    try:
        data = json.loads(path.read_bytes())
        stored = data.pop("sha256")
    except (OSError, ValueError, KeyError, TypeError, AttributeError):
        return None
    return stored if isinstance(stored, str) and sha256_bytes(canonical_json(data)) == stored else None


def acknowledge_damage(archive_root: str | os.PathLike, *, by: str, note: str) -> dict:
    """Record the archive's current damage in an ``acknowledgement`` chain entry, so it can continue.

    For damage that cannot be repaired from a backup.  Nothing recorded is deleted or rewritten:

    * a chain line cut short (no final newline, no append journal) is ended with a newline; the
      entry records its line number, size and SHA-256;
    * journal files that verification rejects are moved into the entry (path, SHA-256, text) and
      removed from ``.journal/``;
    * a run folder found without its chain entry, whose ``manifest.json`` names it, is recorded as
      found (run id, path, as-of date, manifest SHA-256): from then on it is checked like any run;
    * a ``promoted`` parameter version with no promotion entry, intact by its own hash, is recorded
      as found (path and SHA-256): the production-version lookup then accepts it;
    * every other problem is listed (kind, where, message); :func:`verify_archive` then reports
      exactly those as ``acknowledged`` notes; any new or different damage is a problem again.

    Parameters
    ----------
    by, note : str
        Who acknowledges the damage, and what happened (both non-blank; both in the entry).

    Returns
    -------
    dict
        The chain entry.

    Raises
    ------
    ArchiveError
        When verification finds nothing to acknowledge.
    """
    by, note = _text(by, "by"), _text(note, "note")
    root = _root(archive_root)
    if not root.is_dir():
        raise ArchiveError(f"archive folder {root} not found")
    with _archive_lock(root):
        with contextlib.suppress(ArchiveError):  # a journal that does not match the chain is moved aside below
            _settle_append(root)
        removed = []
        for problem in _verify_locked(root):
            path = root / problem.where
            if problem.kind == "journal" and problem.where.startswith(f"{_JOURNAL}/") and path.is_file():
                data = path.read_bytes()
                removed.append(
                    {
                        "path": problem.where,
                        "sha256": sha256_bytes(data),
                        "size": len(data),
                        "text": data[:65536].decode("utf-8", "replace"),
                        "message": problem.message,
                    }
                )
                path.unlink()
        if removed:
            _fsync_dir(root / _JOURNAL)
        chain = _load_chain(root)
        terminated = None
        if chain.torn:
            terminated = {
                "line": chain.data.count(b"\n") + 1,
                "size": len(chain.torn),
                "sha256": sha256_bytes(chain.torn),
            }
            _append_bytes(root / _CHAIN, b"\n")
            chain = _load_chain(root)
        own_line = chain.data.count(b"\n") + 1
        source = f"{_CHAIN} line {own_line}"  # the acknowledgement's own line
        runs, promotions, problems = [], [], []
        for problem in _verify_locked(root):
            if problem.is_note:
                continue
            if problem.kind == "unrecorded" and problem.message.startswith("is not recorded in chain.jsonl"):
                adopted = _adoptable_run(root, problem.where)
                if adopted is not None:
                    runs.append(adopted)
                    problems += _check_run_folder(
                        root, problem.where, adopted["run_id"], adopted["manifest_sha256"], source
                    )
                    continue
            if (
                problem.kind == "params"
                and _PARAMS_PATH.fullmatch(problem.where)
                and "no promotion entry" in problem.message
            ):
                digest = _self_hash(root / problem.where)
                if digest is not None:
                    promotions.append({"path": problem.where, "sha256": digest})
                    continue
            problems.append(problem)
        if not (problems or runs or promotions or terminated or removed):
            raise ArchiveError(f"`fitaudit verify` finds no problem in {root}; there is no damage to acknowledge")
        payload = {
            "by": by,
            "note": note,
            "problems": [p.to_dict() for p in problems],
            "runs": runs,
            "promotions": promotions,
        }
        if terminated:
            payload["terminated_line"] = terminated
        if removed:
            payload["journals_removed"] = removed
        return _append_locked(root, "acknowledgement", payload, allow_damage=True)
