"""Crash-safe, tamper-evident archive of audit runs (docs/architecture.md §3).

Layout under the archive root::

    runs/<YYYY>/<run-id>/   one folder per published run; manifest.json lists every other file
    chain.jsonl             hash-chained log: one canonical-JSON line per run, promotion, purge, sign-off
    params/<model>/<n>.json parameter versions (written by fitaudit.tasks.params), checked by verify
    .staging/               run folders being written (private)
    .journal/               intents written before a step that must be completed or rolled back (private)
    .trash/                 purged run folders being deleted (private)
    .fingerprints/          digests of source files by version, reused by staging (private; a cache, not evidence)
    .lock                   lock file serialising every change to chain.jsonl and runs/

Publication protocol (``RunWriter.finish``)
-------------------------------------------
1. Every file is written once into ``.staging/<run-id>.<hex>/`` (fsynced; never overwritten); the
   staging folder is ``flock``-ed by its writer so ``recover`` leaves a live one alone.
2. ``manifest.json`` (caller's fields + ``run_id``, ``as_of``, ``schema_version`` and ``files``:
   SHA-256 and size of every other file) is written and every staged folder is fsynced.
3. Under the archive lock: the chain is checked, then ``.journal/run-<run-id>.json`` records the
   intended chain payload (run id, path, as-of date, manifest SHA-256).
4. The staging folder is renamed to ``runs/<YYYY>/<run-id>/`` (atomic; the run becomes visible whole).
5. The ``run`` entry is appended to ``chain.jsonl`` (see below), then the journal is removed.

A chain append first writes ``.journal/append.json`` (byte offset and the exact line), then writes the
line with one ``O_APPEND`` write and fsyncs, then removes the journal.  ``chain.jsonl`` therefore only
ever grows; an interrupted append is finished by writing the rest of the journaled line.

``verify_archive`` accepts a run folder that is missing from the chain only when a run journal covers
it (and the folder matches the journaled manifest hash): such a folder is a *pending* note, not a
problem.  ``recover`` completes such a publication (appends the entry) or, when the rename had not
happened, rolls it back; it also finishes interrupted appends, promotions and purges and deletes
abandoned staging folders.

Promotion protocol (``record_promotion``)
-----------------------------------------
Under the archive lock: ``.journal/promotion-<model>.json`` records the new ``promoted`` parameter
version (its full record) and the intended chain payload; the version file is written once; the
``promotion`` entry is appended; the journal is removed.  ``recover`` appends the entry when the file
was written, or drops the journal when it was not, so a crash leaves both or neither.  A promoted
version that no chain entry records is a problem for ``verify_archive`` and is refused by the
production-version lookup (``production_snapshot``).

Damage
------
A run refuses to append to an archive that ``verify_archive`` rejects (``require_intact``).  When the
originals cannot be restored, ``acknowledge_damage`` appends an ``acknowledgement`` entry naming each
problem (and recording, as found, run folders and promoted versions whose chain entries were lost);
``verify_archive`` then reports those problems as ``acknowledged`` notes and the archive can continue.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import fcntl
import json
import os
import pathlib
import re
import secrets
import shutil
from collections.abc import Callable, Iterator
from typing import Any

from fitaudit.core.exceptions import FitauditError, InputError

from ._io import SAFE_ID, canonical_json, sha256_bytes, sha256_file, utc_now, write_once, write_once_chunks
from .params import ParameterStoreError, ParameterVersion, list_versions, promotion_fields, verify_params, write_fields

__all__ = [
    "SAFE_NAME",
    "CHAIN_KINDS",
    "NOTE_KINDS",
    "MANIFEST_SCHEMA_VERSION",
    "ArchiveError",
    "ArchiveProblem",
    "PublishedRun",
    "RunWriter",
    "WorkFolder",
    "open_work_folder",
    "new_run_id",
    "open_run",
    "append_chain",
    "read_chain",
    "verify_archive",
    "recover",
    "list_runs",
    "record_signoff",
    "purge_runs",
    "record_promotion",
    "ProductionSnapshot",
    "production_snapshot",
    "acknowledge_damage",
    "require_intact",
    "chain_head",
    "parse_head",
    "history_runs",
]

SAFE_NAME = SAFE_ID  # run ids and path segments follow the registry's rule for model ids
CHAIN_KINDS = ("run", "promotion", "purge", "signoff", "acknowledgement")
NOTE_KINDS = frozenset({"pending", "leftover", "acknowledged"})
MANIFEST_SCHEMA_VERSION = 1
GENESIS = "0" * 64

_CHAIN = "chain.jsonl"
_RUNS = "runs"
_PARAMS = "params"
_STAGING = ".staging"
_JOURNAL = ".journal"
_TRASH = ".trash"
_WORK = ".work"
_LOCK = ".lock"
_APPEND_JOURNAL = "append.json"
_PURGE_JOURNAL = "purge.json"
_PROMOTION_PREFIX = "promotion-"  # .journal/promotion-<model-id>.json
_MANIFEST = "manifest.json"
_REPORT = "index.html"
_ENTRY_KEYS = frozenset({"seq", "kind", "time", "payload", "prev", "hash"})
_HEX64 = re.compile(r"^[0-9a-f]{64}$")
_RUN_PATH = re.compile(r"^runs/(?P<year>[0-9]{4})/(?P<run_id>[^/]+)$")
_PARAMS_PATH = re.compile(r"^params/(?P<model>[^/]+)/(?P<version>[1-9][0-9]*)\.json$")
_RUN_ID_DATE = re.compile(r"^(?P<y>[0-9]{4})(?P<m>[0-9]{2})(?P<d>[0-9]{2})-")

# Test seam: when set, called with a step name at each step of the protocols (crash tests use it to
# sleep or to SIGKILL the process at a chosen step).  Never set in production code.
_STEP_HOOK: Callable[[str], None] | None = None


class ArchiveError(FitauditError):
    """The archive is in a state that forbids the requested change; the message says what to do."""


@dataclasses.dataclass(frozen=True)
class ArchiveProblem:
    """One finding of :func:`verify_archive`.

    ``kind`` is one of ``chain``, ``missing``, ``added``, ``changed``, ``unrecorded``, ``layout``,
    ``params``, ``journal`` (problems) or ``pending``, ``leftover``, ``acknowledged`` (notes, see
    ``NOTE_KINDS``; ``acknowledged`` is a problem recorded by an ``acknowledgement`` chain entry);
    ``where`` names the file or chain line, relative to the archive root.
    """

    kind: str
    where: str
    message: str

    @property
    def is_note(self) -> bool:
        """True for notes (an interrupted publication covered by a journal, private leftovers)."""
        return self.kind in NOTE_KINDS

    def to_dict(self) -> dict[str, str]:
        """Plain-dict form."""
        return dataclasses.asdict(self)

    def __str__(self) -> str:
        return f"{self.where}: {self.message}"


@dataclasses.dataclass(frozen=True)
class PublishedRun:
    """A run made visible by :meth:`RunWriter.finish`."""

    run_id: str
    path: pathlib.Path
    manifest_sha256: str
    seq: int

    def to_dict(self) -> dict[str, Any]:
        """Plain-dict form (path as a string)."""
        return {"run_id": self.run_id, "path": str(self.path), "manifest_sha256": self.manifest_sha256, "seq": self.seq}


# ----------------------------------------------------------------------------------------------
# names and paths


def _check_name(value: object, what: str) -> str:
    if not isinstance(value, str) or not SAFE_NAME.fullmatch(value):
        raise InputError(
            f"{what} {value!r} is not a safe name: use 1-128 characters from A-Z, a-z, 0-9, '_', '.', '-', "
            "starting with a letter or digit"
        )
    return value


def _split_relpath(relpath: object) -> tuple[str, ...]:
    """Validate a file path inside a run folder and return its segments."""
    if not isinstance(relpath, str) or not relpath:
        raise InputError(f"file path {relpath!r} must be a non-empty string such as 'models/m1.html'")
    if "\x00" in relpath:
        raise InputError(f"file path {relpath!r} contains a NUL character; remove it")
    if relpath.startswith(("/", "\\")) or re.match(r"^[A-Za-z]:", relpath):
        raise InputError(f"file path {relpath!r} is absolute; give a path relative to the run folder")
    parts = tuple(relpath.split("/"))
    if any(part in ("", ".", "..") for part in parts):
        raise InputError(f"file path {relpath!r} has an empty, '.' or '..' segment; give a plain relative path")
    for part in parts:
        if not SAFE_NAME.fullmatch(part):
            raise InputError(
                f"file path {relpath!r}: segment {part!r} is not a safe name; use 1-128 characters from "
                "A-Z, a-z, 0-9, '_', '.', '-', starting with a letter or digit"
            )
    return parts


def _root(archive_root: str | os.PathLike) -> pathlib.Path:
    return pathlib.Path(os.fspath(archive_root)).absolute()


def _rel(root: pathlib.Path, path: pathlib.Path) -> str:
    return path.relative_to(root).as_posix()


def _as_date(value: object, what: str) -> _dt.date:
    if isinstance(value, _dt.datetime) or not isinstance(value, _dt.date):
        raise InputError(f"{what} must be a datetime.date (not a datetime); got {value!r}")
    return value


def _text(value: object, what: str, *, allow_empty: bool = False) -> str:
    if not isinstance(value, str) or (not allow_empty and not value.strip()):
        raise InputError(f"{what} must be a non-empty string; got {value!r}")
    return value


def new_run_id(as_of: _dt.date, now: _dt.datetime | None = None) -> str:
    """Return a fresh run id ``<as-of YYYYMMDD>-T<UTC HHMMSS>Z-<4 random hex>``.

    Parameters
    ----------
    as_of : datetime.date
        The audit's as-of date; it leads the id so ids sort by as-of date.
    now : datetime.datetime, optional
        A timezone-aware time (default: the current time); converted to UTC.

    Returns
    -------
    str
        For example ``"20261130-T223001Z-3f9a"``; always matches ``SAFE_NAME``.
    """
    as_of = _as_date(as_of, "as_of")
    if now is None:
        now = _dt.datetime.now(_dt.UTC)
    if not isinstance(now, _dt.datetime) or now.tzinfo is None:
        raise InputError(f"now must be a timezone-aware datetime (for example with tzinfo=timezone.utc); got {now!r}")
    now = now.astimezone(_dt.UTC)
    return f"{as_of:%Y%m%d}-T{now:%H%M%S}Z-{secrets.token_hex(2)}"


def _as_of_from_run_id(run_id: str) -> _dt.date:
    match = _RUN_ID_DATE.match(run_id)
    if match:
        with contextlib.suppress(ValueError):
            return _dt.date(int(match["y"]), int(match["m"]), int(match["d"]))
    raise InputError(f"run id {run_id!r} does not start with an as-of date YYYYMMDD-; pass as_of= to open_run")


# ----------------------------------------------------------------------------------------------
# low-level durability helpers


def _step(name: str) -> None:
    if _STEP_HOOK is not None:
        _STEP_HOOK(name)


def _fsync_dir(path: pathlib.Path) -> None:
    fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _fsync_tree(folder: pathlib.Path) -> None:
    for dirpath, _dirs, _files in os.walk(folder, topdown=False):
        _fsync_dir(pathlib.Path(dirpath))


def _mkdirs(root: pathlib.Path, rel: str) -> pathlib.Path:
    """Create ``root/rel`` (and parents), fsyncing each parent whose listing changed."""
    path = root
    for part in rel.split("/"):
        child = path / part
        if not child.is_dir():
            child.mkdir(exist_ok=True)
            _fsync_dir(path)
        path = child
    return path


@contextlib.contextmanager
def _archive_lock(root: pathlib.Path, *, shared: bool = False) -> Iterator[None]:
    """Hold ``<root>/.lock`` (exclusive to change the archive, shared to read it consistently).

    A shared lock is taken only when the lock file exists, so verification never writes.
    """
    if shared:
        try:
            fd = os.open(root / _LOCK, os.O_RDONLY)
        except OSError:
            yield
            return
    else:
        root.mkdir(parents=True, exist_ok=True)
        fd = os.open(root / _LOCK, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_SH if shared else fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)


def _write_journal(root: pathlib.Path, name: str, record: dict) -> None:
    folder = _mkdirs(root, _JOURNAL)
    write_once(folder / name, canonical_json(record))
    _fsync_dir(folder)


def _remove_journal(root: pathlib.Path, name: str) -> None:
    folder = root / _JOURNAL
    (folder / name).unlink(missing_ok=True)
    _fsync_dir(folder)


def _read_json(path: pathlib.Path) -> Any:
    return json.loads(path.read_bytes())


def _children(folder: pathlib.Path) -> list[pathlib.Path]:
    return sorted(folder.iterdir()) if folder.is_dir() and not folder.is_symlink() else []


def _append_bytes(path: pathlib.Path, data: bytes) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    try:
        view = memoryview(data)
        while view:
            view = view[os.write(fd, view) :]
        os.fsync(fd)
    except OSError as exc:  # a failed write names no file: name the chain
        raise OSError(exc.errno, exc.strerror, str(path)) from exc
    finally:
        os.close(fd)


def _remove_tree(path: pathlib.Path) -> None:
    shutil.rmtree(path)
    _fsync_dir(path.parent)


# ----------------------------------------------------------------------------------------------
# the chain


@dataclasses.dataclass(frozen=True)
class _Chain:
    """chain.jsonl as read: well-formed entries with their line numbers, problems, raw bytes."""

    entries: tuple[tuple[int, dict], ...]
    problems: tuple[ArchiveProblem, ...]
    data: bytes
    torn: bytes  # trailing bytes after the last newline (an interrupted append, or damage)
    last_hash: str | None = None  # the hash the next line's prev must equal (None: not checked)


def _entry_hash(entry: dict) -> str:
    return sha256_bytes(canonical_json({k: v for k, v in entry.items() if k != "hash"}))


def _load_chain(root: pathlib.Path) -> _Chain:
    path = root / _CHAIN
    data = path.read_bytes() if path.exists() else b""
    lines = data.split(b"\n")
    torn = lines.pop()
    entries: list[tuple[int, dict]] = []
    problems: list[ArchiveProblem] = []
    expected_prev: str | None = GENESIS

    def bad(line_no: int, message: str) -> None:
        problems.append(ArchiveProblem("chain", f"{_CHAIN} line {line_no}", message))

    for line_no, raw in enumerate(lines, start=1):
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
        if canonical_json(entry) != raw:
            bad(line_no, "is not in canonical form (line edited)")
        if entry["hash"] != _entry_hash(entry):
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
    return _Chain(tuple(entries), tuple(problems), data, torn, expected_prev)


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
                return entry
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
        return [entry for _, entry in _intact_chain(root).entries]


# ----------------------------------------------------------------------------------------------
# reading the chain's meaning: runs, purges, sign-offs, promotions


@dataclasses.dataclass
class _RunRecord:
    run_id: str
    path: str
    as_of: str
    manifest_sha256: str
    report_sha256: str | None
    line: int
    time: str
    purged_line: int | None = None
    signoffs: list[dict] = dataclasses.field(default_factory=list)


def _run_payload_problem(payload: dict) -> str | None:
    match = _RUN_PATH.fullmatch(str(payload.get("path")))
    if not (isinstance(payload.get("run_id"), str) and SAFE_NAME.fullmatch(payload["run_id"])):
        return "payload has no safe run_id"
    if not match or match["run_id"] != payload["run_id"]:
        return "payload path is not runs/<YYYY>/<run_id>"
    if not _HEX64.fullmatch(str(payload.get("manifest_sha256"))):
        return "payload has no manifest_sha256"
    try:
        _dt.date.fromisoformat(str(payload.get("as_of")))
    except ValueError:
        return "payload has no ISO as_of date"
    return None


def _interpret(chain: _Chain) -> tuple[dict[str, _RunRecord], list[ArchiveProblem]]:
    """Follow run, purge and sign-off entries; return the run records and inconsistencies."""
    runs: dict[str, _RunRecord] = {}
    problems: list[ArchiveProblem] = []
    for line, entry in chain.entries:
        where, payload = f"{_CHAIN} line {line}", entry["payload"]
        if entry["kind"] == "run":
            problem = _run_payload_problem(payload)
            if problem:
                problems.append(ArchiveProblem("chain", where, problem))
            elif payload["run_id"] in runs:
                first = runs[payload["run_id"]].line
                problems.append(
                    ArchiveProblem("chain", where, f"records run {payload['run_id']} again (first at line {first})")
                )
            else:
                runs[payload["run_id"]] = _RunRecord(
                    payload["run_id"],
                    payload["path"],
                    payload["as_of"],
                    payload["manifest_sha256"],
                    payload.get("report_sha256"),
                    line,
                    entry["time"],
                )
        elif entry["kind"] == "purge":
            items = payload.get("runs")
            if not isinstance(items, list) or not items:
                problems.append(ArchiveProblem("chain", where, "purge payload has no list of runs"))
                continue
            for item in items:
                record = runs.get(item.get("run_id")) if isinstance(item, dict) else None
                if record is None or record.purged_line is not None:
                    problems.append(
                        ArchiveProblem("chain", where, f"purges {item!r}, which is not a published, unpurged run")
                    )
                elif item.get("manifest_sha256") != record.manifest_sha256 or item.get("path") != record.path:
                    problems.append(
                        ArchiveProblem(
                            "chain", where, f"purge of run {record.run_id} does not match line {record.line}"
                        )
                    )
                else:
                    record.purged_line = line
        elif entry["kind"] == "signoff":
            record = runs.get(payload.get("run_id"))
            if record is None or record.purged_line is not None:
                message = f"signs off run {payload.get('run_id')!r}, which is not a published, unpurged run"
                problems.append(ArchiveProblem("chain", where, message))
            elif payload.get("manifest_sha256") != record.manifest_sha256:
                message = f"sign-off's manifest SHA-256 differs from run {record.run_id} at line {record.line}"
                problems.append(ArchiveProblem("chain", where, message))
            else:
                record.signoffs.append({**payload, "time": entry["time"], "line": line})
        elif entry["kind"] == "acknowledgement":
            for item in payload.get("runs") or []:  # run folders found without their chain entry, recorded as found
                problem = _run_payload_problem(item) if isinstance(item, dict) else "is not an object"
                if problem:
                    problems.append(ArchiveProblem("chain", where, f"acknowledged run: {problem}"))
                elif item["run_id"] in runs:
                    problems.append(
                        ArchiveProblem("chain", where, f"acknowledges run {item['run_id']}, which is already recorded")
                    )
                else:
                    runs[item["run_id"]] = _RunRecord(
                        item["run_id"],
                        item["path"],
                        item["as_of"],
                        item["manifest_sha256"],
                        item.get("report_sha256"),
                        line,
                        entry["time"],
                    )
    return runs, problems


def _intact_runs(root: pathlib.Path) -> tuple[_Chain, dict[str, _RunRecord]]:
    chain = _intact_chain(root)
    runs, problems = _interpret(chain)
    acks = _acknowledgements(chain)
    problems = [p for p in problems if not acks.covers(p)]
    if problems:
        raise ArchiveError(f"{problems[0]}; `fitaudit verify` lists every problem. {_RESTORE_OR_ACKNOWLEDGE}")
    return chain, runs


# ----------------------------------------------------------------------------------------------
# checking run folders and parameter files


def _scan_folder(folder: pathlib.Path) -> tuple[dict[str, pathlib.Path], list[str], list[str]]:
    """Regular files (relpath -> path), folders, and other entries (symlinks, devices) under ``folder``."""
    files: dict[str, pathlib.Path] = {}
    dirs: list[str] = []
    odd: list[str] = []
    for dirpath, dirnames, filenames in os.walk(folder):
        base = pathlib.Path(dirpath)
        for name in sorted(dirnames + filenames):
            path = base / name
            rel = path.relative_to(folder).as_posix()
            if path.is_symlink() or not (path.is_file() or path.is_dir()):
                odd.append(rel)
            elif path.is_dir():
                dirs.append(rel)
            else:
                files[rel] = path
    return files, dirs, odd


def _check_run_folder(
    root: pathlib.Path, rel: str, run_id: str, manifest_sha256: str, source: str
) -> list[ArchiveProblem]:
    """Compare a run folder with its manifest and the manifest with the hash recorded at ``source``."""
    folder = root / rel
    if folder.is_symlink() or not folder.is_dir():
        return [ArchiveProblem("missing", rel, f"run folder is missing (recorded at {source})")]
    manifest_path = folder / _MANIFEST
    if manifest_path.is_symlink() or not manifest_path.is_file():
        return [ArchiveProblem("missing", f"{rel}/{_MANIFEST}", f"manifest is missing (run recorded at {source})")]
    problems = []
    data = manifest_path.read_bytes()
    if sha256_bytes(data) != manifest_sha256:
        problems.append(
            ArchiveProblem(
                "changed",
                f"{rel}/{_MANIFEST}",
                f"content changed: its SHA-256 {sha256_bytes(data)[:12]}... differs from {manifest_sha256[:12]}... recorded at {source}",
            )
        )
    try:
        manifest = json.loads(data)
        listed = manifest["files"]
        if manifest.get("run_id") != run_id or not isinstance(listed, dict):
            raise ValueError
    except (ValueError, KeyError, TypeError, AttributeError):
        return problems + [ArchiveProblem("changed", f"{rel}/{_MANIFEST}", f"is not the manifest of run {run_id}")]
    files, dirs, odd = _scan_folder(folder)
    files.pop(_MANIFEST)
    for name in odd:
        problems.append(
            ArchiveProblem("added", f"{rel}/{name}", "is not a regular file or folder (link or device added)")
        )
    for name in sorted(set(listed) - set(files)):
        problems.append(
            ArchiveProblem("missing", f"{rel}/{name}", "is listed in manifest.json but missing (file deleted)")
        )
    for name in sorted(set(files) - set(listed)):
        problems.append(ArchiveProblem("added", f"{rel}/{name}", "is not listed in manifest.json (file added)"))
    for name in sorted(set(files) & set(listed)):
        digest, size = sha256_file(files[name]), files[name].stat().st_size
        expected = listed[name] if isinstance(listed[name], dict) else {}
        if digest != expected.get("sha256") or size != expected.get("size"):
            problems.append(
                ArchiveProblem(
                    "changed",
                    f"{rel}/{name}",
                    f"content changed: SHA-256 {digest[:12]}... ({size} bytes) differs from manifest.json",
                )
            )
    needed = {"/".join(name.split("/")[:k]) for name in listed for k in range(1, name.count("/") + 1)}
    for name in sorted(set(dirs) - needed):
        problems.append(ArchiveProblem("added", f"{rel}/{name}", "folder is not part of the run (folder added)"))
    return problems


def _promotion_problem(root: pathlib.Path, payload: dict) -> str | None:
    """Why a promotion payload does not match the parameter version it names (None when it does)."""
    match = _PARAMS_PATH.fullmatch(str(payload.get("path")))
    if not match:
        return f"payload path {payload.get('path')!r} is not params/<model-id>/<version>.json"
    try:
        versions = {v.version: v for v in list_versions(root, match["model"])}
    except ParameterStoreError as exc:
        return str(exc).replace(f"{root}/", "")
    record = versions.get(int(match["version"]))
    if record is None:
        return f"{payload['path']} is missing"
    if record.sha256 != payload.get("sha256"):
        return f"{payload['path']} has sha256 {record.sha256[:12]}..., not the recorded {str(payload.get('sha256'))[:12]}..."
    return None


def _check_params(root: pathlib.Path) -> list[ArchiveProblem]:
    """The parameter store's own checks (fitaudit.tasks.params.verify_params), plus byte-exact form."""
    problems = []
    for message in verify_params(root):
        where, _, text = message.replace(f"{root}/", "").partition(": ")
        problems.append(ArchiveProblem("params", where, text))
    for path in sorted((root / _PARAMS).glob("*/*")):
        rel = _rel(root, path)
        if path.name.startswith(".") and path.name.endswith(".tmp"):
            problems.append(ArchiveProblem("leftover", rel, "temporary file of an interrupted write"))
        elif path.name.endswith(".json") and path.is_file() and not path.is_symlink():
            data = path.read_bytes()
            with contextlib.suppress(ValueError):  # unreadable files are reported by verify_params
                if data != canonical_json(json.loads(data), indent=2):
                    message = "is not byte-for-byte the canonical JSON the parameter store writes (file edited)"
                    problems.append(ArchiveProblem("params", rel, message))
    return problems


