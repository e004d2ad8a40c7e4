"""The hash chain ``chain.jsonl``: reading and checking it, appending under a journal, its head, and the
damage its ``acknowledgement`` entries record."""

from __future__ import annotations

import copy
import dataclasses
import json
import os
import pathlib
import re
import threading

from fitaudit.core.exceptions import InputError

from .._io import canonical_json, sha256_bytes, utc_now
from .checks import _promotion_problem
from .durable import _append_bytes, _fsync_dir, _read_json, _remove_journal, _step, _write_journal
from .layout import _APPEND_JOURNAL, _CHAIN, _ENTRY_KEYS, _JOURNAL, CHAIN_KINDS, GENESIS, _root
from .lock import _archive_lock
from .problems import ArchiveError, ArchiveProblem


@dataclasses.dataclass(frozen=True)
class _Chain:
    """chain.jsonl as read: well-formed entries with their line numbers, problems, raw bytes."""

    entries: tuple[tuple[int, dict], ...]
    problems: tuple[ArchiveProblem, ...]
    data: bytes
    torn: bytes  # trailing bytes after the last newline (an interrupted append, or damage)
    last_hash: str | None = None  # the hash the next line's prev must equal (None: not checked)


def _entry_hash(entry: dict, *, str_keys: bool = False) -> str:
    return sha256_bytes(canonical_json({k: v for k, v in entry.items() if k != "hash"}, str_keys=str_keys))


#: The last chain checked in this process, per chain file, cut after its last complete line.  A
#: line's check depends only on its own bytes and the hash of the well-formed line before it, so
#: when the file still starts with exactly these bytes (one memory comparison) only the lines after
#: them are parsed; any other change to the file means a full check.  Without it every append
#: re-read the whole chain (10,000 promotions in one process: quadratic, most of an hour).
_CHECKED: dict[str, _Chain] = {}
_CHECKED_MAX = 8  # archives remembered; the oldest is dropped beyond this
_CHECKED_LOCK = threading.Lock()  # task threads read archives under a shared lock, so at the same time


def _load_chain(root: pathlib.Path, *, fresh: bool = False) -> _Chain:
    """chain.jsonl read and checked line by line (``fresh``: without the memo of lines already checked)."""
    path = root / _CHAIN
    data = path.read_bytes() if path.exists() else b""
    complete = data[: data.rfind(b"\n") + 1]
    with _CHECKED_LOCK:
        known = None if fresh else _CHECKED.get(str(path))
    if known is None or not complete.startswith(known.data):
        known = _Chain((), (), b"", b"", GENESIS)
    new = _check_lines(complete[len(known.data) :], known.data.count(b"\n") + 1, known.last_hash)
    checked = _Chain(known.entries + new.entries, known.problems + new.problems, complete, b"", new.last_hash)
    if not fresh:
        with _CHECKED_LOCK:
            _CHECKED.pop(str(path), None)
            _CHECKED[str(path)] = checked
            while len(_CHECKED) > _CHECKED_MAX:
                del _CHECKED[next(iter(_CHECKED))]
    return dataclasses.replace(checked, data=data, torn=data[len(complete) :])


