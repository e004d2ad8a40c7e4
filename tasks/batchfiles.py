"""The staged batch files: one ``batch-NNNN.npz`` (the arrays) and ``.json`` (the rest) per batch.

:func:`fitaudit.tasks.batches.stage_inputs` writes them (:func:`write_batch`); the audit, the
candidate search and the refits read them back (:func:`read_batch`, :func:`batch_metadata`).
Reading needs numpy and the registry's entry types only: this module is what a local worker
process imports to read its batch (:mod:`fitaudit.tasks.workers`), so it must not import the
staging module (Prefect, pyarrow, pandas, the archive).
"""

from __future__ import annotations

import json
import pathlib
from collections.abc import Collection
from dataclasses import dataclass, field

import numpy as np

from ._io import json_ready
from .registry import EntryBase, entry_from_dict

__all__ = ["ModelInput", "write_batch", "batch_metadata", "read_batch"]


@dataclass(frozen=True)
class ModelInput:
    """Everything one model's audit needs, read back from a batch file (the registry entry typed).

    ``forecasts`` holds a forecast entry's stated columns by name, aligned with ``y`` (NaN where
    no forecast was stored; issue times as seconds since 1970-01-01 UTC); empty for a model
    fitaudit fits.
    """

    entry: EntryBase
    y: np.ndarray
    time: np.ndarray
    exog: dict
    production: dict | None
    lineage: dict
    problems: tuple
    history: tuple
    forecasts: dict = field(default_factory=dict)

    @property
    def model_id(self) -> str:
        """The model entry's id."""
        return self.entry.id


def write_batch(path: pathlib.Path, inputs: list[dict], arrays: dict[str, np.ndarray]) -> None:
    """Write one batch: ``arrays`` to ``path``'s ``.npz`` and ``inputs`` (one JSON-ready dict per
    model) to its ``.json``.

    The arrays are packed one flat buffer per dtype with an index of their names, places and
    shapes (:func:`_pack`): as one ``.npz`` member each, a batch of 125 models took 20 ms to write
    and 30-40 ms to read back, about a third of a millisecond per model (measured).
    """
    np.savez(path.with_suffix(".npz"), **_pack(arrays))
    # keys keep their order (no canonical sorting): the order of a NonlinearAR spec's ``start``
    # is the order of theta handed to the user's mean function; no indent, so that json writes with
    # its C encoder (a work file; the 1,000 models of the bench fleet 54 to 16 ms)
    text = json.dumps(json_ready(inputs), ensure_ascii=False, allow_nan=False)
    path.with_suffix(".json").write_bytes(text.encode("utf-8"))


def _pack(arrays: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """``arrays`` as one flat buffer per dtype (``buffer-K``) and their index: ``names``, the
    ``buffer`` each is in, and their ``start`` and ``shape`` (padded with -1 to the largest number
    of dimensions).  :func:`_unpack` gives the same arrays back.

    >>> packed = _pack({"0/y": np.arange(3.0), "0/t": np.array(["2026-01-01"], "datetime64[D]")})
    >>> sorted(packed), [a.dtype.str for k, a in sorted(packed.items()) if k.startswith("buffer-")]
    (['buffer', 'buffer-0', 'buffer-1', 'names', 'shape', 'start'], ['<f8', '<M8[D]'])
    >>> {k: v.tolist() for k, v in _unpack(packed).items()}
    {'0/y': [0.0, 1.0, 2.0], '0/t': [datetime.date(2026, 1, 1)]}
    """
    values = [np.asarray(a) for a in arrays.values()]
    kinds = list(dict.fromkeys(a.dtype.str for a in values))  # one buffer per dtype, in order of first use
    which = [kinds.index(a.dtype.str) for a in values]
    start, filled = [], [0] * len(kinds)
    for a, k in zip(values, which):
        start.append(filled[k])
        filled[k] += a.size
    shape = np.full((len(values), max([a.ndim for a in values] + [1])), -1, dtype=np.int64)
    for row, a in enumerate(values):
        shape[row, : a.ndim] = a.shape
    out = {
        f"buffer-{k}": np.concatenate([a.ravel() for a, w in zip(values, which) if w == k]) for k in range(len(kinds))
    }
    out.update(
        names=np.array(list(arrays), dtype=str),
        buffer=np.array(which, dtype=np.int64),
        start=np.array(start, dtype=np.int64),
        shape=shape,
    )
    return out


def _unpack(data) -> dict[str, np.ndarray]:
    """The arrays of :func:`_pack` (``data``: its dict, or the loaded ``.npz``), each a view of its buffer."""
    buffers = {name: data[name] for name in data if name.startswith("buffer-")}
    out = {}
    for name, k, first, dims in zip(
        data["names"].tolist(), data["buffer"].tolist(), data["start"].tolist(), data["shape"].tolist()
    ):
        dims = tuple(d for d in dims if d >= 0)
        size = int(np.prod(dims, dtype=np.int64))
        out[name] = buffers[f"buffer-{k}"][first : first + size].reshape(dims)
    return out


def _indexed_metadata(path: pathlib.Path, model_ids: Collection[str] | None) -> list[tuple[int, dict]]:
    """``(position in the batch, metadata)`` of the batch's models, only those in ``model_ids``
    when given (their entries are typed; the others' are not even parsed)."""
    meta = json.loads(path.with_suffix(".json").read_text())
    wanted = None if model_ids is None else set(model_ids)
    return [
        (i, {**m, "entry": entry_from_dict(m["entry"])})
        for i, m in enumerate(meta)
        if wanted is None or m["entry"]["id"] in wanted
    ]


def batch_metadata(path: str | pathlib.Path, model_ids: Collection[str] | None = None) -> list[dict]:
    """The JSON part of a staged batch (entries, production versions, lineage, problems), no data;
    each ``entry`` is the typed registry entry again (:func:`fitaudit.tasks.registry.entry_from_dict`).
    With ``model_ids``, only those models, in batch order."""
    return [m for _, m in _indexed_metadata(pathlib.Path(path), model_ids)]


def read_batch(path: str | pathlib.Path, model_ids: Collection[str] | None = None) -> list[ModelInput]:
    """Read a staged batch back as :class:`ModelInput` objects; with ``model_ids``, only those
    models, in batch order (the others' arrays are not loaded: the candidate search wants a few
    models of each batch)."""
    path = pathlib.Path(path)
    meta = _indexed_metadata(path, model_ids)
    with np.load(path.with_suffix(".npz"), allow_pickle=False) as loaded:
        data = _unpack(loaded)
        out = []
        for i, m in meta:
            exog = {name: data[f"{i}/x/{j}"] for j, name in enumerate(m["exog_names"])}
            stated = {name: data[f"{i}/f/{j}"] for j, name in enumerate(m.get("forecast_names", ()))}
            out.append(
                ModelInput(
                    entry=m["entry"],
                    y=data[f"{i}/y"],
                    time=data[f"{i}/t"],
                    exog=exog,
                    production=m["production"],
                    lineage=m["lineage"],
                    problems=tuple(m["problems"]),
                    history=tuple(m["history"]),
                    forecasts=stated,
                )
            )
    return out
