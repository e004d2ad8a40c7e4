"""Checking a run folder against its manifest, and the parameter store's files against their records."""

from __future__ import annotations

import contextlib
import json
import os
import pathlib
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor
from typing import Any

from .._io import canonical_json, sha256_bytes, sha256_file
from ..params import ParameterStoreError, ParameterVersion, _load, list_versions, verify_params
from .layout import _MANIFEST, _PARAMS, _PARAMS_PATH, _rel
from .problems import ArchiveProblem


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
                f"content changed: its SHA-256 {sha256_bytes(data)[:12]}... differs from {manifest_sha256[:12]}... "
                f"recorded at {source}",
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
    names = sorted(set(files) & set(listed))
    # hashlib releases the GIL while it hashes, so the files are read and hashed on every core
    with ThreadPoolExecutor(max_workers=os.cpu_count() or 1) as pool:
        measured = pool.map(lambda name: (sha256_file(files[name]), files[name].stat().st_size), names)
    for name, (digest, size) in zip(names, measured):
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


class ParamsReads:
    """The parameter files one verification reads, each read, parsed and verified once.

    A verification asks for the same files several times (the store's own checks, each promotion
    entry, the promoted versions' records, the byte-exact form); under the archive lock they cannot
    change in between, so the bytes and :func:`fitaudit.tasks.params._load`'s outcome (a version,
    or the error it raised) are kept for the next question.
    """

    def __init__(self) -> None:
        self._content: dict[pathlib.Path, bytes | OSError] = {}
        self._loaded: dict[tuple, ParameterVersion | ParameterStoreError] = {}

    def content(self, path: pathlib.Path) -> bytes:
        """The file's bytes (``OSError`` when it cannot be read, raised again at every call)."""
        return _remembered(self._content, path, path.read_bytes, OSError)

    def load(self, path: pathlib.Path, model_id: str, version: int) -> ParameterVersion:
        """:func:`fitaudit.tasks.params._load` of the file, from the bytes read once."""

        def load_once() -> ParameterVersion:
            try:
                content = self.content(path)
            except OSError:
                content = None  # _load reads it again and words the error
            return _load(path, model_id, version, content)

        return _remembered(self._loaded, (path, model_id, version), load_once, ParameterStoreError)


def _remembered(memo: dict, key: Any, compute: Callable[[], Any], errors: type[Exception]) -> Any:
    """``compute()`` once per key: its result, or the error of type ``errors`` it raised, is kept in
    ``memo`` and given back (raised again) at every call."""
    if key not in memo:
        try:
            memo[key] = compute()
        except errors as exc:
            memo[key] = exc
    found = memo[key]
    if isinstance(found, errors):
        raise found
    return found


def _promotion_problem(root: pathlib.Path, payload: dict, reads: ParamsReads | None = None) -> str | None:
    """Why a promotion payload does not match the parameter version it names (None when it does)."""
    match = _PARAMS_PATH.fullmatch(str(payload.get("path")))
    if not match:
        return f"payload path {payload.get('path')!r} is not params/<model-id>/<version>.json"
    try:
        load = None if reads is None else reads.load
        versions = {v.version: v for v in list_versions(root, match["model"], load=load)}
    except ParameterStoreError as exc:
        return str(exc).replace(f"{root}/", "")
    record = versions.get(int(match["version"]))
    if record is None:
        return f"{payload['path']} is missing"
    if record.sha256 != payload.get("sha256"):
        recorded = str(payload.get("sha256"))[:12]
        return f"{payload['path']} has sha256 {record.sha256[:12]}..., not the recorded {recorded}..."
    return None


def _check_params(root: pathlib.Path, reads: ParamsReads) -> list[ArchiveProblem]:
    """The parameter store's own checks (fitaudit.tasks.params.verify_params), plus byte-exact form."""
    problems = []
    for message in verify_params(root, load=reads.load):
        where, _, text = message.replace(f"{root}/", "").partition(": ")
        problems.append(ArchiveProblem("params", where, text))
    for path in sorted((root / _PARAMS).glob("*/*")):
        rel = _rel(root, path)
        if path.name.startswith(".") and path.name.endswith(".tmp"):
            problems.append(ArchiveProblem("leftover", rel, "temporary file of an interrupted write"))
        elif path.name.endswith(".json") and path.is_file() and not path.is_symlink():
            data = reads.content(path)
            with contextlib.suppress(ValueError):  # unreadable files are reported by verify_params
                if data != canonical_json(json.loads(data), indent=2, str_keys=True):
                    message = "is not byte-for-byte the canonical JSON the parameter store writes (file edited)"
                    problems.append(ArchiveProblem("params", rel, message))
    return problems
