"""Verification: every file and chain line checked (``verify_archive``)."""

from __future__ import annotations

import os
import pathlib
import re

from .chain import _acknowledgements, _Chain, _load_chain, parse_head
from .checks import ParamsReads, _check_params, _check_run_folder, _promotion_problem
from .durable import _children
from .journals import _Journals, _read_journals
from .layout import _APPEND_JOURNAL, _CHAIN, _JOURNAL, _RUNS, _STAGING, _TRASH, _rel, _root
from .lock import _archive_lock
from .problems import ArchiveProblem
from .promotions import _check_promotion_records, _recorded_promotions
from .records import _interpret, _RunRecord


def _check_chain_tail(chain: _Chain, journals: _Journals) -> list[ArchiveProblem]:
    intent = journals.append
    last_line = chain.data.count(b"\n") + 1
    if intent is None:
        if chain.torn:
            message = "is incomplete (no final newline) and no append journal covers it"
            return [ArchiveProblem("chain", f"{_CHAIN} line {last_line}", message)]
        return []
    line, offset = intent["line"].encode("utf-8"), intent["offset"]
    tail = chain.data[offset:]
    if offset <= len(chain.data) and line.startswith(tail):  # tail is the torn line, empty, or the whole line
        state = "finished; its journal is not yet removed" if tail == line else "was interrupted"
        return [
            ArchiveProblem(
                "pending", f"{_JOURNAL}/{_APPEND_JOURNAL}", f"append of a chain entry {state}; recover() settles it"
            )
        ]
    message = f"does not match the end of {_CHAIN} (chain changed after an interrupted append)"
    return [ArchiveProblem("journal", f"{_JOURNAL}/{_APPEND_JOURNAL}", message)]


def _check_recorded_runs(root: pathlib.Path, runs: dict[str, _RunRecord], journals: _Journals) -> list[ArchiveProblem]:
    items = journals.purge["payload"].get("runs") if journals.purge else None
    purging = {item.get("path") for item in items if isinstance(item, dict)} if isinstance(items, list) else set()
    problems = []
    for record in runs.values():
        source = f"{_CHAIN} line {record.line}"
        if record.purged_line is None:
            problems += _check_run_folder(root, record.path, record.run_id, record.manifest_sha256, source)
        elif (root / record.path).exists() or (root / record.path).is_symlink():
            if record.path not in purging:  # else covered by the purge journal's note
                message = f"was purged at {_CHAIN} line {record.purged_line} but is present"
                problems.append(ArchiveProblem("unrecorded", record.path, message))
    return problems


def _check_run_tree(root: pathlib.Path, runs: dict[str, _RunRecord], journals: _Journals) -> list[ArchiveProblem]:
    """Every folder under runs/ must be a recorded run or a journaled pending publication."""
    recorded = {record.path for record in runs.values()}
    problems = []
    top = root / _RUNS
    for year_dir in _children(top):
        if year_dir.is_symlink() or not year_dir.is_dir() or not re.fullmatch(r"[0-9]{4}", year_dir.name):
            problems.append(
                ArchiveProblem("layout", _rel(root, year_dir), "is not a year folder runs/<YYYY>/ (entry added)")
            )
            continue
        for folder in sorted(year_dir.iterdir()):
            rel = _rel(root, folder)
            if rel in recorded:
                continue
            journal = journals.runs.get(rel)
            if journal is None:
                problems.append(
                    ArchiveProblem(
                        "unrecorded",
                        rel,
                        "is not recorded in chain.jsonl and no publication journal covers it "
                        "(chain line removed, or folder added)",
                    )
                )
                continue
            payload = journal["payload"]
            problems += _check_run_folder(
                root, rel, payload["run_id"], payload["manifest_sha256"], "its publication journal"
            )
    return problems


def _leftovers(root: pathlib.Path) -> list[ArchiveProblem]:
    notes = []
    for private in (_STAGING, _TRASH):
        for path in _children(root / private):
            notes.append(
                ArchiveProblem(
                    "leftover", _rel(root, path), "private working folder; recover() removes it when abandoned"
                )
            )
    return notes


