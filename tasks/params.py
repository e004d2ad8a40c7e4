"""The parameter store: immutable, hashed parameter versions per model entry.

Layout: ``<archive>/params/<model-id>/<version>.json`` with versions 1, 2, 3, ... .  A file is
written once and never changed: promotion writes a *new* version (status ``promoted``, with
``promotes`` naming the version it puts into production) and never edits an old one, and records
it in the archive's hash chain in the same step (:func:`promote`).  The newest ``promoted`` version
that the chain records is the production version.

Every file holds the canonical JSON of a :class:`ParameterVersion`; its ``sha256`` is the SHA-256
of the canonical JSON of every other field, so any edit to a stored file is detected when it is
read (:func:`list_versions`) or verified (:func:`verify_params`).  Two writers racing for the same
version number cannot clobber each other: the file is linked into place only if it does not exist
(:func:`fitaudit.tasks._io.write_once`), and the loser retries with the next number.
"""

from __future__ import annotations

import datetime as _dt
import json
import math
import os
import pathlib
import re
import threading
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Annotated, Any

import yaml
from pydantic import BaseModel, BeforeValidator, ConfigDict, ValidationError

from fitaudit.core.exceptions import FitauditError

from ._io import SAFE_ID, canonical_json, json_ready, sha256_bytes, utc_now, write_once

