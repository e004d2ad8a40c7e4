"""The parameter store: immutable, hashed parameter versions per model entry.

Layout: ``<archive>/params/<model-id>/<version>.json`` with versions 1, 2, 3, ... .  A file is
written once and never changed: promotion writes a *new* version (status ``promoted``, with
``promotes`` naming the version it puts into production) and never edits an old one.  The newest
version with status ``promoted`` is the production version.

Every file holds the canonical JSON of a :class:`ParameterVersion`; its ``sha256`` is the SHA-256
of the canonical JSON of every other field, so any edit to a stored file is detected when it is
read (:func:`list_versions`) or verified (:func:`verify_params`).  Two writers racing for the same
version number cannot clobber each other: the file is linked into place only if it does not exist
(:func:`fitaudit.tasks._io.write_once`), and the loser retries with the next number.
"""

from __future__ import annotations

import json
import math
import os
import pathlib
import re
import threading
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from fitaudit.core.exceptions import FitauditError

from ._io import canonical_json, json_ready, sha256_bytes, utc_now, write_once
from .registry import SAFE_ID

__all__ = [
    "STATUSES",
    "ParameterStoreError",
    "ParameterVersion",
    "write_version",
    "list_versions",
    "production_version",
    "promote",
    "verify_params",
]

STATUSES = ("candidate", "promoted")
_FILE_NAME = re.compile(r"^([1-9][0-9]*)\.json\Z")
_RETRIES = 100  # version numbers tried by one writer before giving up
# A lost race is safe anywhere (write_once links the file into place only if it does not exist, and the
# loser retries with the next number); this lock spares the threads of one process those retries.
_WRITE_LOCK = threading.Lock()


class ParameterStoreError(FitauditError):
    """A parameter version cannot be written, read or promoted; the message names the file or model."""


@dataclass(frozen=True)
class ParameterVersion:
    """One immutable record of a model's parameters.

    Attributes
    ----------
    model_id : str
        The model entry's id.
    version : int
        1, 2, ...; the file name.
    status : {"candidate", "promoted"}
        ``promoted`` records put parameters into production.
    spec, noise : dict
        The model spec and noise law the parameters belong to.
    params : dict of str to float
        Parameter values by name.
    created_at : str
        UTC time of writing (ISO 8601, ``Z``).
    created_by : str
        Person or service account that wrote it (the approver for a promotion).
    lineage : dict
        Where the parameters come from (run id, extract digest, fit window, ...).
    promotes : int or None
        For a promotion, the version whose parameters it puts into production.
    note : str
        Free text (for a promotion: the approval note).
    sha256 : str
        SHA-256 of the canonical JSON of every other field.
    """

    model_id: str
    version: int
    status: str
    spec: dict
    noise: dict
    params: dict
    created_at: str
    created_by: str
    lineage: dict
    promotes: int | None
    note: str
    sha256: str

    def content(self) -> dict:
        """Every field except ``sha256`` (the hashed content)."""
        return {
            "model_id": self.model_id,
            "version": self.version,
            "status": self.status,
            "spec": self.spec,
            "noise": self.noise,
            "params": self.params,
            "created_at": self.created_at,
            "created_by": self.created_by,
            "lineage": self.lineage,
            "promotes": self.promotes,
            "note": self.note,
        }

    def to_dict(self) -> dict:
        """Plain-Python view, ``sha256`` included."""
        return json_ready({**self.content(), "sha256": self.sha256})


def _digest(content: Mapping[str, Any]) -> str:
    return sha256_bytes(canonical_json(content))


def _model_dir(archive_root: str | os.PathLike, model_id: str) -> pathlib.Path:
    if not (isinstance(model_id, str) and SAFE_ID.match(model_id)):
        raise ParameterStoreError(
            f"model id {str(model_id)[:60]!r} is not a safe name (1-128 letters, digits, '_', '.' or '-', starting "
            "with a letter or digit); parameter versions are stored under the id, so it must be safe"
        )
    return pathlib.Path(archive_root) / "params" / model_id


def _version_numbers(folder: pathlib.Path) -> list[int]:
    if not folder.is_dir():
        return []
    numbers = []
    for entry in folder.iterdir():
        match = _FILE_NAME.match(entry.name)
        if match:
            numbers.append(int(match.group(1)))
    return sorted(numbers)