def verify_archive(
    archive_root: str | os.PathLike, *, include_notes: bool = False, expected_head: str | None = None
) -> list[ArchiveProblem]:
    """Check every file and the hash chain; an empty list means the archive is intact.

    Parameters
    ----------
    archive_root : path
        The archive folder (only read; verification works on a read-only copy).
    include_notes : bool, default False
        Also return notes (``kind`` in ``NOTE_KINDS``): publications, appends, promotions and purges
        interrupted after their journal was written, and private leftovers (``recover()`` settles
        them), and problems that an ``acknowledgement`` chain entry records (``acknowledged``).
    expected_head : str, optional
        A chain head recorded elsewhere, as ``fitaudit verify`` and ``fitaudit run`` print it
        (``head: <sha256> (seq N)``, or the bare SHA-256; see :func:`parse_head`).  A hash chain
        alone cannot show that entries were cut from its end, or that it was rewritten wholesale;
        an outside copy of a later head can.

    Returns
    -------
    list of ArchiveProblem
        Each names the file or chain line and what is wrong.

    Notes
    -----
    Checks: each chain line is canonical JSON with ``seq`` = line number, a correct ``hash`` and
    ``prev`` = hash of the line before; each ``run`` entry's folder exists (unless a later ``purge``
    entry names it, in which case it must be absent), its ``manifest.json`` has the recorded SHA-256,
    and the folder holds exactly the files the manifest lists with their SHA-256 and sizes; every
    folder under ``runs/`` is recorded, or covered by a run journal (a *pending* note); sign-offs and
    purges refer to recorded runs with the same manifest hash; the parameter store passes
    :func:`fitaudit.tasks.params.verify_params`, each parameter file is byte-for-byte the canonical
    JSON the store writes, every ``promotion`` entry's ``sha256`` matches the version it names (so
    a recorded production version that is missing is a problem), and every ``promoted`` version is
    recorded by a ``promotion`` entry (or an acknowledgement, or a pending promotion journal).
    """
    head = parse_head(expected_head) if expected_head is not None else None
    root = _root(archive_root)
    if not root.is_dir():
        return [ArchiveProblem("missing", str(root), "archive folder not found")]
    with _archive_lock(root, shared=True):
        problems = _verify_locked(root, head)
    return problems if include_notes else [p for p in problems if not p.is_note]


def _verify_locked(root: pathlib.Path, head: tuple[str, int | None] | None = None) -> list[ArchiveProblem]:
    """Every problem and note of :func:`verify_archive`, acknowledged ones marked; the caller holds a lock."""
    problems: list[ArchiveProblem] = []
    chain = _load_chain(root, fresh=True)  # verify reads every line, whatever this process checked before
    problems += chain.problems
    journals = _read_journals(root, problems)
    unjournaled = [f for f in (root / _RUNS).glob("*/*") if _rel(root, f) not in journals.runs]
    if not (root / _CHAIN).exists() and unjournaled:
        problems.append(ArchiveProblem("missing", _CHAIN, "is missing although run folders exist (chain deleted)"))
    problems += _check_chain_tail(chain, journals)
    runs, meaning = _interpret(chain)
    problems += meaning
    problems += _check_recorded_runs(root, runs, journals)
    problems += _check_run_tree(root, runs, journals)
    acks = _acknowledgements(chain)
    reads = ParamsReads()  # each parameter file read and verified once below
    for line, entry in chain.entries:
        if entry["kind"] == "promotion":
            problem = _promotion_problem(root, entry["payload"], reads)
            if problem:
                problems.append(ArchiveProblem("params", f"{_CHAIN} line {line}", f"promotion: {problem}"))
    for line, item in acks.promotions:
        problem = _promotion_problem(root, item, reads)
        if problem:
            problems.append(ArchiveProblem("params", f"{_CHAIN} line {line}", f"acknowledged promotion: {problem}"))
    problems += _check_promotion_records(root, _recorded_promotions(chain, acks), journals, reads)
    problems += _check_params(root, reads)
    problems += _leftovers(root)
    if head is not None:
        digest, seq = head
        found = [line for line, entry in chain.entries if entry["hash"] == digest]
        if not found or (seq is not None and seq not in found):
            where = "" if seq is None else f" at seq {seq}"
            problems.append(
                ArchiveProblem(
                    "chain",
                    _CHAIN,
                    f"does not contain the expected head {digest[:12]}...{where} "
                    "(lines removed from its end, or the chain rewritten)",
                )
            )
    return acks.mark(problems)
