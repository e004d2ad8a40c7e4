"""The registry: a YAML file of extract sources and model entries, parsed and validated.

The file is read with PyYAML's safe machinery through :func:`yaml.compose`, so every value keeps
its line number and no Python object is ever constructed: a tag outside YAML's standard scalar,
list and mapping types (``!!python/object``, ``!custom``, ...) is refused.

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

Every problem names the file, line, field and what would be valid, for example
``registry.yaml:14: models[2].spec.order: ...``.  Unknown keys are errors, with the closest valid
key suggested.

Schema (version 1)
------------------
``version: 1``; ``policy`` (thresholds fixed before the run, with ``justification`` and
``approved_by``); ``sources`` (name -> ``uri``, ``key``, ``time``, ``value``, ``exogenous``,
``frequency``, ``partitioning``); ``models`` (a list of entries with ``id``, ``owner``, ``tier``,
``description``, ``source``, ``series``, ``value``, ``exogenous``, ``spec``, ``noise``,
``windows``, ``settings``, ``last_validated``).  :data:`FREQUENCIES` lists the frequency codes.
"""

from __future__ import annotations

import datetime as _dt
import difflib
import inspect
import math
import os
import pathlib
import re
from dataclasses import dataclass
from typing import Any, Callable

import yaml
from prefect import task

from fitaudit.core.exceptions import FitauditError

from ._io import json_ready, sha256_bytes

__all__ = [
    "SAFE_ID",
    "MAX_ID_LENGTH",
    "FREQUENCIES",
    "is_safe_id",
    "RegistryProblem",
    "RegistryError",
    "Policy",
    "SourceEntry",
    "ModelEntry",
    "RejectedEntry",
    "Registry",
    "parse_registry",
    "load_registry",
    "check_registry",
]

#: Model ids and source names usable as file names: a letter or digit, then up to 127 letters,
#: digits, ``_``, ``.`` or ``-``.  ``\Z`` (not ``$``) so that a trailing newline never matches.
SAFE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,127}\Z")

#: Longest model id: its report page ``<id>.html`` must itself be a :data:`SAFE_ID` name.
MAX_ID_LENGTH = 128 - len(".html")

#: Frequency codes a source may declare, with their meaning (gaps are checked against them).
FREQUENCIES: dict[str, str] = {
    "15min": "every 15 minutes",
    "30min": "every 30 minutes",
    "H": "hourly",
    "D": "daily",
    "W": "weekly (every 7 days, any weekday)",
    "MS": "monthly, on the first day of the month",
    "M": "monthly, on the last day of the month",
    "QS": "quarterly, on 1 January, April, July and October",
    "Q": "quarterly, on 31 March, 30 June, 30 September and 31 December",
}

MULTIPLE_TESTING = ("bh", "by", "bonferroni", "none")
CALIBRATIONS = ("asymptotic", "simulated", "bootstrap")
REFIT_POLICIES = ("automatic", "approval")
PARTITIONINGS = ("hive",)

_TOP_KEYS = ("version", "policy", "sources", "models")
_POLICY_KEYS = (
    "level",
    "multiple_testing",
    "fdr_q",
    "persistence",
    "calibration",
    "replicates",
    "seed",
    "refit_policy",
    "justification",
    "approved_by",
)
_SETTINGS_KEYS = ("level", "calibration", "replicates")
_SOURCE_KEYS = ("uri", "key", "time", "value", "exogenous", "frequency", "partitioning")
_SOURCE_REQUIRED = ("uri", "key", "time", "value", "frequency")
_MODEL_KEYS = (
    "id",
    "owner",
    "tier",
    "description",
    "source",
    "series",
    "value",
    "exogenous",
    "spec",
    "noise",
    "windows",
    "settings",
    "last_validated",
)
_MODEL_REQUIRED = ("id", "owner", "tier", "source", "series", "spec", "noise", "windows")
_NOISE_SHAPE_KEYS = ("df", "size", "shape")
_SHAPE_ALIASES = {"df": "student-t", "size": "negative-binomial"}  # readable names of ``shape``

_TAG = "tag:yaml.org,2002:"
_ALLOWED_TAGS = frozenset(_TAG + t for t in ("str", "int", "float", "bool", "null", "map", "seq", "timestamp"))
_MAX_NODES = 100_000  # after expanding aliases; bounds the work a hostile file can cause
_SHOW = 60  # characters of an offending value quoted in a message


def is_safe_id(name: object) -> bool:
    """True when ``name`` is a string matching :data:`SAFE_ID`."""
    return isinstance(name, str) and SAFE_ID.match(name) is not None


# --------------------------------------------------------------------------------------------
# results
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class RegistryProblem:
    """One problem found in a registry file.

    Attributes
    ----------
    file : str
        The registry file as given by the caller.
    line : int or None
        1-based line of the offending node (None when the file could not be read).
    field : str
        Dotted path of the field, e.g. ``models[2].spec.order`` (empty for the whole file).
    message : str
        What is wrong and what would be valid.
    """

    file: str
    line: int | None
    field: str
    message: str

    def __str__(self) -> str:
        where = self.file if self.line is None else f"{self.file}:{self.line}"
        return f"{where}: {self.field}: {self.message}" if self.field else f"{where}: {self.message}"

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {"file": self.file, "line": self.line, "field": self.field, "message": self.message}