def _check_lines(block: bytes, first_line: int, expected_prev: str | None) -> _Chain:
    """Check complete chain lines (``block`` ends with a newline) numbered from ``first_line``.

    ``expected_prev`` is the hash the first line's ``prev`` must equal (None: not checked, after a
    line that is not an entry); the result's ``last_hash`` is the one the next line's must equal.
    """
    entries: list[tuple[int, dict]] = []
    problems: list[ArchiveProblem] = []

    def bad(line_no: int, message: str) -> None:
        problems.append(ArchiveProblem("chain", f"{_CHAIN} line {line_no}", message))

    for line_no, raw in enumerate(block.split(b"\n")[:-1], start=first_line):
        try:
            entry = json.loads(raw)
        except ValueError:
            bad(line_no, "is not valid JSON (line edited or damaged)")
            expected_prev = None
            continue
        if not isinstance(entry, dict) or set(entry) != _ENTRY_KEYS:
            bad(line_no, f"is not a chain entry (expected exactly the keys {sorted(_ENTRY_KEYS)})")
            expected_prev = None
            continue
        if canonical_json(entry, str_keys=True) != raw:
            bad(line_no, "is not in canonical form (line edited)")
        if entry["hash"] != _entry_hash(entry, str_keys=True):
            bad(line_no, "hash does not match the entry's content (line edited)")
        if entry["seq"] != line_no:
            bad(line_no, f"has seq {entry['seq']!r} but is line {line_no} (lines dropped, duplicated or reordered)")
        if expected_prev is not None and entry["prev"] != expected_prev:
            bad(
                line_no,
                f"prev does not equal the hash of line {line_no - 1} (a line was dropped, inserted or reordered)",
            )
        if entry["kind"] not in CHAIN_KINDS or not isinstance(entry["payload"], dict):
            bad(line_no, f"has unknown kind {entry['kind']!r} or a payload that is not an object")
        else:
            entries.append((line_no, entry))
        expected_prev = entry["hash"] if isinstance(entry["hash"], str) else None
    return _Chain(tuple(entries), tuple(problems), block, b"", expected_prev)


@dataclasses.dataclass
class _Acks:
    """What the valid ``acknowledgement`` entries of a chain record."""

    problems: dict[tuple[str, str, str], tuple[int, str]] = dataclasses.field(default_factory=dict)  # -> (line, by)
    runs: list[tuple[int, dict]] = dataclasses.field(default_factory=list)  # adopted run folders
    promotions: list[tuple[int, dict]] = dataclasses.field(default_factory=list)  # adopted promoted versions

    def covers(self, problem: ArchiveProblem) -> tuple[int, str] | None:
        """(line, by) of the acknowledgement naming exactly this problem, else None."""
        return self.problems.get((problem.kind, problem.where, problem.message))

    def mark(self, problems: list[ArchiveProblem]) -> list[ArchiveProblem]:
        """``problems`` with each acknowledged one turned into an ``acknowledged`` note."""
        out = []
        for p in problems:
            hit = None if p.is_note else self.covers(p)
            if hit:
                p = ArchiveProblem(
                    "acknowledged", p.where, f"{p.message} (damage acknowledged at {_CHAIN} line {hit[0]} by {hit[1]})"
                )
            out.append(p)
        return out


def _line_of(problem: ArchiveProblem) -> int | None:
    prefix = f"{_CHAIN} line "
    return (
        int(problem.where[len(prefix) :])
        if problem.where.startswith(prefix) and problem.where[len(prefix) :].isdigit()
        else None
    )


def _acknowledgements(chain: _Chain) -> _Acks:
    """Collect the records of every well-formed ``acknowledgement`` entry (its own line undamaged)."""
    acks = _Acks()
    damaged = {_line_of(p) for p in chain.problems}
    for line, entry in chain.entries:
        if entry["kind"] != "acknowledgement" or line in damaged:
            continue
        payload = entry["payload"]
        by = str(payload.get("by", "?"))
        for item in payload.get("problems") or []:
            if isinstance(item, dict) and all(isinstance(item.get(k), str) for k in ("kind", "where", "message")):
                acks.problems.setdefault((item["kind"], item["where"], item["message"]), (line, by))
        acks.runs += [(line, item) for item in payload.get("runs") or [] if isinstance(item, dict)]
        acks.promotions += [(line, item) for item in payload.get("promotions") or [] if isinstance(item, dict)]
    return acks


_RESTORE_OR_ACKNOWLEDGE = (
    "Restore chain.jsonl from a trusted copy (a backup), or, if it cannot be restored, record the damage with "
    "`fitaudit acknowledge ARCHIVE --by NAME --note TEXT` so that the archive can continue"
)


