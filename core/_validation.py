"""Declarative parameter validation with one message shape.

Constraints are small objects (:class:`Interval`, :class:`Options`) that can check a value and
describe what is valid.  Messages read:

    The 'alpha' parameter of SimpleExpSmoothing must be a float in the range (0, 1). Got 1.5 instead.

Objects store their constraints in a class attribute ``_parameter_constraints`` and check them
with :func:`validate_params` or :func:`check_param`.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from .exceptions import InputError

__all__ = ["Interval", "Options", "check_param", "validate_params"]


@dataclass(frozen=True)
class Interval:
    """A real (or integer) interval constraint.

    Parameters
    ----------
    kind : type
        ``float`` or ``int``.
    left, right : float or None
        Bounds; ``None`` means unbounded.
    closed : {"both", "left", "right", "neither"}
        Which bounds are included.
    """

    kind: type
    left: float | None
    right: float | None
    closed: str = "both"

    def is_satisfied_by(self, value: Any) -> bool:
        """Return True when ``value`` lies in the interval and has the right kind."""
        if isinstance(value, bool):
            return False
        if self.kind is int and not isinstance(value, numbers.Integral):
            return False
        if not isinstance(value, numbers.Real) or math.isnan(float(value)):
            return False
        v = float(value)
        if self.left is not None:
            if self.closed in ("both", "left"):
                if v < self.left:
                    return False
            elif v <= self.left:
                return False
        if self.right is not None:
            if self.closed in ("both", "right"):
                if v > self.right:
                    return False
            elif v >= self.right:
                return False
        return True

    def describe(self) -> str:
        """Describe the constraint in words, e.g. ``a float in the range (0, 1)``."""
        name = "an int" if self.kind is int else "a float"
        if self.left is None and self.right is None:
            return name
        lb = "[" if self.closed in ("both", "left") else "("
        rb = "]" if self.closed in ("both", "right") else ")"
        left = "-inf" if self.left is None else f"{self.left:g}"
        right = "inf" if self.right is None else f"{self.right:g}"
        if self.left is None:
            lb = "("
        if self.right is None:
            rb = ")"
        return f"{name} in the range {lb}{left}, {right}{rb}"


@dataclass(frozen=True)
class Options:
    """A constraint to a finite set of allowed values."""

    values: tuple

    def __init__(self, values: Iterable):
        object.__setattr__(self, "values", tuple(values))

    def is_satisfied_by(self, value: Any) -> bool:
        """Return True when ``value`` is one of the allowed options."""
        try:
            return value in self.values
        except TypeError:
            return False

    def describe(self) -> str:
        """Describe the options, e.g. ``one of {'a', 'b'}``."""
        return "one of {" + ", ".join(repr(v) for v in self.values) + "}"


def check_param(owner: str, name: str, value: Any, *constraints) -> None:
    """Raise :class:`InputError` unless ``value`` satisfies one of ``constraints``.

    ``None`` in ``constraints`` allows the value None.
    """
    for c in constraints:
        if c is None:
            if value is None:
                return
        elif c.is_satisfied_by(value):
            return
    descr = " or ".join("None" if c is None else c.describe() for c in constraints)
    raise InputError(f"The {name!r} parameter of {owner} must be {descr}. Got {value!r} instead.")


def validate_params(obj: Any, params: dict[str, Any]) -> None:
    """Check ``params`` against ``type(obj)._parameter_constraints``."""
    constraints = getattr(type(obj), "_parameter_constraints", {})
    owner = type(obj).__name__
    for name, value in params.items():
        if name in constraints:
            check_param(owner, name, value, *constraints[name])