class RegistryError(FitauditError):
    """The registry cannot be used at all; :attr:`problems` lists every problem found."""

    def __init__(self, problems: list[RegistryProblem]):
        self.problems = list(problems)
        file = self.problems[0].file if self.problems else "<registry>"
        lines = "\n".join(f"  {p}" for p in self.problems)
        super().__init__(
            f"{file} has {len(self.problems)} problem(s); the audit cannot start until they are fixed:\n{lines}"
        )


@dataclass(frozen=True)
class Policy:
    """Thresholds fixed before the run, with their justification and approver.

    ``persistence_k`` of the last ``persistence_n`` audits with a ``refit`` verdict escalate to
    ``respecify``; ``refit_policy`` says whether refitted parameters are promoted automatically or
    need approval.
    """

    level: float = 0.05
    multiple_testing: str = "bh"
    fdr_q: float = 0.10
    persistence_k: int = 2
    persistence_n: int = 3
    calibration: str = "simulated"
    replicates: int = 999
    seed: int = 0
    refit_policy: str = "approval"
    justification: str = ""
    approved_by: str = ""
    line: int | None = None

    def to_dict(self) -> dict:
        """Plain-Python view (persistence as ``{"k": .., "n": ..}``)."""
        return {
            "level": self.level,
            "multiple_testing": self.multiple_testing,
            "fdr_q": self.fdr_q,
            "persistence": {"k": self.persistence_k, "n": self.persistence_n},
            "calibration": self.calibration,
            "replicates": self.replicates,
            "seed": self.seed,
            "refit_policy": self.refit_policy,
            "justification": self.justification,
            "approved_by": self.approved_by,
            "line": self.line,
        }


@dataclass(frozen=True)
class SourceEntry:
    """An extract source: where the Parquet data live and which columns mean what."""

    name: str
    uri: str
    key: str
    time: str
    value: str
    exogenous: tuple[str, ...]
    frequency: str
    partitioning: str | None
    line: int

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return json_ready(
            {
                "name": self.name,
                "uri": self.uri,
                "key": self.key,
                "time": self.time,
                "value": self.value,
                "exogenous": self.exogenous,
                "frequency": self.frequency,
                "partitioning": self.partitioning,
                "line": self.line,
            }
        )


@dataclass(frozen=True)
class ModelEntry:
    """A validated model entry.

    ``spec`` is ``{"family": name, **hyperparameters}`` with YAML lists as tuples, ready for
    :func:`fitaudit.core.models.model_from_dict`; ``noise`` is ``{"law": name, "shape": float or
    None}``; ``settings`` holds the per-model overrides of the policy (``level``,
    ``calibration``, ``replicates``) that were given; ``value`` is the target column (the
    source's unless overridden).
    """

    id: str
    owner: str
    tier: int
    description: str
    source: str
    series: str
    value: str
    exogenous: tuple[str, ...]
    spec: dict
    noise: dict
    fit_window: int
    audit_window: int
    settings: dict
    last_validated: str | None
    line: int

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return json_ready(
            {
                "id": self.id,
                "owner": self.owner,
                "tier": self.tier,
                "description": self.description,
                "source": self.source,
                "series": self.series,
                "value": self.value,
                "exogenous": self.exogenous,
                "spec": self.spec,
                "noise": self.noise,
                "windows": {"fit": self.fit_window, "audit": self.audit_window},
                "settings": self.settings,
                "last_validated": self.last_validated,
                "line": self.line,
            }
        )


