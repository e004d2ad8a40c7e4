"""Registry problems: what is wrong, where (file, line, field) and what would be valid.

:class:`RegistryProblem` is the one shape every check of the registry reports in, from a YAML
syntax error to a cross-field rule of the schema.  :func:`from_validation_error` turns pydantic's
errors into problems: each error's location (a path of keys and list indices) is followed through
the composed YAML nodes to the line a person would edit, and the message is written in the
registry's words (``expected an integer >= 99, got 50``, ``unknown key 'levle' (did you mean
'level'?); valid keys are ...``).

The schema (:mod:`.schema`) raises two kinds of custom error besides pydantic's own:

``expected``
    A value of the wrong type or outside its bounds; ``ctx["what"]`` says what is valid and
    ``ctx["options"]`` lists the options of a choice (for "did you mean").  The message gets
    ``, got <the value as written>``.
``invalid``
    A rule about the value (a cross-field rule, an unknown model family, ...), with its message
    complete.

Either may carry ``ctx["at"]``, a path below the error's own location (a cross-field rule of the
``windows`` block points at ``audit``), and ``ctx["on_key"]``, to point at the key's line rather
than the value's.
"""

from __future__ import annotations

import difflib
import types
import typing
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import yaml
from pydantic import BaseModel, ValidationError

from fitaudit.core.exceptions import FitauditError

from .yaml_safety import node_path, show

__all__ = [
    "RegistryProblem",
    "RegistryError",
    "RegistryChangedError",
    "field_name",
    "listing",
    "suggest",
    "unknown_key_message",
    "from_validation_error",
]


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

    def __reduce__(self):
        # pickled with its problems, not its message (a registry parsed in a child process)
        return (type(self), (self.problems,))


class RegistryChangedError(FitauditError):
    """The registry file is not the one that was audited: its SHA-256 differs."""


# --------------------------------------------------------------------------------------------
# wording
# --------------------------------------------------------------------------------------------
def field_name(path: Iterable[str | int]) -> str:
    """``("models", 2, "spec", "order")`` -> ``models[2].spec.order``."""
    out = ""
    for part in path:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out = f"{out}.{part}" if out else str(part)
    return out


def listing(options: Iterable[Any]) -> str:
    """``'a', 'b', 'c'``."""
    return ", ".join(repr(o) for o in options)


def suggest(word: str, options: Iterable[str]) -> str:
    """``" (did you mean 'x'?)"`` for the closest option (case-insensitive match first), or ``""``."""
    options = [o for o in options if isinstance(o, str)]
    for option in options:
        if option.lower() == word.lower():
            return f" (did you mean {option!r}?)"
    close = difflib.get_close_matches(word, options, n=1, cutoff=0.6)
    return f" (did you mean {close[0]!r}?)" if close else ""


def unknown_key_message(key: str, valid: Iterable[str]) -> str:
    """The message for a key the schema does not know."""
    valid = tuple(valid)
    return f"unknown key {key!r}{suggest(key, valid)}; valid keys are {listing(valid)}"


# --------------------------------------------------------------------------------------------
# pydantic errors -> problems
# --------------------------------------------------------------------------------------------
def _tag_of(tp: Any) -> str | None:
    """The union tag (``pydantic.Tag``) an annotated type carries, if any."""
    for meta in getattr(tp, "__metadata__", ()):
        tag = getattr(meta, "tag", None)
        if isinstance(tag, str):
            return tag
    return None


def _is_union(tp: Any) -> bool:
    return typing.get_origin(tp) in (typing.Union, types.UnionType)


def _model_class(tp: Any) -> type[BaseModel] | None:
    """The model class a field's type holds (through ``Annotated`` and unions), if any."""
    while typing.get_origin(tp) is typing.Annotated:
        tp = typing.get_args(tp)[0]
    if isinstance(tp, type) and issubclass(tp, BaseModel):
        return tp
    if _is_union(tp):
        for member in typing.get_args(tp):
            found = _model_class(member)
            if found is not None:
                return found
    return None