# ----------------------------------------------------------------------------------------------
# verification


def _run_id_of(journal: dict) -> str | None:
    """The run id of a well-formed run journal, else None."""
    payload = journal.get("payload")
    if isinstance(payload, dict) and _run_payload_problem(payload) is None:
        return payload["run_id"]
    return None


@dataclasses.dataclass
class _Journals:
    append: dict | None = None
    purge: dict | None = None
    runs: dict[str, dict] = dataclasses.field(default_factory=dict)  # target path -> run journal
    promotions: dict[str, dict] = dataclasses.field(default_factory=dict)  # params path -> promotion journal


def _promotion_journal_path(record: object, name: str) -> str | None:
    """The params path of a well-formed promotion journal named ``name``, else None."""
    if (
        not isinstance(record, dict)
        or not isinstance(record.get("payload"), dict)
        or not isinstance(record.get("record"), dict)
    ):
        return None
    match = _PARAMS_PATH.fullmatch(str(record["payload"].get("path")))
    if (
        not match
        or name != f"{_PROMOTION_PREFIX}{match['model']}.json"
        or not _HEX64.fullmatch(str(record["payload"].get("sha256")))
    ):
        return None
    return record["payload"]["path"]


def _read_journals(root: pathlib.Path, problems: list[ArchiveProblem]) -> _Journals:
    journals = _Journals()
    folder = root / _JOURNAL
    for path in _children(folder):
        rel = _rel(root, path)
        if path.name.startswith(".") and path.name.endswith(".tmp"):
            problems.append(ArchiveProblem("leftover", rel, "temporary file of an interrupted journal write"))
            continue
        try:
            record = _read_json(path)
        except (OSError, ValueError):
            problems.append(ArchiveProblem("journal", rel, "is not a readable journal"))
            continue
        if not isinstance(record, dict):
            record = {}
        offset = record.get("offset")
        if (
            path.name == _APPEND_JOURNAL
            and isinstance(record.get("line"), str)
            and isinstance(offset, int)
            and offset >= 0
        ):
            journals.append = record  # its note comes from _check_chain_tail
        elif path.name == _PURGE_JOURNAL and isinstance(record.get("payload"), dict):
            journals.purge = record
            problems.append(
                ArchiveProblem("pending", rel, "a purge was interrupted; recover() finishes or rolls it back")
            )
        elif path.name.startswith(_PROMOTION_PREFIX) and _promotion_journal_path(record, path.name):
            journals.promotions[record["payload"]["path"]] = record
            problems.append(
                ArchiveProblem(
                    "pending",
                    rel,
                    f"promotion {record['payload']['path']} was interrupted; recover() completes or rolls it back",
                )
            )
        elif path.name == f"run-{_run_id_of(record)}.json" and SAFE_NAME.fullmatch(str(record.get("staging"))):
            journals.runs[record["payload"]["path"]] = record
            problems.append(
                ArchiveProblem(
                    "pending",
                    rel,
                    f"publication of run {_run_id_of(record)} was interrupted; recover() completes or rolls it back",
                )
            )
        else:
            problems.append(ArchiveProblem("journal", rel, "is not a journal this archive writes (file added)"))
    return journals


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
                        "is not recorded in chain.jsonl and no publication journal covers it (chain line removed, or folder added)",
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
    chain = _load_chain(root)
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
    for line, entry in chain.entries:
        if entry["kind"] == "promotion":
            problem = _promotion_problem(root, entry["payload"])
            if problem:
                problems.append(ArchiveProblem("params", f"{_CHAIN} line {line}", f"promotion: {problem}"))
    for line, item in acks.promotions:
        problem = _promotion_problem(root, item)
        if problem:
            problems.append(ArchiveProblem("params", f"{_CHAIN} line {line}", f"acknowledged promotion: {problem}"))
    problems += _check_promotion_records(root, _recorded_promotions(chain, acks), journals)
    problems += _check_params(root)
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
                    f"does not contain the expected head {digest[:12]}...{where} (lines removed from its end, or the chain rewritten)",
                )
            )
    return acks.mark(problems)


