"""Reading a registry's YAML safely: composed nodes, never constructed objects.

The file is read with PyYAML's composer (:func:`yaml.compose`), so every value keeps its line and
no Python object is ever built from a tag: a tag outside YAML's standard scalar, list and mapping
types (``!!python/object``, ``!custom``, ...) is refused, and so is a document that expands
through aliases to more values than its text could hold.  :func:`to_plain` then turns the nodes
into plain Python values for the schema (mappings as dicts with text keys, lists as tuples,
scalars through PyYAML's safe constructor), refusing merge keys (``<<``), non-text keys and
duplicate keys on the way.  :func:`node_path` and :func:`show` take a problem back to the node: its
line and the value as written.

Problems here are ``(path, line, message)`` triples; the caller knows the file and decides, from
the path, whether the problem belongs to one entry or to the whole registry.
"""

from __future__ import annotations

from typing import Any, NamedTuple

import yaml

__all__ = ["YamlIssue", "Unreadable", "compose", "to_plain", "node_path", "show", "MAX_NODES", "SHOW"]

_TAG = "tag:yaml.org,2002:"
_ALLOWED_TAGS = frozenset(_TAG + t for t in ("str", "int", "float", "bool", "null", "map", "seq", "timestamp"))
#: Values a document may expand to through aliases (at least its length in characters).
MAX_NODES = 100_000
#: Characters of an offending value quoted in a message.
SHOW = 60

#: libyaml's composer when PyYAML was built with it: the same nodes and marks, four times faster
#: and with a quarter of the transient memory on a 10,000-model registry (17 s and 270 MB there).
_COMPOSER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


class YamlIssue(NamedTuple):
    """A problem found while reading the YAML: where in the document, on which line, what."""

    path: tuple
    line: int | None
    message: str


class Unreadable:
    """A scalar PyYAML's safe constructor cannot build (``!!int ""``, the date 2026-02-30): kept
    as written, it fails every type of the schema and is shown as written."""

    __slots__ = ("text",)

    def __init__(self, text: str):
        self.text = text

    def __repr__(self) -> str:
        return repr(self.text)


def _line(node: yaml.Node) -> int:
    return node.start_mark.line + 1


def compose(text: str) -> tuple[yaml.Node | None, list[YamlIssue]]:
    """The document's root node, or the reasons it cannot be read safely.

    Refused: syntax errors, documents nested too deeply to read, tags outside YAML's standard
    types and documents that expand through aliases beyond ``max(MAX_NODES, len(text))`` values.
    The root is None for an empty document.
    """
    try:
        root = yaml.compose(text, Loader=_COMPOSER)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        detail = " ".join(str(x) for x in (exc.context, exc.problem) if x)
        message = f"YAML syntax error: {detail}; check the indentation, colons and quoting near this line"
        return None, [YamlIssue((), mark.line + 1 if mark is not None else None, message)]
    except yaml.YAMLError as exc:
        return None, [YamlIssue((), None, f"YAML error: {exc}")]
    except RecursionError:
        return None, [_too_deep()]
    if root is None:
        return None, []
    return root, _tag_issues(root, max(MAX_NODES, len(text)))


def _too_deep() -> YamlIssue:
    return YamlIssue((), None, "the YAML is nested too deeply to read; a registry needs at most a few levels")


def _tag_issues(root: yaml.Node, limit: int) -> list[YamlIssue]:
    """Refuse non-standard tags anywhere, and documents that expand beyond ``limit`` values.

    Without aliases every value takes at least one character, so only aliases can exceed a limit
    of the text's length (a registry of 10,000 models holds about 250,000 values in 800,000
    characters).
    """
    issues = []
    stack = [root]
    visited = 0
    while stack:
        node = stack.pop()
        visited += 1
        if visited > limit:
            issues.append(
                YamlIssue(
                    (),
                    _line(root),
                    f"the document expands to more than {limit} values through aliases "
                    "(or an alias refers to itself); write the registry without such anchors",
                )
            )
            break
        if node.tag not in _ALLOWED_TAGS and node.tag != _TAG + "merge":
            issues.append(
                YamlIssue(
                    (),
                    _line(node),
                    f"the tag {node.tag!r} is refused: the registry accepts only plain YAML "
                    "(text, numbers, booleans, dates, lists, mappings), never object-constructing tags; remove the tag",
                )
            )
        if isinstance(node, yaml.MappingNode):
            for key_node, value_node in node.value:
                stack.extend((value_node, key_node))
        elif isinstance(node, yaml.SequenceNode):
            stack.extend(reversed(node.value))
    return sorted(issues, key=lambda i: i.line or 0)


