"""Loading a registry: safe YAML, the schema, and which problems refuse the run.

Two kinds of problem are told apart (the rule is "one broken model never sinks a whole audit"):

* **Registry-level** problems (unreadable file, YAML syntax error, refused tag, wrong or missing
  ``version``, invalid ``policy`` or blank justification/approver, unknown top-level keys,
  ``sources`` not a mapping, ``models`` not a list) make :func:`parse_registry` and
  :func:`load_registry` raise :class:`RegistryError`, listing every problem: the run refuses to
  start.
* **Entry-level** problems (anything wrong inside one model entry, or inside a source entry) put
  that entry into :attr:`Registry.rejected` with all of its problems; the other entries go on. A
  source with problems is dropped, and every model referencing it is rejected with a message
  naming the source problem.

The document is validated in passes: :class:`~.schema.RegistryDocument` (version, policy, the
shape of ``sources`` and ``models``), then each source alone, then each model entry alone with
the usable sources in the validation context.  Model ids are checked for duplicates here, across
entries.
"""

from __future__ import annotations

import os
import pathlib
from dataclasses import dataclass
from typing import Any

import yaml
from pydantic import TypeAdapter, ValidationError

from .._io import sha256_bytes
from .problems import (
    RegistryChangedError,
    RegistryError,
    RegistryProblem,
    field_name,
    from_validation_error,
    unknown_key_message,
)
from .schema import (
    Block,
    EntryBase,
    ForecastEntry,
    ModelEntry,
    Policy,
    RegistryDocument,
    RegistryEntry,
    SourceEntry,
    entry_kind,
    is_safe_id,
)
from .yaml_safety import SHOW, YamlIssue, compose, node_path, to_plain

__all__ = [
    "RejectedEntry",
    "Registry",
    "parse_registry",
    "load_registry",
    "check_registry",
    "require_digest",
]

_ENTRY = TypeAdapter(RegistryEntry)


@dataclass(frozen=True)
class RejectedEntry:
    """A model entry that cannot be audited, with every problem found in it.

    ``id`` is the raw id as written (or ``entry-<index>`` when there is none); ``safe_id`` is a
    :data:`~.schema.SAFE_ID`-conforming name usable in file paths: the id itself when it is safe
    and not a duplicate, otherwise ``entry-<index>`` (made unique against the accepted ids).
    """

    id: str
    safe_id: str
    line: int
    owner: str | None
    problems: tuple[RegistryProblem, ...]

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {
            "id": self.id,
            "safe_id": self.safe_id,
            "line": self.line,
            "owner": self.owner,
            "problems": [p.to_dict() for p in self.problems],
        }


@dataclass(frozen=True)
class Registry:
    """A parsed registry: the policy, the usable sources and models, and the rejected entries.

    ``source_problems`` lists the problems of sources that were dropped (the models that
    reference them are in ``rejected``); ``sha256`` is the SHA-256 of the file's bytes.
    """

    path: str
    base_dir: str
    version: int
    policy: Policy
    sources: dict[str, SourceEntry]
    models: tuple[EntryBase, ...]  # ModelEntry or ForecastEntry
    rejected: tuple[RejectedEntry, ...]
    sha256: str
    source_problems: tuple[RegistryProblem, ...] = ()

    def model(self, id: str) -> EntryBase:
        """The accepted model entry ``id``; a KeyError says whether it was rejected or unknown."""
        for entry in self.models:
            if entry.id == id:
                return entry
        for entry in self.rejected:
            if entry.id == id:
                first = entry.problems[0] if entry.problems else "no detail"
                raise KeyError(f"model {id!r} was rejected by the registry check: {first}")
        known = ", ".join(repr(m.id) for m in self.models[:10]) or "none"
        raise KeyError(f"no model {id!r} in {self.path}; accepted models include {known}")

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {
            "path": self.path,
            "base_dir": self.base_dir,
            "version": self.version,
            "sha256": self.sha256,
            "policy": self.policy.to_dict(),
            "sources": {name: s.to_dict() for name, s in self.sources.items()},
            "models": [m.to_dict() for m in self.models],
            "rejected": [r.to_dict() for r in self.rejected],
            "source_problems": [p.to_dict() for p in self.source_problems],
        }