# ----------------------------------------------------------------------------------------------
# promotions: recorded with their chain entry, checked by the production-version lookup


def _recorded_promotions(chain: _Chain, acks: _Acks) -> dict[str, tuple[str, int]]:
    """``params path -> (sha256, line)`` of every promotion the chain records, oldest first.

    Promotion entries on undamaged lines and promoted versions recorded by an acknowledgement; a
    path recorded again moves to the end (it is newer).
    """
    damaged = {_line_of(p) for p in chain.problems}
    items = [(line, e["payload"]) for line, e in chain.entries if e["kind"] == "promotion" and line not in damaged]
    out: dict[str, tuple[str, int]] = {}
    for line, payload in sorted(items + acks.promotions, key=lambda item: item[0]):
        path, digest = payload.get("path"), payload.get("sha256")
        if isinstance(path, str) and isinstance(digest, str) and _PARAMS_PATH.fullmatch(path):
            out.pop(path, None)
            out[path] = (digest, line)
    return out


def _check_promotion_records(
    root: pathlib.Path, recorded: dict[str, tuple[str, int]], journals: _Journals
) -> list[ArchiveProblem]:
    """Every ``promoted`` version must be recorded in the chain (or be a pending promotion)."""
    problems = []
    for path in sorted((root / _PARAMS).glob("*/*.json")):
        rel = _rel(root, path)
        if not _PARAMS_PATH.fullmatch(rel) or path.is_symlink() or not path.is_file():
            continue
        try:
            data = json.loads(path.read_bytes())
        except (OSError, ValueError):
            continue  # reported by verify_params
        if not isinstance(data, dict) or data.get("status") != "promoted":
            continue
        pending = journals.promotions.get(rel)
        if pending is not None:
            if data.get("sha256") != pending["payload"]["sha256"]:
                message = (
                    "differs from the version its interrupted promotion journal records (file changed after a crash)"
                )
                problems.append(ArchiveProblem("params", rel, message))
        elif rel not in recorded:
            problems.append(
                ArchiveProblem(
                    "params",
                    rel,
                    "is a promoted parameter version that no promotion entry in chain.jsonl records (written by hand or "
                    "outside `fitaudit promote`); the production-version lookup refuses it",
                )
            )
    return problems


