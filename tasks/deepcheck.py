"""The deep registry check (``fitaudit registry check --deep``): open what the registry names.

The plain check (:func:`fitaudit.tasks.registry.check_registry`) reads only the YAML.  The deep
check also opens every usable source at the as-of date (its dated URI resolved, see
:mod:`fitaudit.tasks.uris`): the files must exist and be readable Parquet, the key, time, value,
exogenous, forecast and filter columns must be there, and a sample of the series the models name
is read and validated against the source's calendar (gaps, off-grid stamps, duplicates, missing
values, absent series).  It imports every user mean function a model names (registering such a
model is code execution, docs/architecture.md §2.1).  Every problem is a
:class:`~fitaudit.tasks.registry.RegistryProblem` in the same ``file:line: field: message`` form.
"""

from __future__ import annotations

import datetime as dt
import os

import numpy as np

from .extracts import ExtractError, read_series
from .registry import ForecastEntry, RegistryError, RegistryProblem, check_registry, load_registry

__all__ = ["deep_check", "SAMPLE"]

#: Series read per source (the first models' series in id order).
SAMPLE = 5

#: Series problems reported against the source's frequency (its calendar).
_CALENDAR_KINDS = ("gap", "off-grid")


def deep_check(path: str | os.PathLike, as_of: dt.date | None = None, sample: int = SAMPLE) -> list[RegistryProblem]:
    """Every problem of a registry file, its sources and its user code, in line order.

    Parameters
    ----------
    path : path-like
        The registry file.
    as_of : date, optional
        The date dated URIs are resolved for and series are read up to (default: today).
    sample : int
        Series read per source.

    Returns
    -------
    list of RegistryProblem
        The plain check's problems, then (when the registry itself is readable) those of its
        sources and mean functions; empty when everything opens and validates.
    """
    problems = list(check_registry(path))
    try:
        reg = load_registry(path)
    except RegistryError:
        return problems  # registry-level problems: the plain check listed them
    as_of = as_of or dt.date.today()
    file = os.fspath(path)
    order = sorted([*(e.line for e in reg.models), *(r.line for r in reg.rejected)], key=lambda n: n or 0)
    index = {line: i for i, line in enumerate(order)}
    for name in sorted(reg.sources):
        source = reg.sources[name]
        models = sorted((m for m in reg.models if m.source == name), key=lambda m: m.id)
        problems += _source_problems(
            file, reg.base_dir, source.for_as_of(as_of), source.line, models, index, as_of, sample
        )
    for m in reg.models:
        function = (m.spec or {}).get("function") if not isinstance(m, ForecastEntry) else None
        if function and ":" in function:  # a user function ("module:attribute"); "setar" is built in
            problems += _function_problem(file, m, index.get(m.line), function)
    return sorted(problems, key=lambda p: p.line or 0)


def _source_problems(file, base_dir, source, line, models, index, as_of, sample) -> list[RegistryProblem]:
    where = f"sources.{source.name}"
    keys = list(dict.fromkeys(m.series for m in models))[:sample] or ["__no_model__"]
    columns = list(
        dict.fromkeys(
            [
                source.value,
                *source.exogenous,
                *source.forecasts,
                *(m.value for m in models),
                *(x for m in models for x in m.exogenous),
            ]
        )
    )
    end = np.datetime64(as_of + dt.timedelta(days=1), "ns") - np.timedelta64(1, "ns")
    try:
        data = read_series(source, keys, columns, end=end, base_dir=base_dir)
    except ExtractError as exc:
        return [RegistryProblem(file, line, f"{where}.uri", str(exc))]
    except OSError as exc:
        return [
            RegistryProblem(
                file,
                line,
                f"{where}.uri",
                f"source {source.name!r}: reading {source.uri!r} failed "
                f"({type(exc).__name__}: {exc}); check that its storage is reachable",
            )
        ]
    out = []
    by_series = {m.series: m for m in models}
    seen = set()
    for key in keys:
        if key not in by_series:
            continue
        for p in data[key].problems:
            if p.kind == "missing-series":
                model = by_series[key]
                out.append(RegistryProblem(file, model.line, f"models[{index.get(model.line)}].series", p.message))
                continue
            field = (
                f"{where}.frequency"
                if p.kind in _CALENDAR_KINDS
                else f"{where}.value"
                if p.column == source.value
                else f"{where}.exogenous"
                if p.column in source.exogenous
                else f"{where}.forecasts"
                if p.column in source.forecasts
                else where
            )
            text = (
                f"{p.message} (series {key!r} of the sample read)" if p.kind not in ("missing-column",) else p.message
            )
            if (field, p.kind, p.column) in seen and p.kind not in _CALENDAR_KINDS:
                continue  # one message per column problem, not one per series
            seen.add((field, p.kind, p.column))
            out.append(RegistryProblem(file, line, field, text))
    return out


def _function_problem(file, model, i, function: str) -> list[RegistryProblem]:
    from fitaudit.core.exceptions import SpecificationError
    from fitaudit.core.models.nonlinear import resolve_function

    try:
        resolve_function(function, f"model {model.id!r}")
    except SpecificationError as exc:
        return [RegistryProblem(file, model.line, f"models[{i}].spec.function", str(exc))]
    return []
