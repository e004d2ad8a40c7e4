"""Staging: one scan per source, per-model inputs written to batch files for the audit tasks.

The audit flow never passes extracts between tasks.  :func:`stage_inputs` scans each source once
(filter push-down on the series keys and the time range the windows need), cuts every model's
fit window ending at the as-of date, attaches what the audit needs (production parameter version,
earlier verdicts, lineage, data problems) and writes one ``batch-NNNN.npz`` file per batch of
models from the same source.  Audit tasks receive only the path.  Memory stays bounded by one
source's requested rows at a time.
"""

from __future__ import annotations

import datetime as dt
import json
import math
import pathlib
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np
from prefect import task
from prefect.cache_policies import NO_CACHE

from fitaudit.core.models import model_from_dict

from ._io import json_ready
from .archive import ProductionSnapshot, production_snapshot
from .batchfiles import write_batch
from .extracts import (
    ExtractError,
    ExtractFingerprint,
    FingerprintCache,
    fingerprint_source,
    read_series,
    series_problems,
)
from .frequencies import FREQUENCY_DAYS, periods_after
from .memory import release_freed_memory, small_pages
from .params import ParameterStoreError, production_version
from .registry import EntryBase, ForecastEntry, ModelEntry, Registry

__all__ = [
    "BatchRef",
    "StagedRun",
    "stage_inputs",
    "stage_inputs_task",
    "batch_size_for",
    "ROW_KINDS",
    "STALE",
]

#: Problems about individual rows: re-checked on the model's own window (a flaw before it does not
#: stop the audit).  Every other problem (a missing or mistyped column, mixed time zones, rows
#: without a timestamp) concerns the series as a whole and is kept as the reader found it.
ROW_KINDS = frozenset({"duplicate-time", "unsorted", "off-grid", "gap", "non-finite", "missing-exogenous"})

#: The fingerprint cache of an archive (private, like ``.staging``; never part of a run).
FINGERPRINT_CACHE = ".fingerprints/cache.json"

#: A series (or a whole source) whose last observation lags the as-of date by more than its
#: source's ``max_staleness`` periods.
STALE = "stale"

#: A forecast entry's stated forecast missing for an observation of the audit window.
MISSING_FORECAST = "missing-forecast"


@dataclass(frozen=True)
class BatchRef:
    """A staged batch: its file and the ids of its models."""

    path: str
    model_ids: tuple


@dataclass(frozen=True)
class StagedRun:
    """Result of staging: batches, fingerprints per source and source-level failures."""

    batches: tuple
    fingerprints: dict
    source_errors: dict = field(default_factory=dict)
    production: dict = field(
        default_factory=dict
    )  # ProductionSnapshot.to_dict(): the versions staged, for the manifest
    #: Sources some of whose series were too stale to audit, by name: the resolved ``uri``, the
    #: source's ``last`` timestamp, the ``as_of`` date, the ``frequency``, the periods ``allowed``
    #: and the ``models`` judged insufficient for it (the run page lists each source once).
    stale_sources: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """JSON-ready view."""
        return {
            "batches": [{"path": b.path, "model_ids": list(b.model_ids)} for b in self.batches],
            "fingerprints": {k: v for k, v in self.fingerprints.items()},
            "source_errors": dict(self.source_errors),
            "production": dict(self.production),
            "stale_sources": {k: dict(v) for k, v in self.stale_sources.items()},
        }


def batch_size_for(n_models: int, workers: int = 1, requested: int = 0) -> int:
    """Models per task: ``requested`` if set, else enough models that a task does seconds of work.

    Rule (docs/architecture.md §5): at most a few dozen tasks per run and at least ``4 * workers``
    tasks when there are enough models, a multiple of ``workers`` (so that every worker gets the
    same number of batches: with 5 batches on 2 workers one of them audits 3); batches of 25 to
    200 models.
    """
    if requested > 0:
        return requested
    workers = max(workers, 1)
    target_tasks = workers * math.ceil(max(4 * workers, math.ceil(n_models / 200)) / workers)
    return int(min(200, max(25, math.ceil(n_models / target_tasks))))


def _end_of_day(as_of: dt.date) -> np.datetime64:
    return np.datetime64(as_of + dt.timedelta(days=1), "ns") - np.timedelta64(1, "ns")