def _production_locked(
    root: pathlib.Path, recorded: dict[str, tuple[str, int]], pending: set[str], model_id: str
) -> tuple[ParameterVersion | None, str | None]:
    """(production version, None) or (None, why it cannot be used); the caller holds a lock."""
    try:
        versions = list_versions(root, model_id)
    except ParameterStoreError as exc:
        return None, str(exc).replace(f"{root}/", "")
    by_path = {f"{_PARAMS}/{model_id}/{v.version}.json": v for v in versions}
    for path, version in by_path.items():
        if version.status != "promoted":
            continue
        record = recorded.get(path)
        if record is None:
            why = (
                "its promotion was interrupted (the next run's recovery settles it)"
                if path in pending
                else "no promotion entry in chain.jsonl records it (written by hand or outside `fitaudit promote`)"
            )
            return None, (
                f"model {model_id!r}: {path} is a promoted parameter version, but {why}; it is not used as the "
                "production version. Run `fitaudit verify` on the archive"
            )
        if record[0] != version.sha256:
            return None, (
                f"model {model_id!r}: {path} differs from the promotion recorded at {_CHAIN} line {record[1]} "
                f"(SHA-256 {version.sha256[:12]}..., recorded {record[0][:12]}...); restore it from a backup"
            )
    mine = [(path, record) for path, record in recorded.items() if path.startswith(f"{_PARAMS}/{model_id}/")]
    if not mine:
        return None, None
    path, (_digest, line) = mine[-1]
    if path not in by_path:
        return None, (
            f"model {model_id!r}: {path}, the production version recorded at {_CHAIN} line {line}, is missing; "
            "restore it from a backup, or promote a version again (`fitaudit promote`)"
        )
    return by_path[path], None


