"""Promotions, written with their chain entry, and the production-version lookup that checks them."""

from __future__ import annotations

import dataclasses
import json
import os
import pathlib
from typing import Any

from .._io import canonical_json
from ..params import ParameterStoreError, ParameterVersion, list_versions, promotion_fields, write_fields
from .chain import (
    _acknowledgements,
    _Acks,
    _append_locked,
    _Chain,
    _intact_chain,
    _line_of,
    _payload_json,
    _settle_append,
)
from .checks import ParamsReads
from .durable import _read_json, _remove_journal, _step, _write_journal
from .journals import _Journals, _promotion_journal_path, _read_journals
from .layout import _CHAIN, _JOURNAL, _PARAMS, _PARAMS_PATH, _PROMOTION_PREFIX, _rel, _root
from .lock import _archive_lock
from .problems import ArchiveError, ArchiveProblem


def _recorded_promotions(chain: _Chain, acks: _Acks, model_id: str | None = None) -> dict[str, tuple[str, int]]:
    """``params path -> (sha256, line)`` of every promotion the chain records, oldest first.

    Promotion entries on undamaged lines and promoted versions recorded by an acknowledgement; a
    path recorded again moves to the end (it is newer).  ``model_id``: that model's only.
    """
    damaged = {_line_of(p) for p in chain.problems}
    folder = f"{_PARAMS}/{model_id}/" if model_id is not None else ""
    items = [
        (line, e["payload"])
        for line, e in chain.entries
        if e["kind"] == "promotion" and line not in damaged and str(e["payload"].get("path")).startswith(folder)
    ]
    out: dict[str, tuple[str, int]] = {}
    for line, payload in sorted(items + acks.promotions, key=lambda item: item[0]):
        path, digest = payload.get("path"), payload.get("sha256")
        if (
            isinstance(path, str)
            and isinstance(digest, str)
            and path.startswith(folder)
            and _PARAMS_PATH.fullmatch(path)
        ):
            out.pop(path, None)
            out[path] = (digest, line)
    return out


def _check_promotion_records(
    root: pathlib.Path, recorded: dict[str, tuple[str, int]], journals: _Journals, reads: ParamsReads
) -> list[ArchiveProblem]:
    """Every ``promoted`` version must be recorded in the chain (or be a pending promotion)."""
    problems = []
    for path in sorted((root / _PARAMS).glob("*/*.json")):
        rel = _rel(root, path)
        if not _PARAMS_PATH.fullmatch(rel) or path.is_symlink() or not path.is_file():
            continue
        try:
            data = json.loads(reads.content(path))
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
                    "is a promoted parameter version that no promotion entry in chain.jsonl records "
                    "(written by hand or outside `fitaudit promote`); the production-version lookup refuses it",
                )
            )
    return problems


def _production_locked(
    root: pathlib.Path, recorded: dict[str, tuple[str, int]], pending: set[str], model_id: str
) -> tuple[ParameterVersion | None, str | None]:
    """(production version, None) or (None, why it cannot be used); the caller holds a lock.

    ``recorded``: the recorded promotions (:func:`_recorded_promotions`), of this model or more.
    """
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
        by_model: dict[str, dict[str, tuple[str, int]]] = {}  # one pass, not one per model
        for path, record in _recorded_promotions(chain, _acknowledgements(chain)).items():
            by_model.setdefault(path.split("/")[1], {})[path] = record
        pending = set(_read_journals(root, []).promotions)
        versions, errors = {}, {}
        for model_id in ids:
            version, error = _production_locked(root, by_model.get(model_id, {}), pending, model_id)
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
        recorded = _recorded_promotions(chain, _acknowledgements(chain), model_id)
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
                f"cannot complete the interrupted promotion {path}: the file differs from its journal; "
                "investigate before recovering"
            )
        _append_locked(root, "promotion", {**payload, "recovered": True})
        action = f"promotion {path}: completed interrupted promotion (appended its chain entry)"
    else:
        action = f"promotion {path}: rolled back interrupted promotion (the version was not written)"
    _remove_journal(root, journal_path.name)
    return action