def _production(
    archive_root: pathlib.Path | None, entry: EntryBase, snapshot: ProductionSnapshot | None = None
) -> dict | None:
    """The production parameter version (from the run's ``snapshot``), or an ``error`` note when it
    cannot be used; None for a forecast entry (fitaudit holds no parameters of it)."""
    if archive_root is None or isinstance(entry, ForecastEntry):
        return None
    try:
        if snapshot is None:
            version = production_version(archive_root, entry.id)
        elif entry.id in snapshot.errors:
            raise ParameterStoreError(snapshot.errors[entry.id])
        else:
            version = snapshot.versions.get(entry.id)
    except (ParameterStoreError, OSError, ValueError) as exc:
        return {
            "error": (
                f"model {entry.id!r}: its parameter store cannot be read ({exc}); run `fitaudit verify` on the archive."
            )
        }
    if version is None:
        return None
    out = {
        "version": version.version,
        "sha256": version.sha256,
        "created_at": version.created_at,
        "params": dict(version.params),
        "noise": dict(version.noise),
        "spec": dict(version.spec),
    }
    if not _same_spec(version.spec, entry.spec):
        out["error"] = (
            f"model {entry.id!r}: production parameter version {version.version} was fitted for spec "
            f"{json.dumps(json_ready(version.spec), sort_keys=True)}, but the registry now says "
            f"{json.dumps(json_ready(entry.spec), sort_keys=True)}; refit and promote a version for the new spec "
            f"(`fitaudit refit --model {entry.id}`)."
        )
    return out


def _same_spec(a: dict, b: dict) -> bool:
    """Whether two spec dicts describe the same model (defaults filled in by the model class).

    Specs with the same JSON text need no models built (the usual case: the stored version's spec
    is the registry's, whose model the registry built when it was loaded; 0.1 s of staging for
    1,000 models).
    """
    try:
        if json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True):
            return True
    except (TypeError, ValueError):  # not plain JSON: compare the models
        pass
    try:
        return json_ready(model_from_dict(dict(a)).to_dict()) == json_ready(model_from_dict(dict(b)).to_dict())
    except Exception:  # an unreadable stored spec is a mismatch, reported by the caller
        return False


def _lineage(entry: EntryBase, fp: ExtractFingerprint | None, time: np.ndarray, n_loaded: int) -> dict:
    def iso(t):
        return str(np.datetime_as_string(t, unit="s")) if t is not None else None

    if isinstance(entry, ForecastEntry):
        return {
            "source": entry.source,
            "series": entry.series,
            "value": entry.value,
            "forecast_columns": entry.forecasts.columns(),
            "extract_digest": fp.digest if fp is not None else None,
            "extract_rows": fp.rows if fp is not None else None,
            "extract_files": len(fp.files) if fp is not None else None,
            "rows_loaded": int(n_loaded),
            "first": iso(time[0]) if time.size else None,
            "last": iso(time[-1]) if time.size else None,
            "history_window": entry.staged_window - entry.audit_window,
            "audit_window": entry.audit_window,
            "audit_first": iso(time[-entry.audit_window]) if time.size >= entry.audit_window else None,
        }
    return {
        "source": entry.source,
        "series": entry.series,
        "value": entry.value,
        "exogenous": list(entry.exogenous),
        "extract_digest": fp.digest if fp is not None else None,
        "extract_rows": fp.rows if fp is not None else None,
        "extract_files": len(fp.files) if fp is not None else None,
        "rows_loaded": int(n_loaded),
        "first": iso(time[0]) if time.size else None,
        "last": iso(time[-1]) if time.size else None,
        "fit_window": entry.fit_window,
        "audit_window": entry.audit_window,
        "audit_first": iso(time[-entry.audit_window]) if time.size >= entry.audit_window else None,
    }


