"""A published run's results as pandas DataFrames, for notebooks (``fitaudit.load_results``).

A run folder holds ``results.parquet``, one row per model with the headline numbers of its
verdict and of its production and refit checks (``fitaudit.tasks.outcomes.parquet_row``), next to
``results.json`` (the whole document) and ``manifest.json`` (run id, as-of date, policy, counts,
fingerprints).  :func:`load_results` reads the Parquet file and the manifest only, so loading a
run of 10,000 models takes a fraction of a second; the per-model details (reasons, divergence
maps, history) stay in ``results.json``.  Reading does not verify the archive: ``fitaudit verify``
does.
"""

from __future__ import annotations

import json
import os
import pathlib
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from fitaudit.core.vocabulary import VERDICTS

if TYPE_CHECKING:
    import pandas as pd

__all__ = ["RunResults", "load_results", "CHECKS"]

#: The two checks of an audit, in the order the results list them.
CHECKS: tuple[str, ...] = ("production", "refit")
_COUNTS = ("n", "cells")


@dataclass(frozen=True)
class RunResults:
    """One run's results.

    Attributes
    ----------
    verdicts : pandas.DataFrame
        One row per registered model, sorted by ``model_id``: ``as_of``, ``model_id``,
        ``owner``, ``tier``, ``spec`` (in words), ``verdict`` (categorical, in the order of
        ``fitaudit.core.vocabulary.VERDICTS``), ``movement`` against the previous audit,
        ``escalated`` and ``reason`` (the first reason).
    checks : pandas.DataFrame
        One row per check that was attempted, sorted by ``model_id`` then ``check``
        (``production`` before ``refit``): ``model_id``, ``check``, ``status`` (``ok``,
        ``insufficient`` or ``error``) and, for checks that ran, ``n``, ``cells``, ``t_max``,
        ``r_max`` (largest T over its critical value), ``alpha_max``, ``beta_max``,
        ``p_distribution``, ``p_independence``, ``p_value``, ``p_adjusted``,
        ``effect_divergence`` and ``effect_acf``.
    manifest : dict
        The run's ``manifest.json``: ``run_id``, ``as_of``, ``policy``, ``counts``, inputs'
        fingerprints, package versions and the file list.
    """

    verdicts: pd.DataFrame
    checks: pd.DataFrame
    manifest: dict[str, Any]


def _run_folder(path: str | os.PathLike) -> pathlib.Path:
    folder = pathlib.Path(path)
    if folder.is_file():  # the report's index.html, or any other file of the run
        folder = folder.parent
    if not (folder / "results.parquet").is_file() or not (folder / "manifest.json").is_file():
        raise FileNotFoundError(
            f"{str(folder)!r} is not a published run folder: it needs results.parquet and manifest.json. "
            "Give a folder <archive>/runs/<year>/<run-id>/ (the folder of the report path `fitaudit run` prints)."
        )
    return folder


def load_results(run_folder: str | os.PathLike) -> RunResults:
    """Read a published run's verdicts and checks into pandas DataFrames.

    Parameters
    ----------
    run_folder : path
        The run's folder in the archive, ``<archive>/runs/<year>/<run-id>/``, or a file in it
        (such as the ``index.html`` path that ``fitaudit run`` prints).

    Returns
    -------
    RunResults
        ``verdicts`` (one row per model), ``checks`` (one row per model and check attempted)
        and the run's ``manifest``.

    Raises
    ------
    FileNotFoundError
        When the folder holds no ``results.parquet`` or ``manifest.json``.

    Examples
    --------
    >>> import fitaudit
    >>> run = fitaudit.load_results("archive/runs/2026/20261130T060000Z-1a2b3c")  # doctest: +SKIP
    >>> run.verdicts["verdict"].value_counts(sort=False)  # doctest: +SKIP
    >>> run.checks.query("check == 'production' and p_adjusted <= 0.1")  # doctest: +SKIP
    """
    import pandas as pd
    import pyarrow as pa
    import pyarrow.parquet as pq

    folder = _run_folder(run_folder)
    manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    # integers with gaps (a rejected entry's tier) stay integers: pandas' nullable Int64
    rows = pq.read_table(folder / "results.parquet").to_pandas(types_mapper={pa.int64(): pd.Int64Dtype()}.get)
    prefixes = tuple(f"{kind}_" for kind in CHECKS)
    per_model = [c for c in rows.columns if not c.startswith(prefixes)]
    verdicts = rows[per_model].sort_values("model_id", kind="stable").reset_index(drop=True)
    if "verdict" in verdicts:
        verdicts["verdict"] = pd.Categorical(verdicts["verdict"], categories=VERDICTS, ordered=True)

    parts = []
    for kind in CHECKS:
        columns = {c: c[len(kind) + 1 :] for c in rows.columns if c.startswith(f"{kind}_")}
        part = rows[["model_id", *columns]].rename(columns=columns)
        if "status" not in part:
            continue
        part.insert(1, "check", kind)
        parts.append(part[part["status"].notna()])
    if parts:
        checks = pd.concat(parts, ignore_index=True)
        order = {kind: i for i, kind in enumerate(CHECKS)}
        checks = checks.sort_values(
            ["model_id", "check"], key=lambda s: s.map(order) if s.name == "check" else s, kind="stable"
        )
        checks = checks.reset_index(drop=True)
        for name in _COUNTS:
            if name in checks:
                checks[name] = checks[name].astype("Int64")
    else:
        checks = pd.DataFrame(
            {"model_id": pd.Series(dtype=object), "check": pd.Series(dtype=object), "status": pd.Series(dtype=object)}
        )
    return RunResults(verdicts=verdicts, checks=checks, manifest=manifest)
