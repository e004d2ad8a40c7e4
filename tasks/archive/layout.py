"""The archive's layout: folder and file names, run ids, path rules and the chain's entry kinds."""

from __future__ import annotations

import contextlib
import datetime as _dt
import os
import pathlib
import re
import secrets

from fitaudit.core.exceptions import InputError

from .._io import SAFE_ID

SAFE_NAME = SAFE_ID  # run ids and path segments follow the registry's rule for model ids
CHAIN_KINDS = ("run", "promotion", "purge", "signoff", "acknowledgement")


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