@dataclasses.dataclass(frozen=True)
class ProductionSnapshot:
    """The production versions of a set of models, read together under the archive lock.

    ``versions`` maps each model id to its production :class:`~fitaudit.tasks.params.ParameterVersion`
    (None: never promoted); ``errors`` maps a model id to why its parameter store cannot be used;
    ``seq`` and ``head`` are the chain's length and last hash when the snapshot was taken.
    """

    versions: dict
    errors: dict
    seq: int
    head: str | None

    def to_dict(self) -> dict:
        """The manifest's record: chain position and, per model, version and SHA-256 (or the error)."""
        out: dict[str, Any] = {}
        for model_id in sorted(set(self.versions) | set(self.errors)):
            version = self.versions.get(model_id)
            if model_id in self.errors:
                out[model_id] = {"error": self.errors[model_id]}
            else:
                out[model_id] = None if version is None else {"version": version.version, "sha256": version.sha256}
        return {"chain_seq": self.seq, "chain_head": self.head, "versions": out}


def production_snapshot(archive_root: str | os.PathLike, model_ids) -> ProductionSnapshot:
    """The production versions of ``model_ids``, all read at one moment of the archive.

    Read under the archive's shared lock, so a promotion (which holds the exclusive lock while it
    writes its version and its chain entry) is seen whole or not at all, and one audit run uses one
    state of the parameter store.  A model whose production version cannot be used (a ``promoted``
    version with no matching chain entry, a recorded production version that is missing, an
    altered file) gets an entry in ``errors`` naming the file and the fix.

    Raises
    ------
    ArchiveError
        When the chain is damaged (and the damage not acknowledged).
    """
    ids = list(dict.fromkeys(model_ids))
    root = _root(archive_root)
    if not root.is_dir():
        return ProductionSnapshot({m: None for m in ids}, {}, 0, None)
    with _archive_lock(root, shared=True):
        chain = _intact_chain(root)
        recorded = _recorded_promotions(chain, _acknowledgements(chain))
        pending = set(_read_journals(root, []).promotions)
        versions, errors = {}, {}
        for model_id in ids:
            version, error = _production_locked(root, recorded, pending, model_id)
            versions[model_id] = version
            if error:
                errors[model_id] = error
        last = chain.entries[-1][1]["hash"] if chain.entries else None
        return ProductionSnapshot(versions, errors, chain.data.count(b"\n"), last)