def stage_inputs(
    registry: Registry,
    as_of: dt.date,
    staging_dir: str | pathlib.Path,
    *,
    archive_root: str | pathlib.Path | None = None,
    histories: dict[str, Sequence[dict]] | None = None,
    model_ids: Iterable[str] | None = None,
    batch_size: int = 0,
    workers: int = 1,
    os_errors: str = "raise",
    series_per_scan: int = 1000,
    on_batch: Callable[[BatchRef, list[tuple[EntryBase, dict]]], object] | None = None,
) -> StagedRun:
    """Scan every source once and write batch files of per-model inputs.

    Parameters
    ----------
    registry : Registry
    as_of : date
        Data up to the end of this day are used; each model gets its last ``fit`` observations.
    staging_dir : path
        Where the batch files go (a private folder of the run).
    archive_root : path, optional
        Archive holding the parameter store (production versions).
    histories : dict, optional
        Earlier audits per model id (oldest first), attached to each input.
    model_ids : iterable of str, optional
        Audit only these models (default: every accepted model).
    batch_size, workers : int
        See :func:`batch_size_for`.
    os_errors : {"raise", "record"}
        An ``OSError`` while reading a source (possibly transient: a network file system, an
        object store) is raised by default, so that the Prefect task retries the staging; with
        ``"record"`` it becomes an ``error`` for every model of that source.  Permanent problems
        (``ExtractError``: missing path, corrupt file, missing columns) are always recorded.
    series_per_scan : int
        A large source is read in filtered scans of about this many series (whole batches each),
        so that staging never holds every series of the fleet (a scan of 1,000 daily series of two
        years raised the resident memory by about 90 MB, most of it pyarrow's read buffers).
    on_batch : callable, optional
        Called with each batch once its file is written, and its models' ``(entry, metadata)``
        pairs (the metadata as written): the run's null tables begin there
        (:class:`fitaudit.tasks.audit.EarlyTables`).
    """
    staging = pathlib.Path(staging_dir)
    staging.mkdir(parents=True, exist_ok=True)
    archive = pathlib.Path(archive_root) if archive_root is not None else None
    wanted = set(model_ids) if model_ids is not None else None
    entries = [m for m in registry.models if wanted is None or m.id in wanted]
    size = batch_size_for(len(entries), workers, batch_size)
    end = _end_of_day(as_of)
    histories = histories or {}
    # one snapshot of the production versions for the whole run, read under the archive lock
    # (forecast entries have no parameters: fitaudit fits nothing of them)
    fitted = [e.id for e in entries if isinstance(e, ModelEntry)]
    snapshot = production_snapshot(archive, fitted) if archive is not None else None
    by_source: dict[str, list[EntryBase]] = {}
    for e in sorted(entries, key=lambda e: e.id):
        by_source.setdefault(e.source, []).append(e)

    batches: list[BatchRef] = []
    fingerprints: dict[str, dict] = {}
    # digests of source files already hashed, by version (path, size, modification time)
    cache = FingerprintCache(archive / FINGERPRINT_CACHE) if archive is not None else None
    source_errors: dict[str, str] = {}
    stale_sources: dict[str, dict] = {}
    for source_name in sorted(by_source):
        template = registry.sources[source_name]
        source = template.for_as_of(as_of)  # a dated export: the as-of date's folder or file
        models = by_source[source_name]
        allowed = source.periods_allowed(registry.policy.max_staleness_days, end)
        # the windows, plus the periods the source may lag behind the as-of date
        span_days = FREQUENCY_DAYS.get(source.frequency, 31) * (max(m.staged_window for m in models) + 2 + allowed) + 2
        start = end - np.timedelta64(int(math.ceil(span_days * 86400)), "s")
        stated = [m.forecasts.columns() for m in models if isinstance(m, ForecastEntry)]
        columns = sorted(
            {m.value for m in models}
            | {x for m in models for x in m.exogenous}
            | {c for cols in stated for c in cols.values()}
        )
        times = sorted({cols["issued"] for cols in stated if "issued" in cols})
        fp = None
        io_errors = (
            "raise" if os_errors == "raise" else "skip"
        )  # raised: the task retries; after retries: files skipped and named
        group = size * max(1, series_per_scan // size)  # whole batches per scan
        for chunk_start in range(0, len(models), size):
            chunk = models[chunk_start : chunk_start + size]
            if chunk_start % group == 0:  # the next group of series: one filtered scan
                data = None
                try:
                    if fp is None and source_name not in source_errors:
                        fp = fingerprint_source(source, registry.base_dir, io_errors=io_errors, cache=cache)
                        fingerprints[source_name] = fp.to_dict()
                        if source is not template:  # the manifest keeps the template beside the resolved uri
                            fingerprints[source_name]["uri_template"] = template.uri
                    if source_name not in source_errors:
                        wanted = sorted({m.series for m in models[chunk_start : chunk_start + group]})
                        data = read_series(
                            source,
                            wanted,
                            columns,
                            start=start,
                            end=end,
                            base_dir=registry.base_dir,
                            io_errors=io_errors,
                            times=times,
                        )
                except ExtractError as exc:
                    source_errors[source_name] = str(exc)
                except OSError as exc:
                    if os_errors == "raise":
                        raise
                    source_errors[source_name] = (
                        f"reading source {source_name!r} failed after retries ({type(exc).__name__}: {exc}); check "
                        "that its storage is reachable"
                    )
                data = data or {}
            metas, arrays = [], {}
            for i, entry in enumerate(chunk):
                meta, y, t, exog = _model_input(
                    entry,
                    data.get(entry.series),
                    source_errors.get(source_name),
                    fp,
                    archive,
                    source.frequency,
                    snapshot,
                    holidays=source.holidays,
                    end=end,
                    max_staleness=allowed,
                )
                meta["history"] = [dict(h) for h in histories.get(entry.id, ())]
                if any(p["kind"] == STALE for p in meta["problems"]):
                    stale = stale_sources.setdefault(
                        source_name,
                        {
                            "uri": source.uri,
                            "last": fp.time_max if fp is not None else None,
                            "as_of": as_of.isoformat(),
                            "frequency": source.frequency,
                            "allowed": allowed,
                            "models": [],
                        },
                    )
                    stale["models"].append(entry.id)
                arrays[f"{i}/y"] = y
                arrays[f"{i}/t"] = t
                for j, name in enumerate(meta["exog_names"]):
                    arrays[f"{i}/x/{j}"] = exog[name]
                for j, name in enumerate(meta.get("forecast_names", ())):
                    arrays[f"{i}/f/{j}"] = exog[name]
                metas.append(meta)
            path = staging / f"batch-{len(batches) + 1:04d}"
            write_batch(path, metas, arrays)
            batches.append(BatchRef(str(path), tuple(e.id for e in chunk)))
            if on_batch is not None:
                on_batch(batches[-1], list(zip(chunk, metas)))
        del data
        if cache is not None:
            cache.save()
    return StagedRun(
        tuple(batches),
        fingerprints,
        source_errors,
        snapshot.to_dict() if snapshot is not None else {},
        stale_sources,
    )


def _model_input(
    entry: EntryBase,
    series,
    source_error: str | None,
    fp,
    archive,
    frequency: str,
    snapshot=None,
    holidays: tuple = (),
    end: np.datetime64 | None = None,
    max_staleness: int | None = None,
) -> tuple[dict, np.ndarray, np.ndarray, dict]:
    """Cut one model's fit window and collect its problems.

    The reader validated the whole span it loaded; when it found problems, the rows of the model's
    own window are validated again so that a flawed row outside the window does not stop the
    audit (problems of the whole series, :data:`ROW_KINDS` aside, are kept).  A series whose last
    observation lags the as-of date (``end``, its last instant) by more than ``max_staleness``
    periods of ``frequency`` gets a ``stale`` (insufficient) problem instead of a length problem.
    """
    empty_t = np.array([], dtype="datetime64[ns]")
    problems: list[dict] = []
    production = _production(archive, entry, snapshot)
    if source_error is not None:
        problems.append(
            {"kind": "unreadable-source", "severity": "error", "message": f"model {entry.id!r}: {source_error}"}
        )
    if source_error is None and end is not None and max_staleness is not None:
        if series is not None and series.time.size:
            last, whose = series.time[-1], f"series {entry.series!r}"
        else:  # nothing in the span read: the source's own last timestamp
            last, whose = (np.datetime64(fp.time_max, "ns") if fp is not None and fp.time_max else None), "the source"
        stale = None if last is None else _stale(entry, last, whose, end, frequency, holidays, max_staleness)
        if stale is not None:
            problems.append(stale)
            series = None  # the length and gap checks of the stale span would only repeat it
    if series is None:
        meta = {
            "entry": entry.to_dict(),
            "exog_names": [],
            "production": production,
            "problems": problems,
            "lineage": _lineage(entry, fp, empty_t, 0),
        }
        return meta, np.array([]), empty_t, {}
    stated = entry.forecasts.columns() if isinstance(entry, ForecastEntry) else {}
    columns = [entry.value, *entry.exogenous, *dict.fromkeys(stated.values())]
    found = list(series.problems_for(columns))
    time = series.time
    n_loaded = time.size
    keep = slice(max(0, n_loaded - entry.staged_window), n_loaded)
    t = time[keep]
    y = np.asarray(series.columns.get(entry.value, np.full(n_loaded, np.nan)), dtype=float)[keep]
    exog = {
        name: np.asarray(series.columns.get(name, np.full(n_loaded, np.nan)), dtype=float)[keep]
        for name in entry.exogenous
    }
    forecast_arrays = {
        name: np.asarray(series.columns.get(name, np.full(n_loaded, np.nan)), dtype=float)[keep]
        for name in dict.fromkeys(stated.values())
    }
    if found and n_loaded:
        kept = [
            p for p in found if p.kind not in ROW_KINDS
        ]  # missing or mistyped columns, time-zone mix, rows without time
        flagged = {p.column for p in kept if p.column is not None}
        window = {c: v for c, v in {entry.value: y, **exog}.items() if c not in flagged}
        found = kept + list(
            series_problems(
                entry.series,
                t,
                window,
                frequency,
                source=entry.source,
                exogenous=tuple(entry.exogenous),
                holidays=holidays,
            )
        )
    short = series.length_problem(entry.audit_window if stated else entry.staged_window)
    if short is not None and not any(p.severity == "error" for p in found):
        found.append(short)
    for p in found:
        problems.append({"kind": p.kind, "severity": p.severity, "message": f"model {entry.id!r}: {p.message}"})
    if stated:
        flagged = {p.column for p in found if p.column is not None}
        problems += _missing_forecasts(entry, t, forecast_arrays, stated, flagged)
    if n_loaded == 0 and not problems:
        problems.append(
            {
                "kind": "no-data",
                "severity": "insufficient",
                "message": (
                    f"model {entry.id!r}: no observations of series {entry.series!r} in source "
                    f"{entry.source!r} on or before the as-of date."
                ),
            }
        )
    meta = {
        "entry": entry.to_dict(),
        "exog_names": list(entry.exogenous),
        "production": production,
        "problems": problems,
        "lineage": _lineage(entry, fp, t, n_loaded),
    }
    if stated:
        meta["forecast_names"] = list(forecast_arrays)
        exog = {**exog, **forecast_arrays}
    return meta, y, t, exog


def _stale(
    entry: EntryBase, last: np.datetime64, whose: str, end: np.datetime64, frequency: str, holidays: tuple, allowed: int
) -> dict | None:
    """The ``stale`` problem of a last observation more than ``allowed`` periods before ``end``."""
    late = periods_after(frequency, last, end, holidays)
    if late <= allowed:
        return None
    as_of = str(np.datetime64(end, "D"))
    stamp = np.datetime64(last, "s")
    shown = str(np.datetime64(last, "D")) if stamp == np.datetime64(last, "D") else str(stamp)
    return {
        "kind": STALE,
        "severity": "insufficient",
        "message": (
            f"model {entry.id!r}: source {entry.source!r} is stale: the last observation of {whose} is {shown}, "
            f"{late} period(s) of frequency {frequency!r} before the as-of date {as_of} (at most {allowed} allowed by "
            "max_staleness). Fix: refresh the extract up to the as-of date, audit at an earlier as-of date (--as-of), "
            "or raise the source's max_staleness (periods) or the policy's max_staleness_days."
        ),
    }


def _missing_forecasts(entry: ForecastEntry, t: np.ndarray, arrays: dict, stated: dict, flagged: set) -> list[dict]:
    """An ``error`` problem for each stated column with no forecast (NaN or infinite) for an
    observation of the audit window; issue times are checked by the audit (they may be missing
    only where the forecasts are).  Columns already reported (missing, mistyped) are skipped."""
    out = []
    w = entry.audit_window
    if t.size < w:
        return out  # too short: the length problem says so
    for what, column in stated.items():
        if what == "issued" or column in flagged:
            continue
        bad = np.flatnonzero(~np.isfinite(arrays[column][-w:]))
        if bad.size:
            first = str(np.datetime_as_string(t[-w:][bad[0]], unit="s"))
            out.append(
                {
                    "kind": MISSING_FORECAST,
                    "severity": "error",
                    "message": (
                        f"model {entry.id!r}: source {entry.source!r}, series {entry.series!r}: column {column!r} (the "
                        f"{what}) has no forecast for {bad.size} of the {w} observations of the audit window, first "
                        f"{first}; every audited observation needs the forecast issued before it. Fix: fill the "
                        "forecast store for those times, or shorten the audit window to the stretch that has forecasts."
                    ),
                }
            )
    return out


def _retry_transient(task, task_run, state) -> bool:
    """Retry only I/O errors (``OSError``), not validation problems."""
    try:
        state.result()
    except OSError:
        return True
    except Exception:
        return False
    return False


@task(
    name="stage-extracts",
    retries=2,
    retry_delay_seconds=3,
    retry_condition_fn=_retry_transient,
    cache_policy=NO_CACHE,
    persist_result=False,
)
def stage_inputs_task(registry: Registry, as_of: dt.date, staging_dir: str, **kwargs) -> StagedRun:
    """Prefect task: one scan per source, batch files out (retried for transient I/O errors).

    The scans' buffers come in small pages (:func:`~fitaudit.tasks.memory.small_pages`: staging
    the benchmark fleet took 0.97-1.35 s in huge pages on a microVM, 0.57-0.61 s in small ones), and
    afterwards the freed ones go back to the system (:func:`release_freed_memory`: pyarrow's pool
    keeps about 110 MB per 1,000 daily series otherwise, for the rest of the run)."""
    try:
        with small_pages():
            return stage_inputs(registry, as_of, staging_dir, **kwargs)
    finally:
        release_freed_memory()