# --------------------------------------------------------------------------------------------
# the passes
# --------------------------------------------------------------------------------------------
class _Reading:
    """One registry document being read: its nodes, its plain values and the problems found."""

    def __init__(self, file: str, root: yaml.Node, base_dir: str | None = None):
        self.file = file
        self.root = root
        self.base_dir = base_dir  # where relative paths (holiday files) resolve
        self.data, issues = to_plain(root)
        self.general: list[RegistryProblem] = []
        self.by_entry: dict[tuple, list[RegistryProblem]] = {}
        for issue in issues:
            owner = _owner(issue.path)
            target = self.general if owner is None else self.by_entry.setdefault(owner, [])
            target.append(self.issue(issue))

    def issue(self, issue: YamlIssue) -> RegistryProblem:
        return RegistryProblem(self.file, issue.line, field_name(issue.path), issue.message)

    def line(self, path: tuple, key: bool = False) -> int:
        """Line of the node at ``path`` (of its key, with ``key``)."""
        key_node, node, _ = node_path(self.root, path)
        return (key_node if key and key_node is not None else node).start_mark.line + 1

    def validate(self, schema: Any, data: Any, path: tuple, problems: list, context: dict | None = None) -> Any:
        """``data`` validated against ``schema``, or None after adding its problems."""
        try:
            if isinstance(schema, type):
                return schema.model_validate(data, context=context)
            return _ENTRY.validate_python(data, context=context)
        except ValidationError as exc:
            problems.extend(from_validation_error(exc, file=self.file, root=self.root, base=path, schema=schema))
            return None

    def with_internal(self, block: type[Block], data: Any, path: tuple, problems: list, **values: Any) -> Any:
        """``data`` with the fields fitaudit fills in (a YAML key of the same name is unknown)."""
        if not isinstance(data, dict):
            return data
        for key in block.internal_fields:
            if key in data:
                problems.append(
                    RegistryProblem(
                        self.file,
                        self.line(path + (key,), key=True),
                        field_name(path + (key,)),
                        unknown_key_message(key, block.yaml_keys()),
                    )
                )
        return {**{k: v for k, v in data.items() if k not in block.internal_fields}, **values}

    # -- document ---------------------------------------------------------------------------
    def document(self) -> RegistryDocument | None:
        data = self.data
        if isinstance(data, dict) and "policy" in data:
            data = {
                **data,
                "policy": self.with_internal(
                    Policy, data["policy"], ("policy",), self.general, line=self.line(("policy",), key=True)
                ),
            }
        return self.validate(RegistryDocument, data, (), self.general)

    # -- sources ----------------------------------------------------------------------------
    def sources(self) -> tuple[dict[str, SourceEntry], dict[str, list[RegistryProblem]]]:
        """Valid sources by name, and the problems of the dropped ones by name."""
        good: dict[str, SourceEntry] = {}
        dropped: dict[str, list[RegistryProblem]] = {}
        raw = self.data.get("sources") if isinstance(self.data, dict) else None
        if not isinstance(raw, dict):
            return good, dropped
        for name, data in raw.items():
            path = ("sources", name)
            problems = list(self.by_entry.get(path, ()))
            line = self.line(path, key=True)
            if not is_safe_id(name):
                problems.append(
                    RegistryProblem(
                        self.file,
                        line,
                        field_name(path),
                        f"source name {name[:SHOW]!r} is not allowed; use 1-128 letters, digits, "
                        "'_', '.' or '-', starting with a letter or digit",
                    )
                )
            data = self.with_internal(SourceEntry, data, path, problems, name=name, line=line)
            source = self.validate(SourceEntry, data, path, problems, {"base_dir": self.base_dir})
            if problems:
                dropped[name] = sorted(problems, key=lambda p: p.line or 0)
            else:
                good[name] = source
        return good, dropped

    # -- model entries ----------------------------------------------------------------------
    def models(self, sources: dict, dropped: dict) -> tuple[list[EntryBase], list[RejectedEntry]]:
        raw = self.data.get("models") if isinstance(self.data, dict) else None
        if not isinstance(raw, tuple):
            return [], []
        context = {"sources": sources, "dropped": dropped}
        first_line: dict[str, tuple[str, int]] = {}  # case-folded id -> (id, line)
        results: list[EntryBase | RejectedEntry] = []
        for index, data in enumerate(raw):
            path = ("models", index)
            problems = list(self.by_entry.get(path, ()))
            line = self.line(path)
            kind = ForecastEntry if entry_kind(data) == "forecasts" else ModelEntry
            data = self.with_internal(kind, data, path, problems, line=line)
            entry = self.validate(RegistryEntry, data, path, problems, context)
            raw_id, safe = self._id(data, path, problems, first_line)
            if entry is not None and not problems:
                results.append(entry)
                continue
            owner = data.get("owner") if isinstance(data, dict) else None
            owner_ok = isinstance(owner, str) and not any(p.field == field_name(path + ("owner",)) for p in problems)
            problems.sort(key=lambda p: p.line or 0)
            results.append(RejectedEntry(raw_id, safe or "", line, owner if owner_ok else None, tuple(problems)))
        models = [r for r in results if isinstance(r, EntryBase)]
        taken = {m.id.casefold() for m in models}
        rejected = []
        for index, result in enumerate(results):
            if isinstance(result, RejectedEntry):
                safe = result.safe_id
                if not safe or safe.casefold() in taken:
                    safe = f"entry-{index}"
                    while safe.casefold() in taken:
                        safe += "-rejected"
                taken.add(safe.casefold())
                rejected.append(
                    RejectedEntry(result.id or f"entry-{index}", safe, result.line, result.owner, result.problems)
                )
        return models, rejected

    def _id(self, data: Any, path: tuple, problems: list, first_line: dict) -> tuple[str, str | None]:
        """The raw id and, when the id is valid and new, the id itself as the safe name."""
        key_node, node, reached = node_path(self.root, path + ("id",))
        if reached < len(path) + 1:
            return "", None
        value = data.get("id") if isinstance(data, dict) else None
        if not isinstance(value, str):
            return (node.value if isinstance(node, yaml.ScalarNode) else ""), None
        if any(p.field == field_name(path + ("id",)) for p in problems):
            return value, None
        folded = value.casefold()
        if folded in first_line:
            first_id, first = first_line[folded]
            same = (
                ""
                if first_id == value
                else f" as {first_id!r} (ids differing only in case would collide as file names)"
            )
            problems.append(
                RegistryProblem(
                    self.file,
                    node.start_mark.line + 1,
                    field_name(path + ("id",)),
                    f"duplicate id {value!r}: already used on line {first}{same}; give every model entry its own id",
                )
            )
            return value, None
        first_line[folded] = (value, node.start_mark.line + 1)
        return value, value


