"""Registry of model families: readable names to spec classes."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from ..exceptions import InputError, SpecificationError
from ._base import ForecastModel

__all__ = ["FAMILIES", "get_family", "model_from_dict", "as_model"]

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


def as_model(spec: ForecastModel | Mapping[str, Any]) -> ForecastModel:
    """A model spec object from a spec or its dict form (:func:`model_from_dict`).

    Parameters
    ----------
    spec : ForecastModel or mapping
        A spec (returned as is) or ``{"family": name, **hyperparameters}``.

    Returns
    -------
    ForecastModel
    """
    if isinstance(spec, ForecastModel):
        return spec
    if isinstance(spec, Mapping):
        return model_from_dict(spec)
    raise InputError(f"audit_series: spec must be a model spec or a dict with a 'family'; got {type(spec).__name__}.")
