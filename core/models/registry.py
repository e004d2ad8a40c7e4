"""Registry of model families: readable names to spec classes."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from ..exceptions import SpecificationError
from ._base import ForecastModel

__all__ = ["FAMILIES", "get_family", "model_from_dict"]

FAMILIES: dict[str, type[ForecastModel]] = {}


def _register(cls: type[ForecastModel]) -> type[ForecastModel]:
    FAMILIES[cls.family] = cls
    return cls


def get_family(name: str) -> type[ForecastModel]:
    """The spec class registered under ``name``; an unknown name lists the valid ones."""
    try:
        return FAMILIES[name]
    except KeyError:
        raise SpecificationError(
            f"Unknown model family {name!r}; valid families are {', '.join(repr(k) for k in sorted(FAMILIES))}."
        ) from None


def model_from_dict(spec: Mapping[str, Any]) -> ForecastModel:
    """Build a spec from ``{"family": name, **hyperparameters}`` (the inverse of ``to_dict``)."""
    if "family" not in spec:
        raise SpecificationError(f"A model spec needs a 'family' key; got keys {sorted(spec)}.")
    cls = get_family(spec["family"])
    kwargs = {k: v for k, v in spec.items() if k != "family"}
    try:
        return cls(**kwargs)
    except TypeError as exc:
        raise SpecificationError(f"Invalid hyperparameters for family {spec['family']!r}: {exc}.") from None