@dataclass(frozen=True)
class RejectedEntry:
    """A model entry that cannot be audited, with every problem found in it.

    ``id`` is the raw id as written (or ``entry-<index>`` when there is none); ``safe_id`` is a
    :data:`SAFE_ID`-conforming name usable in file paths: the id itself when it is safe and not a
    duplicate, otherwise ``entry-<index>`` (made unique against the accepted ids).
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
    sources: dict
    models: tuple[ModelEntry, ...]
    rejected: tuple[RejectedEntry, ...]
    sha256: str
    source_problems: tuple[RegistryProblem, ...] = ()

    def model(self, id: str) -> ModelEntry:
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
# reading YAML nodes
# --------------------------------------------------------------------------------------------
class _Bad:
    """Marker of a value that failed validation (its problem is already recorded)."""

    def __repr__(self) -> str:
        return "<invalid>"


BAD = _Bad()


class _Reader:
    """Turns composed YAML nodes into checked values, recording problems with their lines."""

    def __init__(self, filename: str):
        self.file = filename
        self._constructor = yaml.constructor.SafeConstructor()

    def problem(self, where: yaml.Node | int | None, field_: str, message: str) -> RegistryProblem:
        """A problem located at a node (or a 1-based line)."""
        line = where.start_mark.line + 1 if isinstance(where, yaml.Node) else where
        return RegistryProblem(self.file, line, field_, message)

    def scalar(self, node: yaml.Node) -> Any:
        """The Python value of a standard scalar node (raises ValueError when it cannot be built)."""
        try:
            return self._constructor.construct_object(node)
        except Exception as exc:  # noqa: BLE001 - e.g. '!!int ""' raises IndexError inside PyYAML
            reason = (str(exc).splitlines() or [""])[0] or type(exc).__name__
            raise ValueError(
                f"{node.value[:_SHOW]!r} cannot be read as {node.tag.rsplit(':', 1)[-1]} ({reason})"
            ) from None

    def plain(self, node: yaml.Node) -> Any:
        """Nested Python value of a node: mappings as dicts, lists as tuples."""
        if isinstance(node, yaml.MappingNode):
            out = {}
            for key_node, value_node in node.value:
                if not (isinstance(key_node, yaml.ScalarNode) and key_node.tag == _TAG + "str"):
                    raise ValueError(f"keys must be text (line {key_node.start_mark.line + 1})")
                out[key_node.value] = self.plain(value_node)
            return out
        if isinstance(node, yaml.SequenceNode):
            return tuple(self.plain(v) for v in node.value)
        return self.scalar(node)

    def show(self, node: yaml.Node) -> str:
        """Describe a node's value for a message ("got ...")."""
        if isinstance(node, yaml.MappingNode):
            return "a mapping"
        if isinstance(node, yaml.SequenceNode):
            return "a list"
        try:
            value = self.scalar(node)
        except ValueError:
            value = node.value
        text = repr(value)
        if len(text) > _SHOW:
            text = text[: _SHOW - 3] + "..."
        if isinstance(value, bool) and node.tag == _TAG + "bool" and not node.style:  # plain style: None (Python composer) or "" (libyaml)
            text += f" (YAML reads the unquoted word {node.value!r} as a boolean; quote it to mean text)"
        return text

    def mapping(self, node: yaml.Node, field_: str, problems: list, what: str) -> dict | _Bad:
        """``{key: (key_node, value_node)}`` of a mapping node; text keys only, no duplicates."""
        if not isinstance(node, yaml.MappingNode):
            problems.append(self.problem(node, field_, f"expected {what}, got {self.show(node)}"))
            return BAD
        items: dict[str, tuple[yaml.Node, yaml.Node]] = {}
        for key_node, value_node in node.value:
            key_field = f"{field_}.<key>" if field_ else "<key>"
            if isinstance(key_node, yaml.ScalarNode) and key_node.tag == _TAG + "merge":
                problems.append(
                    self.problem(key_node, key_field, "merge keys ('<<') are not supported; write the keys out in full")
                )
                continue
            if not (isinstance(key_node, yaml.ScalarNode) and key_node.tag == _TAG + "str"):
                problems.append(
                    self.problem(key_node, key_field, f"keys must be text, got {self.show(key_node)}; quote the key")
                )
                continue
            key = key_node.value
            if key in items:
                first = items[key][0].start_mark.line + 1
                problems.append(
                    self.problem(
                        key_node,
                        _join(field_, key),
                        f"duplicate key {key!r} (first given on line {first}); keep only one",
                    )
                )
                continue
            items[key] = (key_node, value_node)
        return items

    def unknown_keys(self, items: dict, valid: tuple[str, ...], field_: str, problems: list) -> None:
        """Record every key of ``items`` that is not in ``valid``, suggesting the closest one."""
        for key, (key_node, _) in items.items():
            if key not in valid:
                problems.append(
                    self.problem(
                        key_node,
                        _join(field_, key),
                        f"unknown key {key!r}{_suggest(key, valid)}; valid keys are {_listing(valid)}",
                    )
                )

    # -- typed readers: return the value or BAD (after recording a problem) ----------------
    def text(self, node: yaml.Node, field_: str, problems: list, *, empty_ok: bool = False) -> str | _Bad:
        """A text value (non-blank unless ``empty_ok``)."""
        value = self.value(node)
        if not isinstance(value, str) or node.tag != _TAG + "str":
            problems.append(self.problem(node, field_, f"expected text, got {self.show(node)}"))
            return BAD
        if "\x00" in value:
            problems.append(self.problem(node, field_, "text must not contain NUL characters"))
            return BAD
        if not empty_ok and not value.strip():
            problems.append(self.problem(node, field_, "must not be blank"))
            return BAD
        return value

    def integer(
        self, node: yaml.Node, field_: str, problems: list, *, lo: int | None = None, hi: int | None = None
    ) -> int | _Bad:
        """An integer in ``[lo, hi]`` (booleans are not integers)."""
        value = self.value(node)
        ok = isinstance(value, int) and not isinstance(value, bool)
        if ok and (lo is None or value >= lo) and (hi is None or value <= hi):
            return value
        problems.append(self.problem(node, field_, f"expected {_int_range(lo, hi)}, got {self.show(node)}"))
        return BAD

    def real(self, node: yaml.Node, field_: str, problems: list, lo: float, hi: float) -> float | _Bad:
        """A finite number in the open interval ``(lo, hi)``."""
        value = self.value(node)
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        if ok and math.isfinite(value) and lo < value < hi:
            return float(value)
        problems.append(
            self.problem(
                node, field_, f"expected a number in the open interval ({lo:g}, {hi:g}), got {self.show(node)}"
            )
        )
        return BAD

    def choice(self, node: yaml.Node, field_: str, problems: list, options: tuple[str, ...]) -> str | _Bad:
        """One of ``options`` (exact spelling)."""
        value = self.value(node)
        if isinstance(value, str) and value in options:
            return value
        hint = _suggest(value, options) if isinstance(value, str) else ""
        problems.append(self.problem(node, field_, f"expected one of {_listing(options)}, got {self.show(node)}{hint}"))
        return BAD

    def names(self, node: yaml.Node, field_: str, problems: list) -> tuple[str, ...] | _Bad:
        """A list of distinct, non-blank column names."""
        if not isinstance(node, yaml.SequenceNode):
            problems.append(
                self.problem(node, field_, f"expected a list of column names, e.g. [temp_c], got {self.show(node)}")
            )
            return BAD
        out: list[str] = []
        for i, item in enumerate(node.value):
            name = self.text(item, f"{field_}[{i}]", problems)
            if name is BAD:
                return BAD
            if name in out:
                problems.append(self.problem(item, f"{field_}[{i}]", f"column {name!r} is listed twice"))
                return BAD
            out.append(name)
        return tuple(out)

    def value(self, node: yaml.Node) -> Any:
        """The value of a scalar node, or BAD for collections and unreadable scalars."""
        if not isinstance(node, yaml.ScalarNode):
            return BAD
        try:
            return self.scalar(node)
        except ValueError:
            return BAD