def record_promotion(
    archive_root: str | os.PathLike,
    model_id: str,
    version: int,
    *,
    approved_by: str,
    note: str,
    details: dict | None = None,
) -> ParameterVersion:
    """Promote ``version`` of ``model_id``: a new ``promoted`` version and its chain entry, together.

    Under the archive lock, ``.journal/promotion-<model>.json`` records the new version and the
    chain payload, the version file is written once, the ``promotion`` entry appended and the
    journal removed; :func:`recover` finishes or rolls back an interrupted promotion, so a crash
    leaves both or neither.  The entry's payload holds the version's path and SHA-256, the model
    id, the promoted version, the approver and ``details``.

    Returns
    -------
    ParameterVersion
        The new ``promoted`` version.

    Raises
    ------
    ParameterStoreError
        As :func:`fitaudit.tasks.params.promotion_fields` (unknown version, already in production,
        blank approver or note).
    ArchiveError
        The chain is damaged.
    """
    extra = _payload_json("promotion", dict(details or {}))
    root = _root(archive_root)
    with _archive_lock(root):
        _settle_append(root)
        chain = _intact_chain(root)
        for journal_path in sorted((root / _JOURNAL).glob(f"{_PROMOTION_PREFIX}*.json")):
            _recover_promotion(root, journal_path)
            chain = _intact_chain(root)
        recorded = _recorded_promotions(chain, _acknowledgements(chain))
        current, _ = _production_locked(root, recorded, set(), model_id)
        fields = promotion_fields(root, model_id, version, approved_by=approved_by, note=note, current=current)
        journal = f"{_PROMOTION_PREFIX}{model_id}.json"
        claimed: dict[str, Any] = {}

        def claim(record: ParameterVersion) -> None:
            if claimed:
                _remove_journal(root, journal)
            claimed["payload"] = {
                **extra,
                "path": f"{_PARAMS}/{model_id}/{record.version}.json",
                "sha256": record.sha256,
                "model_id": model_id,
                "promotes": version,
                "approved_by": approved_by,
            }
            _write_journal(root, journal, {"payload": claimed["payload"], "record": record.to_dict()})
            _step("promotion-journal-written")

        record = write_fields(root, fields, on_claim=claim)
        _step("promotion-written")
        _append_locked(root, "promotion", claimed["payload"])
        _step("promotion-appended")
        _remove_journal(root, journal)
        return record


def _recover_promotion(root: pathlib.Path, journal_path: pathlib.Path) -> str:
    """Finish (append the entry) or roll back (drop the journal) an interrupted promotion."""
    try:
        record = _read_json(journal_path)
    except ValueError:
        record = None
    path = _promotion_journal_path(record, journal_path.name)
    if path is None:
        raise ArchiveError(
            f"{_rel(root, journal_path)} is not a journal this archive writes; run `fitaudit verify` and investigate"
        )
    payload, target = record["payload"], root / path
    chain = _intact_chain(root)
    done = any(
        e["kind"] == "promotion" and (e["payload"].get("path"), e["payload"].get("sha256")) == (path, payload["sha256"])
        for _, e in chain.entries
    )
    if done:
        action = f"promotion {path}: had finished; removed its journal"
    elif target.exists():
        if target.read_bytes() != canonical_json(record["record"], indent=2):
            raise ArchiveError(
                f"cannot complete the interrupted promotion {path}: the file differs from its journal; investigate before recovering"
            )
        _append_locked(root, "promotion", {**payload, "recovered": True})
        action = f"promotion {path}: completed interrupted promotion (appended its chain entry)"
    else:
        action = f"promotion {path}: rolled back interrupted promotion (the version was not written)"
    _remove_journal(root, journal_path.name)
    return action