def _owner(path: tuple) -> tuple | None:
    """The entry a YAML problem at ``path`` belongs to (None: the registry as a whole)."""
    if len(path) >= 3 and path[0] == "models" and isinstance(path[1], int):
        return path[:2]
    if len(path) >= 3 and path[0] == "sources":
        return path[:2]
    return None


def _analyse(
    text: str, filename: str, base_dir: str, digest: str
) -> tuple[list[RegistryProblem], list[RegistryProblem], Registry | None]:
    """Registry-level problems, entry-level problems, and the registry (None when unusable)."""
    root, issues = compose(text)
    if issues:
        return [RegistryProblem(filename, i.line, field_name(i.path), i.message) for i in issues], [], None
    if root is None:
        message = "the registry is empty; expected a mapping with 'version', 'policy', 'sources' and 'models'"
        return [RegistryProblem(filename, 1, "", message)], [], None
    reading = _Reading(filename, root, base_dir)
    document = reading.document()
    sources, dropped = reading.sources()
    models, rejected = reading.models(sources, dropped)
    problems = sorted(reading.general, key=lambda p: p.line or 0)
    source_problems = [p for group in dropped.values() for p in group]
    entry_problems = source_problems + [p for r in rejected for p in r.problems]
    if document is None or problems:
        return problems, entry_problems, None
    registry = Registry(
        path=filename,
        base_dir=base_dir,
        version=document.version,
        policy=document.policy,
        sources=sources,
        models=tuple(models),
        rejected=tuple(rejected),
        sha256=digest,
        source_problems=tuple(source_problems),
    )
    return problems, entry_problems, registry