def _join(prefix: str, key: str) -> str:
    return f"{prefix}.{key}" if prefix else key


def _listing(options) -> str:
    return ", ".join(repr(o) for o in options)


def _int_range(lo: int | None, hi: int | None) -> str:
    if lo is not None and hi is not None:
        return f"an integer from {lo} to {hi}"
    if lo is not None:
        return f"an integer >= {lo}"
    return "an integer"


def _suggest(word: str, options) -> str:
    """``" (did you mean 'x'?)"`` for the closest option (case-insensitive match first)."""
    options = list(options)
    for option in options:
        if option.lower() == word.lower():
            return f" (did you mean {option!r}?)"
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


# --------------------------------------------------------------------------------------------
# whole-document checks
# --------------------------------------------------------------------------------------------
#: libyaml's composer when PyYAML was built with it: the same nodes and marks, four times faster
#: and with a quarter of the transient memory on a 10,000-model registry (17 s and 270 MB there).
_COMPOSER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


def _compose(text: str, reader: _Reader) -> tuple[yaml.Node | None, list[RegistryProblem]]:
    try:
        return yaml.compose(text, Loader=_COMPOSER), []
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark is not None else None
        detail = " ".join(str(x) for x in (exc.context, exc.problem) if x)
        message = f"YAML syntax error: {detail}; check the indentation, colons and quoting near this line"
        return None, [reader.problem(line, "", message)]
    except yaml.YAMLError as exc:
        return None, [reader.problem(None, "", f"YAML error: {exc}")]
    except RecursionError:
        return None, [
            reader.problem(None, "", "the YAML is nested too deeply to read; a registry needs at most a few levels")
        ]


def _tag_problems(root: yaml.Node, reader: _Reader, limit: int = _MAX_NODES) -> list[RegistryProblem]:
    """Refuse non-standard tags anywhere, and documents that expand beyond ``limit`` values.

    The caller passes the larger of :data:`_MAX_NODES` and the text's length: without aliases every
    value takes at least one character, so only aliases can exceed it (a registry of 10,000 models
    holds about 250,000 values in 800,000 characters).
    """
    problems = []
    stack = [root]
    visited = 0
    while stack:
        node = stack.pop()
        visited += 1
        if visited > limit:
            problems.append(
                reader.problem(
                    root,
                    "",
                    f"the document expands to more than {limit} values through aliases "
                    "(or an alias refers to itself); write the registry without such anchors",
                )
            )
            break
        if node.tag not in _ALLOWED_TAGS and node.tag != _TAG + "merge":
            problems.append(
                reader.problem(
                    node,
                    "",
                    f"the tag {node.tag!r} is refused: the registry accepts only plain YAML "
                    "(text, numbers, booleans, dates, lists, mappings), never object-constructing tags; remove the tag",
                )
            )
        if isinstance(node, yaml.MappingNode):
            for key_node, value_node in node.value:
                stack.extend((value_node, key_node))
        elif isinstance(node, yaml.SequenceNode):
            stack.extend(reversed(node.value))
    return sorted(problems, key=lambda p: p.line or 0)


# --------------------------------------------------------------------------------------------
# sections
# --------------------------------------------------------------------------------------------
def _read_version(reader: _Reader, items: dict, root: yaml.Node, problems: list) -> int:
    if "version" not in items:
        problems.append(reader.problem(root, "version", "missing; the first line of a registry should be 'version: 1'"))
        return 1
    node = items["version"][1]
    value = reader.value(node)
    if value != 1 or isinstance(value, bool):
        problems.append(
            reader.problem(
                node, "version", f"expected 1 (the only registry version this fitaudit reads), got {reader.show(node)}"
            )
        )
    return 1


def _policy_value(reader: _Reader, key: str, node: yaml.Node, field_: str, problems: list) -> Any:
    """Validate one policy (or per-model setting) value."""
    if key == "level":
        return reader.real(node, field_, problems, 0.0, 0.5)
    if key == "fdr_q":
        return reader.real(node, field_, problems, 0.0, 1.0)
    if key == "multiple_testing":
        return reader.choice(node, field_, problems, MULTIPLE_TESTING)
    if key == "calibration":
        return reader.choice(node, field_, problems, CALIBRATIONS)
    if key == "refit_policy":
        return reader.choice(node, field_, problems, REFIT_POLICIES)
    if key == "replicates":
        return reader.integer(node, field_, problems, lo=99)
    if key == "seed":
        return reader.integer(node, field_, problems, lo=0)
    if key in ("justification", "approved_by"):
        return reader.text(node, field_, problems)
    if key == "persistence":
        return _read_persistence(reader, node, field_, problems)
    raise AssertionError(key)  # keys are checked against _POLICY_KEYS first