_CONSTRUCTOR = yaml.constructor.SafeConstructor()


def _scalar(node: yaml.ScalarNode) -> Any:
    """The standard Python value of a scalar node (its text for ``str``, the commonest)."""
    if node.tag == _TAG + "str":
        return node.value
    try:
        return _CONSTRUCTOR.yaml_constructors[node.tag](_CONSTRUCTOR, node)
    except Exception:  # noqa: BLE001 - e.g. '!!int ""' raises IndexError inside PyYAML
        return Unreadable(node.value)


def to_plain(root: yaml.Node) -> tuple[Any, list[YamlIssue]]:
    """Plain Python values of a composed document, and the keys that were refused.

    Mappings become dicts (text keys only; a merge key, a non-text key or a second occurrence of a
    key is reported and left out), lists become tuples, scalars their standard Python values
    (:class:`Unreadable` when they cannot be built).
    """
    issues: list[YamlIssue] = []
    try:
        return _plain(root, (), issues), issues
    except RecursionError:
        return None, [_too_deep()]


def _plain(node: yaml.Node, path: tuple, issues: list[YamlIssue]) -> Any:
    if isinstance(node, yaml.MappingNode):
        out: dict[str, Any] = {}
        first: dict[str, int] = {}
        for key_node, value_node in node.value:
            if isinstance(key_node, yaml.ScalarNode) and key_node.tag == _TAG + "merge":
                issues.append(
                    YamlIssue(
                        path + ("<key>",),
                        _line(key_node),
                        "merge keys ('<<') are not supported; write the keys out in full",
                    )
                )
                continue
            if not (isinstance(key_node, yaml.ScalarNode) and key_node.tag == _TAG + "str"):
                issues.append(
                    YamlIssue(
                        path + ("<key>",), _line(key_node), f"keys must be text, got {show(key_node)}; quote the key"
                    )
                )
                continue
            key = key_node.value
            if key in first:
                issues.append(
                    YamlIssue(
                        path + (key,),
                        _line(key_node),
                        f"duplicate key {key!r} (first given on line {first[key]}); keep only one",
                    )
                )
                continue
            first[key] = _line(key_node)
            out[key] = _plain(value_node, path + (key,), issues)
        return out
    if isinstance(node, yaml.SequenceNode):
        return tuple(_plain(item, path + (i,), issues) for i, item in enumerate(node.value))
    return _scalar(node)


def node_path(root: yaml.Node, path: tuple) -> tuple[yaml.Node | None, yaml.Node, int]:
    """Follow ``path`` (keys and list indices) from ``root`` as far as the document goes.

    Returns the key node of the last mapping step (None when the last step was a list index or
    there was none), the node reached, and how many parts of ``path`` were followed.
    """
    key_node, node = None, root
    for depth, part in enumerate(path):
        if isinstance(node, yaml.MappingNode) and isinstance(part, str):
            found = next(
                (
                    (k, v)
                    for k, v in node.value
                    if isinstance(k, yaml.ScalarNode) and k.tag == _TAG + "str" and k.value == part
                ),
                None,
            )
            if found is None:
                return key_node, node, depth
            key_node, node = found
        elif isinstance(node, yaml.SequenceNode) and isinstance(part, int) and 0 <= part < len(node.value):
            key_node, node = None, node.value[part]
        else:
            return key_node, node, depth
    return key_node, node, len(path)


def show(node: yaml.Node) -> str:
    """A node's value for a message ("got ..."), with a note when YAML read a word as a boolean."""
    if isinstance(node, yaml.MappingNode):
        return "a mapping"
    if isinstance(node, yaml.SequenceNode):
        return "a list"
    value = _scalar(node)
    text = repr(value)
    if len(text) > SHOW:
        text = text[: SHOW - 3] + "..."
    # plain style: None (Python composer) or "" (libyaml)
    if isinstance(value, bool) and node.tag == _TAG + "bool" and not node.style:
        text += f" (YAML reads the unquoted word {node.value!r} as a boolean; quote it to mean text)"
    return text