def _intact_chain(root: pathlib.Path, *, allow_damage: bool = False) -> _Chain:
    """The chain, refusing damage that no acknowledgement covers (unless ``allow_damage``)."""
    chain = _load_chain(root)
    if chain.torn and not chain.problems and (root / _JOURNAL / _APPEND_JOURNAL).exists():
        raise ArchiveError(f"an append to {_CHAIN} was interrupted; call recover() to complete it")
    acks = _acknowledgements(chain)
    open_problems = [p for p in chain.problems if not acks.covers(p)]
    if (open_problems or chain.torn) and not allow_damage:
        first = open_problems[0] if open_problems else ArchiveProblem("chain", _CHAIN, "ends with an incomplete line")
        raise ArchiveError(
            f"{first}; the chain is damaged, so nothing more is appended (`fitaudit verify` lists every problem). "
            + _RESTORE_OR_ACKNOWLEDGE
        )
    return chain


def _settle_append(root: pathlib.Path) -> str | None:
    """Finish (or confirm) an append recorded in ``.journal/append.json``; return what was done."""
    journal = root / _JOURNAL / _APPEND_JOURNAL
    if not journal.exists():
        return None
    try:
        intent = _read_json(journal)
        line, offset = intent["line"].encode("utf-8"), int(intent["offset"])
    except (ValueError, KeyError, TypeError, AttributeError) as exc:
        raise ArchiveError(
            f"{_JOURNAL}/{_APPEND_JOURNAL} is damaged ({exc}); run `fitaudit verify` and investigate"
        ) from exc
    chain_path = root / _CHAIN
    data = chain_path.read_bytes() if chain_path.exists() else b""
    tail = data[offset:]
    if len(data) < offset or not line.startswith(tail):
        raise ArchiveError(
            f"{_CHAIN} does not match the interrupted append recorded in {_JOURNAL}/{_APPEND_JOURNAL} "
            "(the chain was changed after the crash); run `fitaudit verify` and investigate"
        )
    seq = json.loads(line)["seq"]
    action = f"confirmed chain entry {seq}"
    if len(tail) < len(line):
        _append_bytes(chain_path, line[len(tail) :])
        action = f"completed interrupted append of chain entry {seq}"
    _remove_journal(root, _APPEND_JOURNAL)
    return action


def _append_locked(root: pathlib.Path, kind: str, payload: dict, *, allow_damage: bool = False) -> dict:
    """Append one entry; the caller holds the archive lock.

    ``seq`` is the entry's line number and ``prev`` the hash of the last well-formed entry (after
    acknowledged damage the two may be more than one line apart).
    """
    _settle_append(root)
    chain = _intact_chain(root, allow_damage=allow_damage)
    last = chain.entries[-1][1] if chain.entries else None
    body = {
        "seq": chain.data.count(b"\n") + 1,
        "kind": kind,
        "time": utc_now(),
        "payload": payload,
        "prev": chain.last_hash or (last["hash"] if last else GENESIS),
    }
    line = canonical_json({**body, "hash": _entry_hash(body)}) + b"\n"
    _write_journal(root, _APPEND_JOURNAL, {"offset": len(chain.data), "line": line.decode("utf-8")})
    _step("append-journal-written")
    created = not (root / _CHAIN).exists()
    _append_bytes(root / _CHAIN, line)
    if created:
        _fsync_dir(root)
    _step("chain-appended")
    _remove_journal(root, _APPEND_JOURNAL)
    return json.loads(line)


def _payload_json(kind: str, payload: object) -> dict:
    if not isinstance(payload, dict):
        raise InputError(f"the payload of a {kind!r} chain entry must be a dict; got {type(payload).__name__}")
    try:
        return json.loads(canonical_json(payload))
    except (TypeError, ValueError) as exc:
        raise InputError(f"the payload of a {kind!r} chain entry cannot be written as JSON: {exc}") from exc