def _read_persistence(reader: _Reader, node: yaml.Node, field_: str, problems: list) -> tuple[int, int] | _Bad:
    items = reader.mapping(node, field_, problems, "a mapping like {k: 2, n: 3}")
    if items is BAD:
        return BAD
    before = len(problems)
    reader.unknown_keys(items, ("k", "n"), field_, problems)
    for key in ("k", "n"):
        if key not in items:
            problems.append(
                reader.problem(node, f"{field_}.{key}", "missing; persistence needs both k and n, e.g. {k: 2, n: 3}")
            )
    if len(problems) > before:
        return BAD
    k = reader.integer(items["k"][1], f"{field_}.k", problems, lo=1)
    n = reader.integer(items["n"][1], f"{field_}.n", problems, lo=1)
    if k is BAD or n is BAD:
        return BAD
    if k > n:
        problems.append(reader.problem(items["k"][1], f"{field_}.k", f"k = {k} exceeds n = {n}; need 1 <= k <= n"))
        return BAD
    return k, n


def _read_policy(reader: _Reader, items: dict, root: yaml.Node, problems: list) -> Policy:
    if "policy" not in items:
        problems.append(
            reader.problem(
                root,
                "policy",
                "missing; add a policy block with at least 'justification' and 'approved_by' "
                "(the thresholds must be fixed and approved before the run)",
            )
        )
        return Policy()
    key_node, node = items["policy"]
    policy_items = reader.mapping(node, "policy", problems, "a mapping of thresholds")
    if policy_items is BAD:
        return Policy()
    reader.unknown_keys(policy_items, _POLICY_KEYS, "policy", problems)
    values: dict[str, Any] = {}
    for key, (_, value_node) in policy_items.items():
        if key in _POLICY_KEYS:
            value = _policy_value(reader, key, value_node, f"policy.{key}", problems)
            if value is not BAD:
                values[key] = value
    for key in ("justification", "approved_by"):
        if key not in policy_items:
            problems.append(
                reader.problem(
                    key_node,
                    f"policy.{key}",
                    "missing; every threshold needs a written justification and an approver "
                    "('name, role') before the run",
                )
            )
    k, n = values.pop("persistence", (2, 3))
    return Policy(**values, persistence_k=k, persistence_n=n, line=key_node.start_mark.line + 1)


def _read_source(
    reader: _Reader, name: str, key_node: yaml.Node, node: yaml.Node
) -> SourceEntry | list[RegistryProblem]:
    field_ = f"sources.{name}"
    problems: list[RegistryProblem] = []
    if not is_safe_id(name):
        problems.append(
            reader.problem(
                key_node,
                field_,
                f"source name {name[:_SHOW]!r} is not allowed; use 1-128 letters, digits, "
                "'_', '.' or '-', starting with a letter or digit",
            )
        )
    items = reader.mapping(node, field_, problems, "a mapping with uri, key, time, value and frequency")
    if items is BAD:
        return problems
    reader.unknown_keys(items, _SOURCE_KEYS, field_, problems)
    for key in _SOURCE_REQUIRED:
        if key not in items:
            problems.append(
                reader.problem(key_node, f"{field_}.{key}", f"missing; a source needs {_listing(_SOURCE_REQUIRED)}")
            )
    values: dict[str, Any] = {"exogenous": (), "partitioning": None}
    for key in ("uri", "key", "time", "value"):
        if key in items:
            values[key] = reader.text(items[key][1], f"{field_}.{key}", problems)
    if "frequency" in items:
        values["frequency"] = reader.choice(items["frequency"][1], f"{field_}.frequency", problems, tuple(FREQUENCIES))
    if "exogenous" in items:
        values["exogenous"] = reader.names(items["exogenous"][1], f"{field_}.exogenous", problems)
    if "partitioning" in items:
        part_node = items["partitioning"][1]
        if reader.value(part_node) is not None:
            values["partitioning"] = reader.choice(part_node, f"{field_}.partitioning", problems, PARTITIONINGS)
    if problems:
        return problems
    roles = {"key": values["key"], "time": values["time"], "value": values["value"]}
    for column in values["exogenous"]:
        roles_of = [r for r, c in roles.items() if c == column]
        if roles_of:
            problems.append(
                reader.problem(
                    items["exogenous"][1],
                    f"{field_}.exogenous",
                    f"column {column!r} is already the source's {roles_of[0]} column",
                )
            )
    if len(set(roles.values())) < 3:
        problems.append(
            reader.problem(key_node, field_, f"key, time and value must be three different columns, got {roles}")
        )
    if problems:
        return problems
    return SourceEntry(name=name, line=key_node.start_mark.line + 1, **values)


def _read_sources(reader: _Reader, items: dict, root: yaml.Node, problems: list) -> tuple[dict, dict]:
    """Valid sources by name, and problems of the dropped ones by name."""
    if "sources" not in items:
        problems.append(
            reader.problem(
                root, "sources", "missing; declare at least one extract source (uri, key, time, value, frequency)"
            )
        )
        return {}, {}
    source_items = reader.mapping(
        items["sources"][1], "sources", problems, "a mapping of source names to source entries"
    )
    if source_items is BAD:
        return {}, {}
    good, dropped = {}, {}
    for name, (key_node, node) in source_items.items():
        result = _read_source(reader, name, key_node, node)
        if isinstance(result, SourceEntry):
            good[name] = result
        else:
            dropped[name] = result
    return good, dropped