def _check_params(model_id: str, params: Mapping[str, Any]) -> dict[str, float]:
    out = {}
    for name, value in params.items():
        try:
            number = float(value)
        except (TypeError, ValueError):
            number = math.nan
        if isinstance(value, bool) or not math.isfinite(number):
            raise ParameterStoreError(
                f"model {model_id!r}: parameter {name!r} = {value!r} is not a finite number; a parameter version "
                "stores finite fitted values only (was the fit successful?)"
            )
        out[str(name)] = number
    return out


def write_version(
    archive_root: str | os.PathLike,
    model_id: str,
    *,
    spec: Mapping[str, Any],
    noise: Mapping[str, Any],
    params: Mapping[str, float],
    status: str,
    created_by: str,
    lineage: Mapping[str, Any],
    note: str = "",
    promotes: int | None = None,
    created_at: str | None = None,
) -> ParameterVersion:
    """Write the next parameter version of ``model_id`` (never overwriting an existing file).

    Parameters
    ----------
    archive_root : path-like
        The archive folder; files go to ``params/<model-id>/<version>.json`` below it.
    model_id : str
        Must match :data:`fitaudit.tasks.registry.SAFE_ID`.
    spec, noise, params, status, created_by, lineage, note, promotes
        The record's fields (see :class:`ParameterVersion`); ``params`` must be finite numbers.
    created_at : str, optional
        UTC time stamp; default now.

    Returns
    -------
    ParameterVersion
        The record as written, with its version number and hash.

    Raises
    ------
    ParameterStoreError
        Unsafe id, unknown status, non-finite parameter, blank ``created_by``, or no free version
        number after many concurrent attempts.
    """
    folder = _model_dir(archive_root, model_id)
    if status not in STATUSES:
        raise ParameterStoreError(
            f"model {model_id!r}: status {status!r} is not one of {', '.join(map(repr, STATUSES))}"
        )
    if not isinstance(created_by, str) or not created_by.strip():
        raise ParameterStoreError(
            f"model {model_id!r}: created_by is blank; name the person or service account writing the version"
        )
    if promotes is not None and (isinstance(promotes, bool) or not isinstance(promotes, int) or promotes < 1):
        raise ParameterStoreError(
            f"model {model_id!r}: promotes={promotes!r} must be a version number (1, 2, ...) or None"
        )
    fields = json_ready(
        {
            "model_id": model_id,
            "status": status,
            "spec": dict(spec),
            "noise": dict(noise),
            "params": _check_params(model_id, params),
            "created_at": created_at or utc_now(),
            "created_by": created_by,
            "lineage": dict(lineage),
            "promotes": promotes,
            "note": note,
        }
    )
    with _WRITE_LOCK:
        numbers = _version_numbers(folder)
        version = (numbers[-1] if numbers else 0) + 1
        for _ in range(_RETRIES):
            content = {**fields, "version": version}
            record = ParameterVersion(**content, sha256=_digest(content))
            try:
                write_once(folder / f"{version}.json", canonical_json(record.to_dict(), indent=2))
            except FileExistsError:
                version += 1  # another process took this number first
                continue
            return record
    raise ParameterStoreError(
        f"model {model_id!r}: no free version number after {_RETRIES} attempts; is another process looping?"
    )


def _load(path: pathlib.Path, model_id: str, version: int) -> ParameterVersion:
    """Read one file and verify its hash, name and folder; ParameterStoreError names the file."""
    try:
        data = json.loads(path.read_bytes())
    except (OSError, ValueError) as exc:
        raise ParameterStoreError(
            f"{path}: cannot be read as JSON ({exc}); restore it from a backup of the archive"
        ) from None
    if not isinstance(data, dict) or "sha256" not in data:
        raise ParameterStoreError(f"{path}: not a parameter version record (no 'sha256'); restore it from a backup")
    stored = data.pop("sha256")
    expected = {f for f in ParameterVersion.__dataclass_fields__ if f != "sha256"}
    if set(data) != expected:
        raise ParameterStoreError(
            f"{path}: fields {sorted(set(data) ^ expected)} differ from a parameter version record; "
            "the file was altered"
        )
    if _digest(data) != stored:
        raise ParameterStoreError(
            f"{path}: content does not match its SHA-256 ({stored}); the file was altered after it "
            "was written. Restore it from a backup; never edit parameter versions, write a new one"
        )
    if data["model_id"] != model_id or data["version"] != version:
        raise ParameterStoreError(
            f"{path}: records model {data['model_id']!r} version {data['version']!r} but is stored as "
            f"{model_id!r} version {version}; the file was moved or renamed"
        )
    return ParameterVersion(**data, sha256=stored)