# --------------------------------------------------------------------------------------------
# public entry points
# --------------------------------------------------------------------------------------------
def parse_registry(text: str, filename: str = "<registry>", base_dir: str | os.PathLike | None = None) -> Registry:
    """Parse and validate a registry document.

    Parameters
    ----------
    text : str
        The YAML document.
    filename : str
        Name used in problem messages.
    base_dir : path-like, optional
        Folder that relative source URIs resolve against (default: the current directory).

    Returns
    -------
    Registry
        Accepted models in ``models``; entries with problems in ``rejected``.

    Raises
    ------
    RegistryError
        On any registry-level problem (listing every problem in the file).
    """
    base = os.path.abspath(os.fspath(base_dir) if base_dir is not None else os.getcwd())
    problems, _, registry = _analyse(text, filename, base, sha256_bytes(text.encode("utf-8")))
    if problems:
        raise RegistryError(problems)
    return registry


def _read_text(path: str | os.PathLike) -> tuple[str, str, str]:
    """(text, file name for messages, sha256 of the bytes); RegistryError when unreadable."""
    name = os.fspath(path)
    try:
        data = pathlib.Path(path).read_bytes()
    except OSError as exc:
        reason = exc.strerror or str(exc)
        raise RegistryError(
            [RegistryProblem(name, None, "", f"cannot read the registry ({reason}); check the path and permissions")]
        ) from None
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[: exc.start].count(b"\n") + 1
        raise RegistryError(
            [RegistryProblem(name, line, "", f"the file is not UTF-8 text (byte {exc.start}); save it as UTF-8")]
        ) from None
    return text, name, sha256_bytes(data)


#: The registry this process parsed last, by (name, folder, SHA-256 of the bytes): ``fitaudit run``
#: checks the registry before it starts the flow, whose load-registry task then reads the same
#: bytes and takes the same validated registry instead of parsing them again (1,000 entries:
#: about 0.3 s).  A registry is a function of its bytes, name and folder, unless it names a
#: holiday file, which validation reads: such a registry is parsed every time.
_LAST_PARSED: dict[tuple[str, str, str], Registry] = {}


def load_registry(path: str | os.PathLike) -> Registry:
    """Read, parse and validate a registry file; relative source URIs resolve against its folder.

    The file is read every time; the bytes this process parsed last, under the same name, give the
    same registry back without a second parse (not for a registry that names a holiday file).

    Raises
    ------
    RegistryError
        When the file cannot be read or has any registry-level problem.
    """
    text, name, digest = _read_text(path)
    base = os.path.dirname(os.path.abspath(os.fspath(path)))
    key = (name, base, digest)
    registry = _LAST_PARSED.get(key)
    if registry is not None:
        return registry
    problems, _, registry = _analyse(text, name, base, digest)
    if problems:
        raise RegistryError(problems)
    _LAST_PARSED.clear()
    if "holiday_file" not in text:
        _LAST_PARSED[key] = registry
    return registry


def check_registry(path: str | os.PathLike) -> list[RegistryProblem]:
    """Every problem in a registry file, registry-level and entry-level, in line order.

    An empty list means every source and model entry is usable.
    """
    try:
        text, name, digest = _read_text(path)
    except RegistryError as exc:
        return exc.problems
    base = os.path.dirname(os.path.abspath(os.fspath(path)))
    problems, entry_problems, _ = _analyse(text, name, base, digest)
    return sorted(problems + entry_problems, key=lambda p: p.line or 0)


def require_digest(registry: Registry, audited: str | None, *, by: str = "the audit that asked for this refit") -> None:
    """Refuse a registry whose bytes are not the ones audited (``audited``: their SHA-256; None
    or empty: no check).

    Raises
    ------
    RegistryChangedError
        Naming both digests and what to do.
    """
    if audited and registry.sha256 != audited:
        raise RegistryChangedError(
            f"{registry.path}: the registry changed since {by} (SHA-256 {audited} then, {registry.sha256} now), "
            "so its entries and policy are not the ones that were audited. Audit the current registry first "
            "(`fitaudit run`), or start the refit without the audited digest to use the file as it is now."
        )


def _transient(task, task_run, state) -> bool:
    """Retry only operating-system errors (a file share that hiccups), never a registry's problems."""
    try:
        state.result()
    except RegistryError:
        return False
    except OSError:
        return True
    except Exception:
        return False
    return False