def _step(tp: Any, part: str | int) -> tuple[Any, bool]:
    """The type one location part below ``tp``, and whether the part was a union tag."""
    while True:
        if typing.get_origin(tp) is typing.Annotated:
            if _tag_of(tp) == part:
                return typing.get_args(tp)[0], True  # the member itself: a field named as its tag is a field
            tp = typing.get_args(tp)[0]
        elif _is_union(tp):
            members = [m for m in typing.get_args(tp) if m is not type(None)]
            tagged = [m for m in members if _tag_of(m) == part]
            if tagged:
                return typing.get_args(tagged[0])[0], True
            tp = next((m for m in members if _model_class(m) is not None), members[0])
        else:
            break
    if isinstance(tp, type) and issubclass(tp, BaseModel):
        field = tp.model_fields.get(part) if isinstance(part, str) else None
        return (field.annotation if field is not None else None), False
    origin = typing.get_origin(tp)
    if origin is dict:
        return typing.get_args(tp)[1], False
    if origin in (tuple, list):
        return typing.get_args(tp)[0], False
    return None, False


def _walk(root_type: Any, loc: tuple) -> tuple[tuple, list[Any]]:
    """The location without union tags, and the type reached after each of its parts."""
    path: list = []
    reached: list = [root_type]
    for part in loc:
        tp, was_tag = _step(reached[-1], part) if reached[-1] is not None else (None, False)
        if was_tag:
            reached[-1] = tp
            continue
        path.append(part)
        reached.append(tp)
    return tuple(path), reached


def from_validation_error(
    error: ValidationError,
    *,
    file: str,
    root: yaml.Node,
    base: tuple = (),
    schema: Any,
) -> list[RegistryProblem]:
    """Problems, located in the YAML, of a pydantic validation error.

    Parameters
    ----------
    error : pydantic.ValidationError
        Raised by validating the value found at ``base`` in the document against ``schema``.
    file : str
        The registry file, for the problems.
    root : yaml.Node
        The composed document.
    base : tuple
        Path of the validated value in the document (e.g. ``("models", 3)``).
    schema : type
        The validated type (a model class, or an annotated union of model classes).
    """
    problems = []
    for err in error.errors(include_url=False):
        ctx = err.get("ctx") or {}
        rel, reached_types = _walk(schema, tuple(err["loc"]))
        kind = err["type"]
        if kind == "extra_forbidden":
            parent = _model_class(reached_types[-2]) if len(reached_types) > 1 else None
            valid = parent.yaml_keys() if parent is not None and hasattr(parent, "yaml_keys") else ()
            message = unknown_key_message(str(rel[-1]), valid)
            on_key, missing = True, False
        elif kind == "missing":
            parent = _model_class(reached_types[-2]) if len(reached_types) > 1 else None
            hint = (
                parent.missing_hint(str(rel[-1]))
                if parent is not None and hasattr(parent, "missing_hint")
                else "required"
            )
            message, on_key, missing = f"missing; {hint}", False, True
        else:
            rel = rel + tuple(ctx.get("at", ()))
            on_key, missing = bool(ctx.get("on_key")), False
            message = None  # written below, once the node is known
        path = base + rel
        key_node, node, reached = node_path(root, path)
        if missing:
            # the line of the block that lacks the key: its key (``windows:``) or its list item
            parent_key, parent_node, _ = node_path(root, path[:-1])
            line_node = parent_key if parent_key is not None else parent_node
            field_path = path
        else:
            # a block (mapping or list) is reported on the line of its key, where it starts
            block = not isinstance(node, yaml.ScalarNode)
            line_node = key_node if (on_key or block) and key_node is not None else node
            # a value written as a scalar where the schema reads a block (``noise: gauss`` is the
            # law's name) is reported at the scalar
            field_path = path if reached == len(path) or not isinstance(node, yaml.ScalarNode) else path[:reached]
        if message is None:
            message = _message(kind, err, ctx, node, reached_types[-1] if reached == len(path) else None)
        problems.append(RegistryProblem(file, line_node.start_mark.line + 1, field_name(field_path), message))
    return problems


def _message(kind: str, err: dict, ctx: dict, node: yaml.Node, tp: Any) -> str:
    if kind == "expected":
        options = ctx.get("options")
        got = show(node)
        hint = ""
        if options and isinstance(node, yaml.ScalarNode) and isinstance(node.value, str) and node.tag.endswith(":str"):
            hint = suggest(node.value, options)
        return f"expected {ctx['what']}, got {got}{hint}"
    if kind in ("model_type", "model_attributes_type", "dict_type"):
        model = _model_class(tp)
        what = getattr(model, "shape_hint", "a mapping")
        return f"expected {what}, got {show(node)}"
    return str(err["msg"])