def append_chain(archive_root: str | os.PathLike, kind: str, payload: dict) -> dict:
    """Append one entry to ``chain.jsonl`` under the archive lock and return it.

    Parameters
    ----------
    archive_root : path
        The archive folder.
    kind : {"promotion"}
        Only promotions are appended directly.  ``run`` entries come from :meth:`RunWriter.finish`,
        ``purge`` from :func:`purge_runs`, ``signoff`` from :func:`record_signoff` and
        ``acknowledgement`` from :func:`acknowledge_damage`, which check what they record.
    payload : dict
        For a promotion: ``path`` (``"params/<model-id>/<n>.json"``, a ``promoted`` version) and
        ``sha256`` (that version's ``sha256`` field); any further JSON fields (model id, versions,
        approver, note) are kept.  :func:`record_promotion` (which
        :func:`fitaudit.tasks.params.promote` calls) writes the version and this entry together; a
        promotion it recorded is not recorded twice: the existing entry is returned.

    Returns
    -------
    dict
        The entry ``{"seq", "kind", "time", "payload", "prev", "hash"}`` where ``hash`` is the SHA-256
        of the canonical JSON of the entry without ``hash`` and ``prev`` the previous entry's hash
        (64 zeros for the first).

    Raises
    ------
    InputError
        Unknown kind, a kind with its own function, or a promotion naming a missing or different file.
    ArchiveError
        The chain is damaged.
    """
    if kind not in CHAIN_KINDS:
        raise InputError(f"chain entry kind {kind!r} is unknown; valid kinds are {list(CHAIN_KINDS)}")
    helper = {
        "run": "RunWriter.finish()",
        "purge": "purge_runs()",
        "signoff": "record_signoff()",
        "acknowledgement": "acknowledge_damage()",
    }.get(kind)
    if helper:
        raise InputError(
            f"{kind!r} chain entries are appended by {helper}, which checks what they record; call it instead"
        )
    root = _root(archive_root)
    payload = _payload_json(kind, payload)
    with _archive_lock(root):
        problem = _promotion_problem(root, payload)
        if problem:
            raise InputError(f"promotion not recorded: {problem}")
        _settle_append(root)
        for _, entry in _intact_chain(root).entries:
            recorded = entry["payload"]
            if entry["kind"] == "promotion" and (recorded.get("path"), recorded.get("sha256")) == (
                payload["path"],
                payload["sha256"],
            ):
                return copy.deepcopy(entry)  # the caller's own: the checked chain is remembered (_CHECKED)
        return _append_locked(root, kind, payload)


def read_chain(archive_root: str | os.PathLike) -> list[dict]:
    """Return the entries of ``chain.jsonl``, oldest first.

    Raises
    ------
    ArchiveError
        If any line is damaged, out of order or incomplete (``verify_archive`` gives every detail).
    """
    root = _root(archive_root)
    with _archive_lock(root, shared=True):
        return copy.deepcopy([entry for _, entry in _intact_chain(root).entries])  # the caller's own (_CHECKED)


_HEAD = re.compile(r"^\s*(?:head:\s*)?(?P<hash>[0-9a-fA-F]{64})\s*(?:\(\s*seq\s+(?P<seq>[0-9]+)\s*\))?\s*$")


def parse_head(text: str) -> tuple[str, int | None]:
    """Read a chain head as ``fitaudit verify`` and ``fitaudit run`` print it.

    Accepts ``head: <sha256> (seq N)``, ``<sha256> (seq N)`` or the bare 64-digit SHA-256;
    returns ``(sha256, N or None)``.

    Raises
    ------
    InputError
        For anything else (a shortened hash included: it would prove little).
    """
    match = _HEAD.fullmatch(text) if isinstance(text, str) else None
    if match is None:
        raise InputError(
            f"expected a chain head as `fitaudit verify` prints it, 'head: <64 hex digits> (seq N)', or the 64 hex "
            f"digits alone; got {text!r}"
        )
    return match["hash"].lower(), int(match["seq"]) if match["seq"] else None


def chain_head(archive_root: str | os.PathLike) -> tuple[str, int] | None:
    """``(hash, seq)`` of the chain's last well-formed entry, or None for an empty archive.

    Printed as ``head: <hash> (seq N)``; kept outside the archive, it lets ``fitaudit verify --head``
    detect entries cut from the end of the chain or a chain rewritten wholesale.
    """
    root = _root(archive_root)
    if not (root / _CHAIN).exists():
        return None
    with _archive_lock(root, shared=True):
        chain = _load_chain(root)
    if not chain.entries:
        return None
    line, entry = chain.entries[-1]
    return entry["hash"], line