def list_versions(archive_root: str | os.PathLike, model_id: str) -> list[ParameterVersion]:
    """Every stored version of ``model_id``, oldest first, each verified against its hash.

    Raises
    ------
    ParameterStoreError
        When any file is altered, unreadable, or stored under the wrong name (named in the message).
    """
    folder = _model_dir(archive_root, model_id)
    return [_load(folder / f"{n}.json", model_id, n) for n in _version_numbers(folder)]


def production_version(archive_root: str | os.PathLike, model_id: str) -> ParameterVersion | None:
    """The newest version with status ``promoted`` (None when nothing was promoted yet)."""
    promoted = [v for v in list_versions(archive_root, model_id) if v.status == "promoted"]
    return promoted[-1] if promoted else None


def promote(
    archive_root: str | os.PathLike, model_id: str, version: int, *, approved_by: str, note: str
) -> ParameterVersion:
    """Put ``version``'s parameters into production by writing a new ``promoted`` version.

    The new record copies the spec, noise law and parameters of ``version``, records
    ``promotes=version``, the approver as ``created_by``, the note, and a lineage pointing at the
    promoted record and its hash.  Nothing existing is changed.

    Raises
    ------
    ParameterStoreError
        When ``version`` does not exist, is already in production, or the approver or note is blank.
    """
    for name, value in (("approved_by", approved_by), ("note", note)):
        if not isinstance(value, str) or not value.strip():
            raise ParameterStoreError(
                f"model {model_id!r}: promoting version {version} needs a non-blank {name} (who approved it and why)"
            )
    versions = {v.version: v for v in list_versions(archive_root, model_id)}
    if version not in versions:
        known = ", ".join(map(str, sorted(versions))) or "none"
        raise ParameterStoreError(f"model {model_id!r} has no parameter version {version}; stored versions: {known}")
    current = production_version(archive_root, model_id)
    if current is not None and version in (current.version, current.promotes):
        raise ParameterStoreError(
            f"model {model_id!r}: version {version} is already the production version "
            f"(record {current.version}); nothing to promote"
        )
    source = versions[version]
    return write_version(
        archive_root,
        model_id,
        spec=source.spec,
        noise=source.noise,
        params=source.params,
        status="promoted",
        created_by=approved_by,
        note=note,
        promotes=version,
        lineage={"promoted_from": version, "promoted_sha256": source.sha256, "source_lineage": source.lineage},
    )


def verify_params(archive_root: str | os.PathLike) -> list[str]:
    """Check the whole parameter store; returns the problems found (empty when all is well).

    Detects altered or unreadable files, names that are not ``<n>.json`` under a safe model id,
    gaps in the numbering, and promotions that refer to a missing or later version.  Hidden files
    (temporary files left by an interrupted writer) are ignored.
    """
    root = pathlib.Path(archive_root) / "params"
    if not root.is_dir():
        return []
    problems = []
    for folder in sorted(root.iterdir()):
        if folder.name.startswith("."):
            continue
        if not folder.is_dir() or not SAFE_ID.match(folder.name):
            problems.append(f"{folder}: not a model folder (expected a folder named by a safe model id)")
            continue
        problems += _verify_model(folder)
    return problems


def _verify_model(folder: pathlib.Path) -> list[str]:
    problems = []
    for entry in sorted(folder.iterdir()):
        if not entry.name.startswith(".") and not _FILE_NAME.match(entry.name):
            problems.append(f"{entry}: unexpected name; parameter versions are named 1.json, 2.json, ...")
    numbers = _version_numbers(folder)
    missing = sorted(set(range(1, (numbers[-1] if numbers else 0) + 1)) - set(numbers))
    if missing:
        problems.append(
            f"{folder}: version(s) {', '.join(map(str, missing))} missing from the numbering; a version was deleted"
        )
    loaded = {}
    for n in numbers:
        try:
            loaded[n] = _load(folder / f"{n}.json", folder.name, n)
        except ParameterStoreError as exc:
            problems.append(str(exc))
    for n, record in loaded.items():
        if record.status not in STATUSES:
            problems.append(f"{folder / f'{n}.json'}: status {record.status!r} is not one of {', '.join(STATUSES)}")
        if record.promotes is not None and not (
            isinstance(record.promotes, int) and 1 <= record.promotes < n and record.promotes in numbers
        ):
            problems.append(
                f"{folder / f'{n}.json'}: promotes version {record.promotes!r}, which is not an earlier stored version"
            )
    return problems