# ----------------------------------------------------------------------------------------------
# writing a run


class RunWriter:
    """Writes one run into a private staging folder and publishes it atomically with :meth:`finish`.

    Use as a context manager (``with open_run(...) as run:``); leaving the block without ``finish``
    (or with an exception) discards the staging folder.  Files are written once and never replaced.
    """

    def __init__(
        self, root: pathlib.Path, run_id: str, year: int, as_of: _dt.date, staging: pathlib.Path, lock_fd: int
    ):
        self.run_id = run_id
        self.as_of = as_of
        self.path = root / _RUNS / f"{year:04d}" / run_id
        self._root = root
        self._staging = staging
        self._lock_fd: int | None = lock_fd
        self._files: dict[str, dict[str, Any]] = {}

    def __enter__(self) -> RunWriter:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if self._lock_fd is None:
            return
        self.abort()
        if exc_type is None:
            raise ArchiveError(
                f"run {self.run_id} was not finished; call finish(manifest) inside the with-block. Its staged files were discarded"
            )

    def _check_open(self) -> None:
        if self._lock_fd is None:
            raise ArchiveError(f"run {self.run_id} is already finished or aborted; open a new run")

    def write_bytes(self, relpath: str, data: bytes) -> None:
        """Write one file of the run; ``relpath`` is relative (``"models/m1.html"``), never reused.

        Raises
        ------
        InputError
            Unsafe path (absolute, ``..``, NUL, segments not matching ``SAFE_NAME``), ``manifest.json``,
            a path already written, or data that is not bytes.
        """
        parts = self._claim(relpath)
        key = "/".join(parts)
        if not isinstance(data, (bytes, bytearray, memoryview)):
            raise InputError(f"data for {key!r} must be bytes; use write_text or write_json for {type(data).__name__}")
        data = bytes(data)
        write_once(self._staging.joinpath(*parts), data)
        self._files[key] = {"sha256": sha256_bytes(data), "size": len(data)}
        _step("file-written")

    def write_chunks(self, relpath: str, chunks) -> None:
        """Write one file from an iterable of bytes pieces, never holding it whole (see :meth:`write_bytes`)."""
        parts = self._claim(relpath)
        sha, size = write_once_chunks(self._staging.joinpath(*parts), (bytes(c) for c in chunks))
        self._files["/".join(parts)] = {"sha256": sha, "size": size}
        _step("file-written")

    def _claim(self, relpath: str) -> tuple[str, ...]:
        """The checked path segments of a file about to be written (see :meth:`write_bytes`)."""
        self._check_open()
        parts = _split_relpath(relpath)
        key = "/".join(parts)
        if key == _MANIFEST:
            raise InputError(f"{_MANIFEST} is written by finish(); pass the manifest's fields there")
        clash = [p for p in ("/".join(parts[:k]) for k in range(1, len(parts) + 1)) if p in self._files]
        if clash or any(name.startswith(key + "/") for name in self._files):
            raise InputError(
                f"{key!r} in run {self.run_id} was already written (or clashes with a file or folder of that name); "
                "files are never overwritten"
            )
        return parts

    def write_text(self, relpath: str, text: str) -> None:
        """Write ``text`` encoded as UTF-8 (see :meth:`write_bytes`)."""
        if not isinstance(text, str):
            raise InputError(f"text for {relpath!r} must be a str; got {type(text).__name__}")
        self.write_bytes(relpath, text.encode("utf-8"))

    def write_json(self, relpath: str, obj: Any) -> None:
        """Write ``obj`` as canonical JSON (sorted keys, indent 2; see :meth:`write_bytes`)."""
        try:
            data = canonical_json(obj, indent=2)
        except (TypeError, ValueError) as exc:
            raise InputError(f"{relpath!r} of run {self.run_id} cannot be written as JSON: {exc}") from exc
        self.write_bytes(relpath, data)

    def abort(self) -> None:
        """Discard the staged files (nothing becomes visible)."""
        if self._lock_fd is None:
            return
        shutil.rmtree(self._staging, ignore_errors=True)
        self._release()

    def _release(self) -> None:
        os.close(self._lock_fd)
        self._lock_fd = None

    def finish(self, manifest: dict) -> PublishedRun:
        """Write ``manifest.json``, publish the run folder atomically and append its chain entry.

        Parameters
        ----------
        manifest : dict
            The caller's fields (run id, UTC start/end, operator, tool and package versions, registry
            hash, input fingerprints, seeds, timings, ``counts``, ...).  ``run_id`` and ``as_of`` are
            added (or must agree); ``schema_version`` and ``files`` (``{relpath: {"sha256", "size"}}``
            for every other file) are added and may not be given.

        Returns
        -------
        PublishedRun
            Run id, final folder, SHA-256 of ``manifest.json`` and the chain entry's ``seq``.
        """
        self._check_open()
        if not isinstance(manifest, dict):
            raise InputError(f"manifest of run {self.run_id} must be a dict; got {type(manifest).__name__}")
        reserved = sorted({"files", "schema_version"} & set(manifest))
        if reserved:
            raise InputError(f"manifest of run {self.run_id} may not set {reserved}; finish() adds them")
        for key, value in (("run_id", self.run_id), ("as_of", self.as_of.isoformat())):
            if key in manifest and manifest[key] != value:
                raise InputError(f"manifest {key} {manifest[key]!r} differs from the run's {value!r}")
        full = {
            **manifest,
            "run_id": self.run_id,
            "as_of": self.as_of.isoformat(),
            "schema_version": MANIFEST_SCHEMA_VERSION,
            "files": dict(sorted(self._files.items())),
        }
        try:
            data = canonical_json(full, indent=2)
        except (TypeError, ValueError) as exc:
            raise InputError(f"manifest of run {self.run_id} cannot be written as JSON: {exc}") from exc
        write_once(self._staging / _MANIFEST, data)
        _fsync_tree(self._staging)
        _step("staged")
        payload = {
            "run_id": self.run_id,
            "path": _rel(self._root, self.path),
            "as_of": self.as_of.isoformat(),
            "manifest_sha256": sha256_bytes(data),
            "report_sha256": self._files.get(_REPORT, {}).get("sha256"),
        }
        with _archive_lock(self._root):
            entry = self._publish_locked(payload)
        self._release()
        return PublishedRun(self.run_id, self.path, payload["manifest_sha256"], entry["seq"])

    def _publish_locked(self, payload: dict) -> dict:
        _settle_append(self._root)
        _, runs = _intact_runs(self._root)
        if self.run_id in runs or self.path.exists():
            raise ArchiveError(f"run {self.run_id} is already published; open a run with a new id (new_run_id())")
        journal = f"run-{self.run_id}.json"
        _mkdirs(self._root, self.path.parent.relative_to(self._root).as_posix())
        _write_journal(self._root, journal, {"staging": self._staging.name, "payload": payload})
        _step("journal-written")
        try:
            os.rename(self._staging, self.path)
        except OSError as exc:
            _remove_journal(self._root, journal)
            raise ArchiveError(f"could not move run {self.run_id} into {self.path}: {exc}") from exc
        _fsync_dir(self.path.parent)
        _fsync_dir(self._staging.parent)
        _step("renamed")
        try:
            entry = _append_locked(self._root, "run", payload)
        except Exception as exc:
            raise ArchiveError(
                f"run {self.run_id} was published but its chain entry could not be appended ({exc}); call recover()"
            ) from exc
        _step("run-appended")
        _remove_journal(self._root, journal)
        _step("journal-removed")
        return entry