# --------------------------------------------------------------------------------------------
# model entries
# --------------------------------------------------------------------------------------------
def _read_spec(reader: _Reader, node: yaml.Node, field_: str, problems: list) -> dict | _Bad:
    from fitaudit.core.models import get_family, model_from_dict

    items = reader.mapping(node, field_, problems, "a mapping like {family: arima, order: [1, 0, 1]}")
    if items is BAD:
        return BAD
    if "family" not in items:
        problems.append(reader.problem(node, f"{field_}.family", "missing; a spec needs a 'family' (e.g. arima)"))
        return BAD
    family_node = items["family"][1]
    family = reader.text(family_node, f"{field_}.family", problems)
    if family is BAD:
        return BAD
    try:
        cls = get_family(family)
    except Exception as exc:  # noqa: BLE001 - the family registry's own message lists the valid names
        problems.append(reader.problem(family_node, f"{field_}.family", str(exc)))
        return BAD
    try:
        spec = {key: reader.plain(value_node) for key, (_, value_node) in items.items()}
    except ValueError as exc:
        problems.append(reader.problem(node, field_, f"a value cannot be read: {exc}"))
        return BAD
    try:
        model_from_dict(spec)
    except Exception as exc:  # noqa: BLE001 - any failure to build the spec rejects this entry only
        problems.append(_spec_problem(reader, cls, items, node, field_, exc))
        return BAD
    return spec


def _spec_problem(
    reader: _Reader, cls: type, items: dict, node: yaml.Node, field_: str, exc: Exception
) -> RegistryProblem:
    """Locate a spec-construction failure on the hyperparameter it names, when it names one."""
    message = str(exc) or type(exc).__name__
    unexpected = re.search(r"unexpected keyword argument '(\w+)'", message)
    if unexpected and unexpected.group(1) in items:
        key = unexpected.group(1)
        valid = tuple(p for p in inspect.signature(cls).parameters if p not in ("self", "args", "kwargs"))
        return reader.problem(
            items[key][0],
            f"{field_}.{key}",
            f"unknown hyperparameter {key!r} for family {cls.family!r}{_suggest(key, valid)}; valid keys are "
            f"{_listing(('family',) + valid)}",
        )
    named = re.search(r"'(\w+)' parameter", message)
    if named and named.group(1) in items:
        key = named.group(1)
        return reader.problem(items[key][1], f"{field_}.{key}", message)
    return reader.problem(node, field_, message)


def _read_noise(reader: _Reader, node: yaml.Node, field_: str, problems: list) -> dict | _Bad:
    from fitaudit.core.noise import get_law

    shape: float | None = None
    if isinstance(node, yaml.MappingNode):
        items = reader.mapping(node, field_, problems, "a noise law")
        if items is BAD:
            return BAD
        before = len(problems)
        reader.unknown_keys(items, ("law",) + _NOISE_SHAPE_KEYS, field_, problems)
        shape_keys = [k for k in _NOISE_SHAPE_KEYS if k in items]
        if len(shape_keys) > 1:
            problems.append(reader.problem(node, field_, f"give one shape parameter, got {_listing(shape_keys)}"))
        if "law" not in items:
            problems.append(reader.problem(node, f"{field_}.law", "missing; e.g. {law: student-t, df: 5}"))
        if len(problems) > before:
            return BAD
        law_node = items["law"][1]
        if shape_keys:
            shape_node = items[shape_keys[0]][1]
            value = reader.value(shape_node)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value) or value <= 0:
                problems.append(
                    reader.problem(
                        shape_node,
                        f"{field_}.{shape_keys[0]}",
                        f"expected a positive number, got {reader.show(shape_node)}",
                    )
                )
                return BAD
            shape = float(value)
    else:
        law_node = node
    law_field = f"{field_}.law" if law_node is not node else field_
    law = reader.text(law_node, law_field, problems)
    if law is BAD:
        return BAD
    alias = next((k for k in _SHAPE_ALIASES if k in items), None) if law_node is not node else None
    if alias is not None and _SHAPE_ALIASES[alias] != law:
        problems.append(
            reader.problem(
                items[alias][0],
                f"{field_}.{alias}",
                f"{alias!r} is the shape of the {_SHAPE_ALIASES[alias]!r} law, not of {law!r}; use 'shape' or drop it",
            )
        )
        return BAD
    try:
        get_law(law, shape=shape)
    except Exception as exc:  # noqa: BLE001 - the noise module's message lists the valid laws
        problems.append(reader.problem(law_node, law_field, str(exc)))
        return BAD
    return {"law": law, "shape": shape}


def _read_windows(reader: _Reader, node: yaml.Node, field_: str, problems: list) -> tuple[int, int] | _Bad:
    items = reader.mapping(node, field_, problems, "a mapping like {fit: 730, audit: 28} (numbers of observations)")
    if items is BAD:
        return BAD
    before = len(problems)
    reader.unknown_keys(items, ("fit", "audit"), field_, problems)
    for key in ("fit", "audit"):
        if key not in items:
            problems.append(
                reader.problem(node, f"{field_}.{key}", "missing; windows need fit and audit lengths in observations")
            )
    if len(problems) > before:
        return BAD
    fit = reader.integer(items["fit"][1], f"{field_}.fit", problems, lo=1)
    audit = reader.integer(items["audit"][1], f"{field_}.audit", problems, lo=1)
    if fit is BAD or audit is BAD:
        return BAD
    if audit > fit:
        problems.append(
            reader.problem(
                items["audit"][1],
                f"{field_}.audit",
                f"the audit window ({audit}) is longer than the fit window ({fit}); need fit >= audit >= 1",
            )
        )
        return BAD
    return fit, audit


def _read_settings(reader: _Reader, node: yaml.Node, field_: str, problems: list) -> dict | _Bad:
    items = reader.mapping(node, field_, problems, f"a mapping of policy overrides ({_listing(_SETTINGS_KEYS)})")
    if items is BAD:
        return BAD
    before = len(problems)
    reader.unknown_keys(items, _SETTINGS_KEYS, field_, problems)
    settings = {}
    for key, (_, value_node) in items.items():
        if key in _SETTINGS_KEYS:
            settings[key] = _policy_value(reader, key, value_node, f"{field_}.{key}", problems)
    return BAD if len(problems) > before else settings