__all__ = [
    "STATUSES",
    "ParameterStoreError",
    "ParameterVersion",
    "write_version",
    "list_versions",
    "production_version",
    "promote",
    "promotion_fields",
    "version_fields",
    "write_fields",
    "verify_params",
    "ParamsFileError",
    "ParamsFile",
    "read_params_file",
    "check_imported_params",
    "import_params",
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


def _digest(content: Mapping[str, Any], *, str_keys: bool = False) -> str:
    """SHA-256 of the canonical JSON of ``content`` (``str_keys``: read by ``json.loads``, see canonical_json)."""
    return sha256_bytes(canonical_json(content, str_keys=str_keys))


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

    For candidates.  A ``promoted`` version written here has no ``promotion`` chain entry, so the
    production-version lookup and ``fitaudit verify`` refuse it: promote with :func:`promote`.

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
    fields = version_fields(
        model_id,
        spec=spec,
        noise=noise,
        params=params,
        status=status,
        created_by=created_by,
        lineage=lineage,
        note=note,
        promotes=promotes,
        created_at=created_at,
    )
    return write_fields(archive_root, fields)


def version_fields(
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
) -> dict:
    """The checked, JSON-ready fields of a new version (all but ``version`` and ``sha256``).

    Raises
    ------
    ParameterStoreError
        As :func:`write_version`.
    """
    _model_dir(".", model_id)  # the id check
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
    return json_ready(
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


def write_fields(
    archive_root: str | os.PathLike,
    fields: Mapping[str, Any],
    *,
    on_claim: Callable[[ParameterVersion], None] | None = None,
    on_lost: Callable[[ParameterVersion], None] | None = None,
) -> ParameterVersion:
    """Write ``fields`` (from :func:`version_fields`) as the next free version number.

    ``on_claim(record)`` runs before the file is written and ``on_lost(record)`` when another writer
    took that number first (the next number is then tried); the archive's promotion journal uses
    them (:func:`fitaudit.tasks.archive.record_promotion`).
    """
    model_id = fields["model_id"]
    folder = _model_dir(archive_root, model_id)
    with _WRITE_LOCK:
        numbers = _version_numbers(folder)
        version = (numbers[-1] if numbers else 0) + 1
        for _ in range(_RETRIES):
            content = {**fields, "version": version}
            record = ParameterVersion(**content, sha256=_digest(content))
            if on_claim is not None:
                on_claim(record)
            try:
                write_once(folder / f"{version}.json", canonical_json(record.to_dict(), indent=2))
            except FileExistsError:
                if on_lost is not None:
                    on_lost(record)
                version += 1  # another process took this number first
                continue
            return record
    raise ParameterStoreError(
        f"model {model_id!r}: no free version number after {_RETRIES} attempts; is another process looping?"
    )


def _load(path: pathlib.Path, model_id: str, version: int, content: bytes | None = None) -> ParameterVersion:
    """Read one file (or take its ``content``, read already) and verify its hash, name and folder;
    ParameterStoreError names the file."""
    try:
        data = json.loads(path.read_bytes() if content is None else content)
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
    if _digest(data, str_keys=True) != stored:
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


def list_versions(
    archive_root: str | os.PathLike, model_id: str, *, load: Callable[..., ParameterVersion] | None = None
) -> list[ParameterVersion]:
    """Every stored version of ``model_id``, oldest first, each verified against its hash.

    ``load(path, model_id, version)`` replaces the reading of one file (a verification passes one
    that reads each file once, whatever asks for it).

    Raises
    ------
    ParameterStoreError
        When any file is altered, unreadable, or stored under the wrong name (named in the message).
    """
    folder = _model_dir(archive_root, model_id)
    load = load or _load
    return [load(folder / f"{n}.json", model_id, n) for n in _version_numbers(folder)]


def production_version(archive_root: str | os.PathLike, model_id: str) -> ParameterVersion | None:
    """The production version: the newest ``promoted`` version that the archive's chain records.

    A ``promoted`` version that no ``promotion`` chain entry records (written by hand, or by a
    promotion interrupted before its entry), one that differs from its entry, or a recorded
    production version that is missing is refused, never skipped
    (:func:`fitaudit.tasks.archive.production_snapshot`).

    Returns
    -------
    ParameterVersion or None
        None when nothing was promoted yet.

    Raises
    ------
    ParameterStoreError
        Naming the file and what to do.
    """
    from .archive import ArchiveError, production_snapshot

    try:
        snapshot = production_snapshot(archive_root, [model_id])
    except ArchiveError as exc:
        raise ParameterStoreError(str(exc)) from None
    if model_id in snapshot.errors:
        raise ParameterStoreError(snapshot.errors[model_id])
    return snapshot.versions[model_id]


def promotion_fields(
    archive_root: str | os.PathLike,
    model_id: str,
    version: int,
    *,
    approved_by: str,
    note: str,
    current: ParameterVersion | None,
) -> dict:
    """The fields of the ``promoted`` version that puts ``version`` into production.

    ``current`` is the production version now (or None).  The record copies the spec, noise law
    and parameters of ``version``, records ``promotes=version``, the approver as ``created_by``, the
    note, and a lineage pointing at the promoted record and its hash.

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
    if current is not None and version in (current.version, current.promotes):
        raise ParameterStoreError(
            f"model {model_id!r}: version {version} is already the production version "
            f"(record {current.version}); nothing to promote"
        )
    source = versions[version]
    return version_fields(
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


def promote(
    archive_root: str | os.PathLike,
    model_id: str,
    version: int,
    *,
    approved_by: str,
    note: str,
    details: Mapping[str, Any] | None = None,
) -> ParameterVersion:
    """Put ``version``'s parameters into production: a new ``promoted`` version and its chain entry.

    Both are written under the archive lock with a journal
    (:func:`fitaudit.tasks.archive.record_promotion`), so a crash leaves both or neither; nothing
    existing is changed.  ``details`` are extra JSON fields for the ``promotion`` chain entry (for
    example where imported parameters came from).

    Raises
    ------
    ParameterStoreError
        When ``version`` does not exist, is already in production, or the approver or note is blank.
    """
    from .archive import record_promotion

    return record_promotion(archive_root, model_id, version, approved_by=approved_by, note=note, details=details)


def verify_params(archive_root: str | os.PathLike, *, load: Callable[..., ParameterVersion] | None = None) -> list[str]:
    """Check the whole parameter store; returns the problems found (empty when all is well).

    Detects altered or unreadable files, names that are not ``<n>.json`` under a safe model id,
    gaps in the numbering, and promotions that refer to a missing or later version.  Hidden files
    (temporary files left by an interrupted writer) are ignored.  ``load`` as for :func:`list_versions`.
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
        problems += _verify_model(folder, load or _load)
    return problems


def _verify_model(folder: pathlib.Path, load: Callable[..., ParameterVersion]) -> list[str]:
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
            loaded[n] = load(folder / f"{n}.json", folder.name, n)
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


# --------------------------------------------------------------------------------------------
# Onboarding parameters estimated elsewhere
# --------------------------------------------------------------------------------------------
class ParamsFileError(ParameterStoreError):
    """A parameters file to import is unreadable, malformed or does not fit the model entry."""


def _finite_number(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ValueError(f"expected a number, got {value!r}")
    number = float(value)
    if not math.isfinite(number):
        raise ValueError(f"expected a finite number, got {value!r}")
    return number


def _text(value: Any) -> str:
    if not isinstance(value, str) or not value.strip():
        raise ValueError("expected non-blank text")
    return value.strip()


class _NoiseFile(BaseModel):
    """The ``noise`` block of a parameters file."""

    model_config = ConfigDict(extra="forbid")
    law: str | None = None
    shape: Annotated[float, BeforeValidator(_finite_number)] | None = None
    df: Annotated[float, BeforeValidator(_finite_number)] | None = None
    size: Annotated[float, BeforeValidator(_finite_number)] | None = None

    def fixed_shape(self) -> float | None:
        given = [v for v in (self.shape, self.df, self.size) if v is not None]
        if len(given) > 1:
            raise ValueError("give one of shape, df (student-t) or size (negative-binomial)")
        return given[0] if given else None


class ParamsFile(BaseModel):
    """A parameters file, as :func:`import_params` reads it (see there for the format)."""

    model_config = ConfigDict(extra="forbid", protected_namespaces=())
    model_id: str | None = None
    family: str | None = None
    params: dict[str, Annotated[float, BeforeValidator(_finite_number)]]
    noise: _NoiseFile = _NoiseFile()
    date: _dt.date
    approved_by: Annotated[str, BeforeValidator(_text)]
    source: str = ""
    note: str = ""


def read_params_file(path: str | os.PathLike) -> ParamsFile:
    """Read and validate a parameters file (JSON, or YAML for ``.yaml``/``.yml``).

    Raises
    ------
    ParamsFileError
        Naming the file and every problem found (field: message).
    """
    path = pathlib.Path(path)
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise ParamsFileError(f"{path}: cannot be read ({exc.strerror or exc}); check the path") from None
    try:
        text = raw.decode("utf-8")
        data = yaml.safe_load(text) if path.suffix.lower() in (".yaml", ".yml") else json.loads(text)
    except (UnicodeDecodeError, ValueError, yaml.YAMLError) as exc:
        kind = "YAML" if path.suffix.lower() in (".yaml", ".yml") else "JSON (name the file .yaml or .yml for YAML)"
        raise ParamsFileError(f"{path}: not valid {kind}: {exc}") from None
    if not isinstance(data, dict):
        raise ParamsFileError(
            f"{path}: expected a mapping with params, noise, date and approved_by; got {type(data).__name__}"
        )
    try:
        parsed = ParamsFile.model_validate(data)
        parsed.noise.fixed_shape()
    except ValidationError as exc:
        lines = []
        for err in exc.errors():
            where = ".".join(str(p) for p in err["loc"]) or "(file)"
            message = err["msg"].removeprefix("Value error, ")
            if err["type"] == "extra_forbidden":
                message = (
                    f"unknown field; the fields are {', '.join(ParamsFile.model_fields)} (noise: law and shape, "
                    "df or size)"
                )
            lines.append(f"{path}: {where}: {message}")
        raise ParamsFileError("\n".join(lines)) from None
    except ValueError as exc:
        raise ParamsFileError(f"{path}: noise: {exc}") from None
    return parsed


def _entry_noise(entry: Any) -> dict:
    """``{"law", "shape"}`` of a registry entry (dict or validated block)."""
    as_core = getattr(entry, "noise_law", None)
    if callable(as_core):
        return dict(as_core())
    noise = entry.noise
    return dict(noise.to_dict() if hasattr(noise, "to_dict") else noise)


def check_imported_params(entry: Any, parsed: ParamsFile, source: str = "the parameters file") -> tuple[dict, dict]:
    """Check parameters from elsewhere against a model entry; returns ``(params, noise)`` to store.

    The checks are those a production version must pass to be run: exactly the family's parameter
    names (:meth:`~fitaudit.core.models.ForecastModel.param_names`, with ``x:<column>`` for the
    entry's exogenous inputs), finite values, a positive ``sigma2``, the entry's noise law with a
    valid shape where the law has one, and a dry run of the family's recursions
    (:meth:`~fitaudit.core.models.ForecastModel.simulate` then
    :meth:`~fitaudit.core.models.ForecastModel.errors` on a seeded probe series), which refuses
    what the family cannot run: ARIMA coefficients that are not stationary or not invertible, a
    smoothing recursion that overflows, a mean function that fails.

    Raises
    ------
    ParamsFileError
        With the model id, what is wrong and the fix (the expected names when they differ).
    """
    from fitaudit.core.audit import as_model, as_noise_law
    from fitaudit.core.exceptions import FitauditError as CoreError

    model_id = entry.id
    spec = dict(entry.spec) if getattr(entry, "spec", None) is not None else None
    if spec is None:
        raise ParamsFileError(
            f"model {model_id!r} has no model spec (its forecasts come from outside); there are no parameters to import"
        )
    if parsed.model_id is not None and parsed.model_id != model_id:
        raise ParamsFileError(
            f"{source} is for model {parsed.model_id!r}, not {model_id!r}; import it for its own model or correct "
            "model_id"
        )
    if parsed.family is not None and parsed.family != spec.get("family"):
        raise ParamsFileError(
            f"{source} holds {parsed.family!r} parameters but model {model_id!r} is registered as "
            f"{spec.get('family')!r}; import parameters of the registered family, or change the registry entry first"
        )
    model = as_model(spec)
    exog_names = list(getattr(entry, "exogenous", ()) or ())
    expected = model.param_names(exog_names)
    given = list(parsed.params)
    missing = [n for n in expected if n not in parsed.params]
    unexpected = [n for n in given if n not in expected]
    if missing or unexpected:
        raise ParamsFileError(
            f"model {model_id!r} ({model.describe()}): the parameter names in {source} do not match the family"
            + (f"; missing {', '.join(missing)}" if missing else "")
            + (f"; unexpected {', '.join(unexpected)}" if unexpected else "")
            + f". Expected exactly: {', '.join(expected)}. fitaudit's conventions: AR polynomial 1 - ar1 B - ..., "
            "MA polynomial 1 + ma1 B + ... (as statsmodels and R), intercept = the mean of the series in levels, "
            "x:<column> per exogenous input, sigma2 = the innovation variance"
        )
    params = {name: float(parsed.params[name]) for name in expected}
    if not params["sigma2"] > 0:
        raise ParamsFileError(
            f"model {model_id!r}: sigma2 = {params['sigma2']:g} in {source} is not a positive variance; give the "
            "innovation variance"
        )
    noise = _entry_noise(entry)
    law_name = noise.get("law")
    if parsed.noise.law is not None and parsed.noise.law != law_name:
        raise ParamsFileError(
            f"model {model_id!r} is registered with the {law_name!r} noise law but {source} states "
            f"{parsed.noise.law!r}; import parameters for the registered law, or change the registry entry first"
        )
    shape = parsed.noise.fixed_shape()
    try:
        law = as_noise_law({"law": law_name, "shape": noise.get("shape")})
        if law.has_shape:
            if law.shape is not None and shape is not None and not math.isclose(shape, law.shape, rel_tol=1e-12):
                raise ParamsFileError(
                    f"model {model_id!r}: the registry fixes the {law_name} shape at {law.shape:g} but {source} gives "
                    f"{shape:g}; drop the shape from the file or change the registry entry"
                )
            shape = law.shape if law.shape is not None else shape
            if shape is None:
                what = "degrees of freedom (df)" if law_name == "student-t" else "size"
                raise ParamsFileError(
                    f"model {model_id!r}: the registry estimates the {law_name} shape, so {source} must give it "
                    f"(noise: {{{'df' if law_name == 'student-t' else 'size'}: ...}}, the {what} in use)"
                )
            as_noise_law({"law": law_name, "shape": shape})  # the law's own bounds (t: df > 2; NB: size > 0)
        elif shape is not None:
            raise ParamsFileError(
                f"model {model_id!r}: the {law_name} noise law has no shape, but {source} gives one; drop it"
            )
    except CoreError as exc:
        if isinstance(exc, ParamsFileError):
            raise
        raise ParamsFileError(f"model {model_id!r}: {exc}") from None
    _dry_run(model, params, exog_names, model_id, source)
    return params, {"law": law_name, "shape": shape}


def _dry_run(model: Any, params: dict, exog_names: list[str], model_id: str, source: str) -> None:
    """Run the family's simulation and one-step errors on a seeded probe series."""
    import numpy as np

    from fitaudit.core.exceptions import FitauditError as CoreError

    rng = np.random.default_rng(0)
    n = max(int(model.min_length(len(exog_names))), 50) + int(model.presample())
    exog = {name: rng.standard_normal(n) for name in exog_names} or None
    try:
        with np.errstate(all="ignore"):
            y = model.simulate(params, n, rng, exog=exog)
            model.errors(y, params, exog)
    except (CoreError, ValueError, ArithmeticError, np.linalg.LinAlgError) as exc:
        raise ParamsFileError(
            f"model {model_id!r}: {model.describe()} cannot run the parameters in {source}: {exc} "
            "(if they come from a tool with other sign conventions, convert them: fitaudit writes the AR polynomial "
            "1 - ar1 B - ... and the MA polynomial 1 + ma1 B + ...)"
        ) from None


def import_params(
    registry: Any,
    model_id: str,
    path: str | os.PathLike,
    *,
    by: str,
    archive_root: str | os.PathLike,
) -> ParameterVersion:
    """Store parameters estimated elsewhere as the production version of a registered model.

    For a team whose model already runs in production outside fitaudit: the production check
    then audits *those* parameters, not fitaudit's own estimate.  The file is read, checked
    against the model entry (:func:`check_imported_params`), written as a ``candidate`` version
    (created by ``by``, with the file's SHA-256, date, approver and source in its lineage) and
    promoted at once (a ``promoted`` version approved by the file's approver, and a
    ``promotion`` entry in the archive's hash chain), exactly as :func:`promote` does for a refit.
    Nothing is written unless every check passes.

    File format (JSON; YAML when the name ends in ``.yaml`` or ``.yml``)::

        model_id: north-demand          # optional; must be MODEL_ID when given
        family: arima                   # optional; must be the registered family when given
        params:                         # exactly the family's parameter names
          ar1: 0.62
          ma1: -0.41
          intercept: 1520.0             # the mean of the series in levels (trend c)
          x:temp_c: -3.1                # one per exogenous input of the entry
          sigma2: 2204.5                # innovation variance, > 0
        noise:                          # optional; law must be the registered one when given
          law: student-t
          df: 6                         # shape: df (student-t) or size (negative-binomial);
                                        # required when the registry estimates the shape
        date: 2026-11-02                # when these parameters went into production
        approved_by: "R. Example, Head of Model Risk"
        source: "statsmodels 0.14 ARIMA, forecasting notebook, run 2026-11-01"   # optional
        note: "quarterly re-estimation"                                           # optional

    Parameter names per family: ARIMA ``ar1.., ma1.., sar1.., sma1.., intercept, drift,
    x:<column>, sigma2`` (AR polynomial ``1 - ar1 B - ...``, MA polynomial ``1 + ma1 B + ...``,
    the conventions of statsmodels and R); exponential smoothing ``alpha, [beta], [gamma],
    [phi], l0, [b0], [s0 .. s{m-2}], sigma2``; nonlinear autoregressions their own names then
    ``sigma2``.  A mismatch lists the expected names.

    Parameters
    ----------
    registry : path-like or Registry
        The registry (read with :func:`fitaudit.tasks.registry.load_registry`; nothing is written to it).
    model_id : str
        A model entry of the registry.
    path : path-like
        The parameters file.
    by : str
        Who imports the file (recorded as the candidate's author and in the chain entry).
    archive_root : path-like
        The archive holding the parameter store.

    Returns
    -------
    ParameterVersion
        The ``promoted`` record now in production.

    Raises
    ------
    ParamsFileError
        The file cannot be read, is malformed or does not fit the model (every message names
        the file or the model and the fix).
    ParameterStoreError
        Unknown or rejected model id, blank ``by``, or a store problem.
    """
    from .registry import load_registry

    if not isinstance(by, str) or not by.strip():
        raise ParameterStoreError("importing parameters needs a non-blank --by (who imports them)")
    reg = load_registry(registry) if isinstance(registry, str | os.PathLike) else registry
    try:
        entry = reg.model(model_id)
    except KeyError as exc:
        raise ParameterStoreError(str(exc.args[0]) if exc.args else f"no model {model_id!r}") from None
    path = pathlib.Path(path)
    parsed = read_params_file(path)
    params, noise = check_imported_params(entry, parsed, source=str(path))
    file_sha = sha256_bytes(path.read_bytes())
    lineage = {
        "imported_from": path.name,
        "file_sha256": file_sha,
        "in_production_since": parsed.date.isoformat(),
        "approved_by": parsed.approved_by,
        "source": parsed.source,
        "registry_sha256": getattr(reg, "sha256", None),
    }
    candidate = write_version(
        archive_root,
        model_id,
        spec=dict(entry.spec),
        noise=noise,
        params=params,
        status="candidate",
        created_by=by.strip(),
        lineage=lineage,
        note=f"production parameters estimated outside fitaudit, imported from {path.name}"
        + (f"; {parsed.note}" if parsed.note else ""),
    )
    return promote(
        archive_root,
        model_id,
        candidate.version,
        approved_by=parsed.approved_by,
        note=f"in production since {parsed.date.isoformat()}; imported by {by.strip()} from {path.name}",
        details={"imported_by": by.strip(), "imported_from": path.name, "file_sha256": file_sha},
    )
