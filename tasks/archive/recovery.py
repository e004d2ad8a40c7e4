"""Recovery: settling interrupted appends, publications, promotions and purges; removing abandoned folders."""

from __future__ import annotations

import fcntl
import os
import pathlib

from .._io import canonical_json
from .chain import _append_locked, _Chain, _intact_chain, _settle_append
from .checks import _check_run_folder
from .durable import _children, _read_json, _remove_journal, _remove_tree
from .journals import _run_id_of
from .layout import _JOURNAL, _PROMOTION_PREFIX, _PURGE_JOURNAL, _STAGING, _TRASH, _WORK, SAFE_NAME, _rel, _root
from .lock import _archive_lock
from .problems import ArchiveError
from .promotions import _recover_promotion
from .records import _intact_runs, _RunRecord
from .retention import _delete_run_folders


def _recover_run(root: pathlib.Path, journal_path: pathlib.Path, runs: dict[str, _RunRecord]) -> str:
    try:
        record = _read_json(journal_path)
    except ValueError:
        record = {}
    run_id = _run_id_of(record) if isinstance(record, dict) else None
    if (
        run_id is None
        or journal_path.name != f"run-{run_id}.json"
        or not SAFE_NAME.fullmatch(str(record.get("staging")))
    ):
        raise ArchiveError(
            f"{_rel(root, journal_path)} is not a journal this archive writes; run `fitaudit verify` and investigate"
        )
    payload, target = record["payload"], root / record["payload"]["path"]
    staging = root / _STAGING / record["staging"]
    if run_id in runs:
        action = f"run {run_id}: publication had finished; removed its journal"
    elif target.exists():
        problems = _check_run_folder(
            root, payload["path"], run_id, payload["manifest_sha256"], "its publication journal"
        )
        if problems:
            raise ArchiveError(
                f"cannot complete the interrupted publication of run {run_id}: {problems[0]}; "
                "investigate before recovering"
            )
        _append_locked(root, "run", {**payload, "recovered": True})
        action = f"run {run_id}: completed interrupted publication (appended its chain entry)"
    else:
        if staging.exists():
            _remove_tree(staging)
        action = f"run {run_id}: rolled back interrupted publication (not yet visible)"
    _remove_journal(root, journal_path.name)
    return action


def _recover_purge(root: pathlib.Path, chain: _Chain) -> str:
    payload = _read_json(root / _JOURNAL / _PURGE_JOURNAL)["payload"]
    logged = any(
        e["kind"] == "purge" and canonical_json(e["payload"]) == canonical_json(payload) for _, e in chain.entries
    )
    if logged:
        removed = _delete_run_folders(root, payload["runs"])
        action = f"completed interrupted purge (removed {len(removed)} remaining run folders)"
    else:
        action = "rolled back interrupted purge (it was not logged; nothing was removed)"
    _remove_journal(root, _PURGE_JOURNAL)
    return action


def _in_use(folder: pathlib.Path) -> bool:
    """True when a live RunWriter or WorkFolder holds the folder's lock."""
    fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        return True
    finally:
        os.close(fd)
    return False


def _remove_abandoned(root: pathlib.Path) -> list[str]:
    """Delete abandoned staging and work folders, half-deleted purged folders and temporary journal files.

    The caller holds the archive lock, so no new staging or work folder appears meanwhile.
    """
    actions = []
    for folder, what in ((_STAGING, "abandoned staging entry"), (_WORK, "the work folder of an interrupted run")):
        for path in _children(root / folder):
            if path.is_symlink() or not path.is_dir():
                path.unlink()
            elif _in_use(path):
                continue
            else:
                _remove_tree(path)
            actions.append(f"removed {what} {_rel(root, path)}")
    for path in _children(root / _TRASH):
        _remove_tree(path)
        actions.append(f"finished deleting purged folder {_rel(root, path)}")
    for path in [p for p in _children(root / _JOURNAL) if p.name.startswith(".") and p.name.endswith(".tmp")]:
        path.unlink()
        actions.append(f"removed temporary file {_rel(root, path)}")
    return actions


def recover(archive_root: str | os.PathLike) -> list[str]:
    """Settle interrupted work; call at the start of every run.

    Finishes an interrupted chain append, completes each journaled publication whose folder was
    already renamed into ``runs/`` (appending its chain entry, marked ``"recovered": true``) or rolls
    it back, does the same for an interrupted promotion (entry appended when its version file was
    written, journal dropped when not), finishes or rolls back an interrupted purge, and removes
    abandoned staging and work folders (those not locked by a live writer or run).

    Returns
    -------
    list of str
        One line per action taken (empty when there was nothing to do).

    Raises
    ------
    ArchiveError
        When the journals and the archive disagree (a sign of tampering); nothing is guessed.
    """
    root = _root(archive_root)
    if not root.is_dir():
        return []
    actions: list[str] = []
    with _archive_lock(root):
        settled = _settle_append(root)
        actions += [settled] if settled else []
        _, runs = _intact_runs(root)
        for journal_path in sorted((root / _JOURNAL).glob("run-*.json")):
            actions.append(_recover_run(root, journal_path, runs))
        for journal_path in sorted((root / _JOURNAL).glob(f"{_PROMOTION_PREFIX}*.json")):
            actions.append(_recover_promotion(root, journal_path))
        if (root / _JOURNAL / _PURGE_JOURNAL).exists():
            actions.append(_recover_purge(root, _intact_chain(root)))
        actions += _remove_abandoned(root)
    return actions
