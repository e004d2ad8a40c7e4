"""Dated source URIs and declarative row filters, defined once for the registry and the reader.

A source URI may carry an as-of template, ``exports/{as_of:%Y-%m-%d}/sales.parquet``: the only
field is ``as_of`` (the run's as-of date), formatted with :meth:`datetime.date.__format__`
(``strftime`` codes); literal braces are doubled.  :func:`uri_template_problem` checks a template
when the registry is read and :func:`resolve_uri` fills it in at staging; the manifest records
the resolved URI beside the template.

A source may also keep only some rows: ``filter: [[column, op, value], ...]``, every term must
hold (a conjunction), with the operators of :data:`FILTER_OPS`, the terms of
``pyarrow.parquet.filters_to_expression``.  :func:`filter_expression` converts them to a
``pyarrow.dataset`` expression.
"""

from __future__ import annotations

import datetime as dt
import string
from collections.abc import Sequence
from typing import Any

__all__ = [
    "FILTER_OPS",
    "LIST_OPS",
    "uri_template_problem",
    "is_templated",
    "resolve_uri",
    "filter_term_problem",
    "filter_expression",
    "FILESYSTEMS",
    "SECRET_OPTIONS",
    "is_object_store",
]

#: Comparison operators a row filter term may use (pyarrow.parquet.filters_to_expression's).
FILTER_OPS: tuple[str, ...] = ("=", "==", "!=", "<", "<=", ">", ">=", "in", "not in")

#: Operators whose value is a list.
LIST_OPS: tuple[str, ...] = ("in", "not in")

#: How an object store's URI is opened: pyarrow's own file systems (``arrow``: S3FileSystem, with
#: the AWS SDK's retries of transient errors) or an fsspec file system (``fsspec``: s3fs, gcsfs,
#: adlfs, ... wrapped in pyarrow.fs.FSSpecHandler).
FILESYSTEMS: tuple[str, ...] = ("arrow", "fsspec")

#: Option names whose values are secrets: masked in every view of a source, scrubbed from messages.
SECRET_OPTIONS = frozenset(
    {
        "key",
        "secret",
        "token",
        "password",
        "access_key",
        "secret_key",
        "session_token",
        "aws_access_key_id",
        "aws_secret_access_key",
        "aws_session_token",
        "account_key",
        "sas_token",
        "client_secret",
        "credentials",
    }
)

_PROBE = dt.date(2026, 1, 2)


def is_object_store(uri: str) -> bool:
    """Whether ``uri`` names a file system by scheme (``s3://``, ``gs://``, ...) other than ``file://``."""
    scheme, sep, _ = uri.partition("://")
    return bool(sep) and scheme.lower() != "file"


def _fields(uri: str) -> list[tuple[str, str, str | None]]:
    return [(name, spec or "", conv) for _, name, spec, conv in string.Formatter().parse(uri) if name is not None]


def uri_template_problem(uri: str) -> str | None:
    """What is wrong with the as-of template of ``uri`` (None: a plain URI or a valid template)."""
    try:
        fields = _fields(uri)
    except ValueError as exc:
        return f"the uri's braces are not a valid template ({exc}); write a literal brace as {{{{ or }}}}"
    for name, spec, conv in fields:
        if name != "as_of" or conv is not None:
            return (
                f"the uri template may hold only {{as_of}} or {{as_of:<strftime codes>}}, got "
                f"{{{name}{'!' + conv if conv else ''}}}; "
                "e.g. exports/{as_of:%Y-%m-%d}/sales.parquet (a literal brace is written {{ or }})"
            )
        try:
            format(_PROBE, spec)
        except (ValueError, TypeError) as exc:
            return f"the as-of format {spec!r} is not valid ({exc}); e.g. {{as_of:%Y-%m-%d}}"
    return None


def is_templated(uri: str) -> bool:
    """Whether ``uri`` holds an ``{as_of}`` field (after :func:`uri_template_problem` found none)."""
    return bool(_fields(uri))


def resolve_uri(uri: str, as_of: dt.date) -> str:
    """``uri`` with its ``{as_of}`` fields filled in (``{as_of}`` alone gives ``YYYY-MM-DD``)."""
    return uri.format(as_of=as_of) if is_templated(uri) else uri


def filter_term_problem(term: Any) -> str | None:
    """What is wrong with one ``[column, op, value]`` term (None: valid)."""
    if not isinstance(term, (list, tuple)) or len(term) != 3:
        return "a filter term is a list of three: [column, op, value], e.g. [region, in, [north, south]]"
    column, op, value = term
    if not isinstance(column, str) or not column.strip():
        return f"the column of a filter term must be a column name, got {column!r}"
    if op not in FILTER_OPS:
        return f"the operator {op!r} is not one of {', '.join(repr(o) for o in FILTER_OPS)}"
    scalars = (str, int, float, bool, dt.date)
    if op in LIST_OPS:
        if not isinstance(value, (list, tuple)) or not value or not all(isinstance(v, scalars) for v in value):
            return f"the value of {op!r} must be a non-empty list of values, e.g. [{column}, {op}, [a, b]]"
    elif not isinstance(value, scalars):
        return f"the value of {op!r} must be one value (text, number, boolean or date), got {value!r}"
    return None


def filter_expression(terms: Sequence[Sequence[Any]]):
    """The ``pyarrow.dataset`` expression of a conjunction of ``[column, op, value]`` terms (None: no terms).

    Uses ``pyarrow.parquet.filters_to_expression`` on the list of ``(column, op, value)`` tuples
    (its disjunctive normal form with one conjunction).
    """
    if not terms:
        return None
    import pyarrow.parquet as pq

    return pq.filters_to_expression([(c, op, list(v) if op in LIST_OPS else v) for c, op, v in terms])