def _read_date(reader: _Reader, node: yaml.Node, field_: str, problems: list) -> str | None | _Bad:
    value = reader.value(node)
    if value is None:
        return None
    if isinstance(value, _dt.datetime):
        return value.date().isoformat()
    if isinstance(value, _dt.date):
        return value.isoformat()
    if isinstance(value, str):
        try:
            return _dt.date.fromisoformat(value).isoformat()
        except ValueError:
            pass
    problems.append(reader.problem(node, field_, f"expected a date like 2026-06-30, got {reader.show(node)}"))
    return BAD


def _read_series_key(reader: _Reader, node: yaml.Node, field_: str, problems: list) -> str | _Bad:
    value = reader.value(node)
    if isinstance(value, int) and not isinstance(value, bool):
        return str(value)
    return reader.text(node, field_, problems)


class _Entries:
    """Reads the ``models`` list, keeping the state that spans entries (ids seen so far)."""

    def __init__(self, reader: _Reader, sources: dict, dropped: dict):
        self.reader = reader
        self.sources = sources
        self.dropped = dropped
        self.first_line: dict[str, tuple[str, int]] = {}  # case-folded id -> (id, line)

    def read(self, node: yaml.Node, index: int) -> ModelEntry | RejectedEntry:
        """One model entry, accepted or rejected with all its problems."""
        reader, field_ = self.reader, f"models[{index}]"
        problems: list[RegistryProblem] = []
        line = node.start_mark.line + 1
        items = reader.mapping(
            node, field_, problems, "a mapping with id, owner, tier, source, series, spec, noise and windows"
        )
        if items is BAD:
            return RejectedEntry(f"entry-{index}", f"entry-{index}", line, None, tuple(problems))
        reader.unknown_keys(items, _MODEL_KEYS, field_, problems)
        for key in _MODEL_REQUIRED:
            if key not in items:
                problems.append(
                    reader.problem(
                        node, f"{field_}.{key}", f"missing; required in every model entry ({_listing(_MODEL_REQUIRED)})"
                    )
                )
        raw_id, safe = self._read_id(items, field_, problems)
        values = self._read_fields(items, field_, problems)
        owner = values.get("owner")
        if problems:
            problems.sort(key=lambda p: p.line or 0)
            return RejectedEntry(raw_id, safe, line, owner if isinstance(owner, str) else None, tuple(problems))
        return ModelEntry(
            id=raw_id,
            owner=values["owner"],
            tier=values["tier"],
            description=values.get("description", ""),
            source=values["source"],
            series=values["series"],
            value=values.get("value") or self.sources[values["source"]].value,
            exogenous=values.get("exogenous", ()),
            spec=values["spec"],
            noise=values["noise"],
            fit_window=values["windows"][0],
            audit_window=values["windows"][1],
            settings=values.get("settings", {}),
            last_validated=values.get("last_validated"),
            line=line,
        )

    def _read_id(self, items: dict, field_: str, problems: list) -> tuple[str, str | None]:
        """The raw id and, when the id is safe and new, the id itself as the safe name."""
        if "id" not in items:
            return "", None
        node = items["id"][1]
        raw = node.value if isinstance(node, yaml.ScalarNode) else ""
        value = self.reader.text(node, f"{field_}.id", problems)
        if value is BAD:
            return raw, None
        if not is_safe_id(value) or len(value) > MAX_ID_LENGTH:
            problems.append(
                self.reader.problem(
                    node,
                    f"{field_}.id",
                    f"id {value[:_SHOW]!r} is not allowed; use 1-{MAX_ID_LENGTH} letters, digits, "
                    "'_', '.' or '-', starting with a letter or digit (ids become file names)",
                )
            )
            return value, None
        folded = value.casefold()
        if folded in self.first_line:
            first_id, first = self.first_line[folded]
            same = (
                ""
                if first_id == value
                else f" as {first_id!r} (ids differing only in case would collide as file names)"
            )
            problems.append(
                self.reader.problem(
                    node,
                    f"{field_}.id",
                    f"duplicate id {value!r}: already used on line {first}{same}; give every model entry its own id",
                )
            )
            return value, None
        self.first_line[folded] = (value, node.start_mark.line + 1)
        return value, value

    def _read_fields(self, items: dict, field_: str, problems: list) -> dict:
        reader = self.reader
        readers: dict[str, Callable[[yaml.Node, str], Any]] = {
            "owner": lambda n, f: reader.text(n, f, problems),
            "tier": lambda n, f: reader.integer(n, f, problems, lo=1, hi=3),
            "description": lambda n, f: (
                reader.text(n, f, problems, empty_ok=True) if reader.value(n) is not None else ""
            ),
            "series": lambda n, f: _read_series_key(reader, n, f, problems),
            "value": lambda n, f: reader.text(n, f, problems),
            "exogenous": lambda n, f: reader.names(n, f, problems),
            "spec": lambda n, f: _read_spec(reader, n, f, problems),
            "noise": lambda n, f: _read_noise(reader, n, f, problems),
            "windows": lambda n, f: _read_windows(reader, n, f, problems),
            "settings": lambda n, f: _read_settings(reader, n, f, problems),
            "last_validated": lambda n, f: _read_date(reader, n, f, problems),
        }
        values = {}
        for key, read in readers.items():
            if key in items:
                value = read(items[key][1], f"{field_}.{key}")
                if value is not BAD:
                    values[key] = value
        if "source" in items:
            source = self._read_source_ref(items["source"][1], f"{field_}.source", problems)
            if source is not None:
                values["source"] = source
                self._check_columns(items, values, source, field_, problems)
        return values

    def _read_source_ref(self, node: yaml.Node, field_: str, problems: list) -> str | None:
        name = self.reader.text(node, field_, problems)
        if name is BAD:
            return None
        if name in self.dropped:
            first = self.dropped[name][0]
            problems.append(
                self.reader.problem(
                    node,
                    field_,
                    f"source {name!r} has {len(self.dropped[name])} problem(s) and was dropped; first: {first}. "
                    "Fix the source entry and this model will be audited",
                )
            )
            return None
        if name not in self.sources:
            declared = _listing(sorted(self.sources)) or "none"
            problems.append(
                self.reader.problem(
                    node,
                    field_,
                    f"unknown source {name!r}{_suggest(name, self.sources)}; declared sources are {declared}",
                )
            )
            return None
        return name

    def _check_columns(self, items: dict, values: dict, source_name: str, field_: str, problems: list) -> None:
        source = self.sources[source_name]
        value = values.get("value")
        if value is not None and value in (source.key, source.time):
            problems.append(
                self.reader.problem(
                    items["value"][1],
                    f"{field_}.value",
                    f"{value!r} is the source's key or time column; name a numeric value column",
                )
            )
        exogenous = values.get("exogenous", ())
        target = value or source.value
        for i, column in enumerate(exogenous):
            node = items["exogenous"][1].value[i]
            if column not in source.exogenous:
                declared = _listing(source.exogenous) or "none"
                problems.append(
                    self.reader.problem(
                        node,
                        f"{field_}.exogenous[{i}]",
                        f"column {column!r} is not declared by source {source_name!r}{_suggest(column, source.exogenous)}; "
                        f"its exogenous columns are {declared} (declare it under sources.{source_name}.exogenous)",
                    )
                )
            elif column == target:
                problems.append(
                    self.reader.problem(node, f"{field_}.exogenous[{i}]", f"column {column!r} is the model's target")
                )


