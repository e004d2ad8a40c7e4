"""Reading the intents in ``.journal/`` (publications, appends, promotions and purges in progress)."""

from __future__ import annotations

import dataclasses
import pathlib

from .durable import _children, _read_json
from .layout import _APPEND_JOURNAL, _HEX64, _JOURNAL, _PARAMS_PATH, _PROMOTION_PREFIX, _PURGE_JOURNAL, SAFE_NAME, _rel
from .problems import ArchiveProblem
from .records import _run_payload_problem


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