def open_run(archive_root: str | os.PathLike, run_id: str, year: int, *, as_of: _dt.date | None = None) -> RunWriter:
    """Start writing run ``run_id``, to be published as ``<archive>/runs/<year>/<run_id>/``.

    Parameters
    ----------
    archive_root : path
        The archive folder (created if missing).
    run_id : str
        Matches ``SAFE_NAME``; unique in the archive (use :func:`new_run_id`).
    year : int
        The four-digit year folder.
    as_of : datetime.date, optional
        The audit's as-of date (used by retention); by default read from the run id's leading
        ``YYYYMMDD-``.

    Returns
    -------
    RunWriter
    """
    root = _root(archive_root)
    _check_name(run_id, "run id")
    if isinstance(year, bool) or not isinstance(year, int) or not 1000 <= year <= 9999:
        raise InputError(f"year must be a four-digit int; got {year!r}")
    as_of = _as_of_from_run_id(run_id) if as_of is None else _as_date(as_of, "as_of")
    with _archive_lock(root):  # recover() scans .staging under this lock: it never sees an unlocked new folder
        _settle_append(root)
        _, runs = _intact_runs(root)
        if run_id in runs or (root / _RUNS / f"{year:04d}" / run_id).exists():
            raise ArchiveError(f"run {run_id} is already published; open a run with a new id (new_run_id())")
        staging = _mkdirs(root, _STAGING) / f"{run_id}.{secrets.token_hex(4)}"
        staging.mkdir()
        fd = os.open(staging, os.O_RDONLY | os.O_DIRECTORY)
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    return RunWriter(root, run_id, year, as_of, staging, fd)


class WorkFolder:
    """A run's scratch folder ``<archive>/.work/<run-id>/``, locked while its run lives.

    It holds the staged batch inputs and the full per-batch outcomes until publication.  The
    folder's directory lock is released when the run ends, or by the kernel when the process dies
    (SIGKILL included); :func:`recover` deletes work folders nobody holds.  Use as a context
    manager, or call :meth:`close` once.
    """

    def __init__(self, path: pathlib.Path, fd: int):
        self.path = path
        self._fd: int | None = fd

    def close(self) -> None:
        """Delete the folder and release its lock (idempotent)."""
        if self._fd is None:
            return
        try:
            shutil.rmtree(self.path, ignore_errors=True)
        finally:
            os.close(self._fd)
            self._fd = None

    def __enter__(self) -> WorkFolder:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def open_work_folder(archive_root: str | os.PathLike, run_id: str) -> WorkFolder:
    """Create and lock the scratch folder of run ``run_id`` (see :class:`WorkFolder`).

    Raises
    ------
    ArchiveError
        When the run id already has a work folder (run ids are unique: use :func:`new_run_id`).
    """
    root = _root(archive_root)
    _check_name(run_id, "run id")
    with _archive_lock(root):  # recover() scans .work under this lock: it never sees an unlocked new folder
        folder = _mkdirs(root, _WORK) / run_id
        try:
            folder.mkdir()
        except FileExistsError:
            raise ArchiveError(
                f"run {run_id} already has a work folder {_rel(root, folder)}; start the run with a new id (new_run_id())"
            ) from None
        fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    return WorkFolder(folder, fd)


# ----------------------------------------------------------------------------------------------
# recovery


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
                f"cannot complete the interrupted publication of run {run_id}: {problems[0]}; investigate before recovering"
            )
        _append_locked(root, "run", {**payload, "recovered": True})
        action = f"run {run_id}: completed interrupted publication (appended its chain entry)"
    else:
        if staging.exists():
            _remove_tree(staging)
        action = f"run {run_id}: rolled back interrupted publication (not yet visible)"
    _remove_journal(root, journal_path.name)
    return action


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


# ----------------------------------------------------------------------------------------------
# listing, sign-off, retention


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


# ----------------------------------------------------------------------------------------------
# the chain's head, refusing damaged archives, acknowledging damage


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


_ADVICE = {
    "chain": "restore chain.jsonl from a backup (lines cut from its end can be put back only while nothing else was appended)",
    "unrecorded": "a run folder without its chain entry: restore chain.jsonl from a backup, or move the folder out of runs/ if it does not belong there",
    "changed": "restore the named files from a backup of the archive",
    "missing": "restore the named files or folders from a backup of the archive",
    "added": "remove what was added to the run folders",
    "params": "restore the named parameter files from a backup (versions are never edited; promote with `fitaudit promote`)",
    "journal": "move the named journal files out of the archive",
    "layout": "move the named entries out of runs/",
}


def _refusal(root: pathlib.Path, problems: list[ArchiveProblem]) -> str:
    shown = "; ".join(str(p) for p in problems[:3]) + (f"; and {len(problems) - 3} more" if len(problems) > 3 else "")
    advice = list(dict.fromkeys(_ADVICE.get(p.kind, _ADVICE["missing"]) for p in problems))
    return (
        f"the archive {root} fails verification, so nothing is added to it: {shown} (`fitaudit verify {root}` lists every "
        f"problem). To go on: {'; '.join(advice)}. If the originals cannot be restored, record the damage in the chain "
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