# --------------------------------------------------------------------------------------------
# public entry points
# --------------------------------------------------------------------------------------------
def _analyse(
    text: str, filename: str, base_dir: str, digest: str
) -> tuple[list[RegistryProblem], list[RegistryProblem], Registry | None]:
    """Registry-level problems, entry-level problems, and the registry (None when unusable)."""
    reader = _Reader(filename)
    root, problems = _compose(text, reader)
    if problems:
        return problems, [], None
    if root is None:
        return (
            [
                reader.problem(
                    1, "", "the registry is empty; expected a mapping with 'version', 'policy', 'sources' and 'models'"
                )
            ],
            [],
            None,
        )
    problems = _tag_problems(root, reader, max(_MAX_NODES, len(text)))
    if problems:
        return problems, [], None
    top = reader.mapping(root, "", problems, "a mapping with 'version', 'policy', 'sources' and 'models'")
    if top is BAD:
        return problems, [], None
    reader.unknown_keys(top, _TOP_KEYS, "", problems)
    version = _read_version(reader, top, root, problems)
    policy = _read_policy(reader, top, root, problems)
    sources, dropped = _read_sources(reader, top, root, problems)
    source_problems = [p for group in dropped.values() for p in group]
    models, rejected = _read_models(reader, top, root, sources, dropped, problems)
    entry_problems = source_problems + [p for r in rejected for p in r.problems]
    registry = Registry(
        path=filename,
        base_dir=base_dir,
        version=version,
        policy=policy,
        sources=sources,
        models=tuple(models),
        rejected=tuple(rejected),
        sha256=digest,
        source_problems=tuple(source_problems),
    )
    return problems, entry_problems, registry


def _read_models(reader, top, root, sources, dropped, problems) -> tuple[list[ModelEntry], list[RejectedEntry]]:
    if "models" not in top:
        problems.append(reader.problem(root, "models", "missing; add a 'models:' list of model entries"))
        return [], []
    node = top["models"][1]
    if not isinstance(node, yaml.SequenceNode):
        problems.append(
            reader.problem(
                node,
                "models",
                f"expected a list of model entries (each starting with '- id: ...'), got {reader.show(node)}",
            )
        )
        return [], []
    entries = _Entries(reader, sources, dropped)
    results = [entries.read(item, i) for i, item in enumerate(node.value)]
    models = [r for r in results if isinstance(r, ModelEntry)]
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


def load_registry(path: str | os.PathLike) -> Registry:
    """Read, parse and validate a registry file; relative source URIs resolve against its folder.

    Raises
    ------
    RegistryError
        When the file cannot be read or has any registry-level problem.
    """
    text, name, digest = _read_text(path)
    base = os.path.dirname(os.path.abspath(os.fspath(path)))
    problems, _, registry = _analyse(text, name, base, digest)
    if problems:
        raise RegistryError(problems)
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


# --------------------------------------------------------------------------------------------
# Prefect task
# --------------------------------------------------------------------------------------------
@task(name="load-registry", retries=2, retry_delay_seconds=2, persist_result=False)
def load_registry_task(path: str) -> Registry:
    """Prefect task: read and validate the registry (retried for transient I/O errors).

    Registry-level problems raise :class:`RegistryError` and fail the run before any model is
    audited; entry-level problems come back in ``Registry.rejected``.
    """
    return load_registry(path)
