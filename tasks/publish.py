"""Publishing a run: results twins, report pages and manifest into the archive; history back out.

A run folder holds ``results.json`` (the document, deterministic), ``results.parquet`` (one row
per model), the HTML pages rendered from the document, and ``manifest.json`` (hashes, inputs'
fingerprints, versions, seeds, timings), written through :class:`~fitaudit.tasks.archive.RunWriter`,
which makes the run visible only when complete and links it into the hash chain.
:func:`load_history` reads earlier verdicts back from the archive for trends and persistence.

The audit flow never holds the whole document or every page: :func:`render_outcomes_task` (one
call per batch, in parallel) turns a batch's outcomes into records, writes each record's canonical
JSON and its model page to the run's work folder and keeps only a light record per model
(:func:`fitaudit.tasks.outcomes.render_outcomes`; the shapes of a model's outcome are all in
:mod:`fitaudit.tasks.outcomes`); :func:`publish_staged` then streams ``results.json`` from those
pieces and renders the run page from the light records.  The files are byte for byte
``canonical_json(doc)`` and ``render_run(doc, meta)`` of the full document
(tests/test_optimisations.py).
"""

from __future__ import annotations

import datetime as dt
import getpass
import importlib.metadata
import os
import pathlib
import platform
import socket
import subprocess
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq
from prefect import get_run_logger, task
from prefect.cache_policies import NO_CACHE

from ._io import sha256_bytes, write_replacing
from .archive import PublishedRun, chain_head, history_runs, list_runs, open_run, read_chain
from .outcomes import (
    HISTORY_COLUMNS,
    StagedRecord,
    history_row,
    parquet_bytes,
    render_pickled,
    results_rows,
    staged_bytes,
)
from .results import results_json_chunks
from .workers import run_local

__all__ = [
    "render_outcomes_task",
    "publish_staged",
    "publish_task",
    "load_history",
    "history_task",
    "History",
    "package_versions",
    "code_commit",
    "render_archive_index_file",
    "run_context",
    "context_task",
    "HISTORY_LENGTH",
    "TREND_LENGTH",
]

HISTORY_LENGTH = 7  # earlier audits kept per model (the report shows these plus the current one)
TREND_LENGTH = 7  # earlier full audits in the run page's fleet trend (plus the current one)


def package_versions() -> dict:
    """Versions of fitaudit and the libraries whose behaviour the results depend on."""
    out = {"python": platform.python_version()}
    for name in ("fitaudit", "numpy", "scipy", "pyarrow", "pandas", "prefect", "jinja2", "pyyaml"):
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = None
    return out


def code_commit() -> str | None:
    """The git commit of the installed source tree, when it is a checkout (editable install)."""
    here = pathlib.Path(__file__).resolve().parent
    try:
        out = subprocess.run(
            ["git", "-C", str(here), "rev-parse", "HEAD"], capture_output=True, text=True, timeout=5, check=False
        )
    except (OSError, subprocess.SubprocessError):
        return None
    return out.stdout.strip() or None if out.returncode == 0 else None


def operator_identity(configured: str = "") -> str:
    """Who ran the audit: the configured operator/service account, else user@host."""
    if configured:
        return configured
    try:
        user = getpass.getuser()
    except (KeyError, OSError):
        user = "unknown"
    return f"{user}@{socket.gethostname()}"


@task(name="render-pages", cache_policy=NO_CACHE, persist_result=False)
def render_outcomes_task(
    outcomes: bytes,
    head: dict,
    meta: dict,
    folder: str,
    name: str,
    spilled: str | None = None,
    workers: str | None = None,
) -> list[StagedRecord]:
    """Prefect task: records and model pages of one batch (in the local worker processes named
    by ``workers``, when given); returns the staged records.

    ``outcomes`` is the pickled list of the batch's final outcomes: Prefect walks lists and
    dataclasses among task inputs (slow for thousands of results), and prefect-dask reshapes inputs
    wrapped in ``quote``; bytes pass through both untouched.
    """
    return run_local(workers, render_pickled, outcomes, head, meta, folder, name, spilled)


def publish_staged(
    archive_root: str | os.PathLike,
    head: Mapping[str, Any],
    summary: Mapping[str, Any],
    staged: Sequence[StagedRecord],
    meta: Mapping[str, Any],
    manifest: dict,
    *,
    run_id: str,
) -> PublishedRun:
    """Publish a run whose records and model pages were staged (:func:`~fitaudit.tasks.outcomes.stage_records`).

    Writes the run folder of the document ``head`` + ``summary`` + the records (sorted by id):
    ``results.json`` streamed from the staged pieces, ``results.parquet`` and the run page from
    the light records, the staged model pages, ``method.html`` and the manifest.
    """
    from .report import page_context, render_index_page, render_method_page

    ordered = sorted(staged, key=lambda r: r.light["id"])
    doc = {**head, "summary": dict(summary), "models": [r.light for r in ordered]}
    context = page_context(head, meta)
    pages = {"index.html": render_index_page(doc, context), "method.html": render_method_page(doc, context)}
    pages.update({f"models/{r.light['safe_id']}.html": r.page for r in ordered})
    as_of = dt.date.fromisoformat(head["run"]["as_of"])
    writer = open_run(archive_root, run_id, as_of.year, as_of=as_of)
    with writer:
        writer.write_chunks("results.json", results_json_chunks(head, summary, staged_bytes(ordered)))
        writer.write_bytes("results.parquet", parquet_bytes(results_rows(doc)))
        for rel, data in sorted(pages.items()):
            if isinstance(data, bytes):
                writer.write_bytes(rel, data)
            else:  # a page the workers staged in the run's work folder, finished
                writer.write_file(rel, data)
        published = writer.finish(dict(manifest, run_id=run_id, as_of=as_of.isoformat()))
    return published


# never retried: a failure after the run folder's rename would be retried as "already published";
# recover() settles an interrupted publication instead, and the original error is what the user sees
@task(name="publish-run", cache_policy=NO_CACHE, persist_result=False)
def publish_task(
    archive: str, head: dict, summary: dict, staged: list[StagedRecord], meta: dict, manifest: dict, run_id: str
) -> dict:
    """Write the run folder atomically from the staged records and pages, refresh the archive index."""
    published = publish_staged(archive, head, summary, staged, meta, manifest, run_id=run_id)
    render_archive_index_file(archive)
    entry = read_chain(archive)[published.seq - 1]  # the run's own chain entry: the head it made
    get_run_logger().info(
        "published run %s: manifest SHA-256 %s; chain head %s (seq %d)",
        published.run_id,
        published.manifest_sha256,
        entry["hash"],
        published.seq,
    )
    return {
        "run_id": published.run_id,
        "path": str(pathlib.Path(archive) / published.path),
        "manifest_sha256": published.manifest_sha256,
        "seq": published.seq,
        "chain_head": {"hash": entry["hash"], "seq": published.seq},
    }


@dataclass(frozen=True)
class History:
    """Earlier audit records per model and the runs that could not be used.

    ``records`` maps a model id to its earlier audits, oldest first, each ``{"as_of", "verdict",
    "r_max", "p_value", "run_id"}``; ``runs`` lists the run ids read; ``problems`` names every
    earlier audit run that was skipped and why (``{"run_id", "path", "as_of", "problem"}``): a
    missing, unreadable or altered history file never drops a date silently.
    """

    records: dict
    runs: tuple = ()
    problems: tuple = ()

    def to_manifest(self) -> dict:
        """The manifest's record of where the history came from."""
        return {"runs": list(self.runs), "problems": [dict(p) for p in self.problems]}


def _audit_results(run: Mapping[str, Any], root: pathlib.Path) -> tuple[list[dict] | None, str | None]:
    """The rows of an earlier run's ``results.parquet``, checked against its manifest.

    Returns ``(None, None)`` for a run that is not an audit (a refit run), ``(None, problem)`` when
    the file cannot be used.
    """
    if run["problem"]:
        return None, run["problem"]
    manifest = run["manifest"]
    files = manifest.get("files") if isinstance(manifest, dict) else None
    if not isinstance(files, dict):
        return None, f"{run['path']}/manifest.json lists no files"
    if manifest.get("kind", "audit") != "audit" or ("results.parquet" not in files and "refit.json" in files):
        return None, None  # a refit run records refits, not audits
    listed = files.get("results.parquet")
    if not isinstance(listed, dict):
        return None, f"{run['path']}/manifest.json lists no results.parquet"
    path = root / run["path"] / "results.parquet"
    try:
        data = path.read_bytes()
    except OSError as exc:
        return None, f"{run['path']}/results.parquet cannot be read ({exc.strerror or exc})"
    digest = sha256_bytes(data)
    if digest != listed.get("sha256"):
        return None, (
            f"{run['path']}/results.parquet differs from its manifest (SHA-256 {digest[:12]}..., recorded "
            f"{str(listed.get('sha256'))[:12]}...); not used"
        )
    try:
        return pq.read_table(pa.BufferReader(data), columns=HISTORY_COLUMNS).to_pylist(), None
    except (OSError, pa.ArrowInvalid, KeyError) as exc:
        return None, f"{run['path']}/results.parquet cannot be read as a results table ({exc})"


def load_history(
    archive_root: str | os.PathLike,
    before: dt.date,
    model_ids: Sequence[str] | None = None,
    limit: int = HISTORY_LENGTH,
) -> History:
    """Earlier audits per model (oldest first, at most ``limit``) from the runs before ``before``.

    Only audit runs count (a refit run at the same as-of date holds no verdicts).  For each model
    and as-of date the newest audit run that audited the model counts, so a rerun of some models
    (``--models``) supersedes their records only.  Each ``results.parquet`` read is checked
    against its run's manifest (itself checked against the hash chain) before use; a run whose file
    is missing, unreadable or altered is skipped and named in :attr:`History.problems`.  Runs are
    read newest first until every model of ``model_ids`` has ``limit`` records.
    """
    root = pathlib.Path(archive_root)
    wanted = set(model_ids) if model_ids is not None else None
    seen: dict[str, dict[str, dict]] = {}
    used, problems = [], []
    runs = sorted(history_runs(root, before), key=lambda r: (r["as_of"], r["seq"]), reverse=True)
    for run in runs:
        if wanted is not None and all(len(seen.get(m, ())) >= limit for m in wanted):
            break
        rows, problem = _audit_results(run, root)
        if problem:
            problems.append({"run_id": run["run_id"], "path": run["path"], "as_of": run["as_of"], "problem": problem})
            continue
        if rows is None:
            continue
        used.append(run["run_id"])
        for row in rows:
            mid = row["model_id"]
            if (
                (wanted is not None and mid not in wanted)
                or run["as_of"] in seen.get(mid, {})
                or len(seen.get(mid, ())) >= limit
            ):
                continue
            seen.setdefault(mid, {})[run["as_of"]] = history_row(row, run["as_of"], run["run_id"])
    records = {mid: [by_date[d] for d in sorted(by_date)] for mid, by_date in sorted(seen.items())}
    return History(records, tuple(used), tuple(problems))


@task(name="load-history", cache_policy=NO_CACHE, persist_result=False)
def history_task(archive: str, as_of: dt.date, model_ids: list[str]) -> History:
    """Earlier audits per model from the archive's audit runs, each checked against its manifest."""
    return load_history(archive, as_of, model_ids)


def run_context(archive_root: str | os.PathLike, as_of: dt.date, *, trend_length: int = TREND_LENGTH) -> dict:
    """What a new audit run states about the archive it extends (docs/architecture.md §3.4).

    Read before the run is written: the hash chain's head (the entry the run's own entry will
    follow, unless another entry is appended meanwhile; the audit flow checks that after
    publication), the audit run published last, and the share of passing models at each of the
    last ``trend_length`` as-of dates before ``as_of`` (the newest full audit run of each date;
    runs of some models only, ``--models``, are left out).  Earlier runs come from
    :func:`fitaudit.tasks.archive.history_runs`: manifests checked against the chain.

    Returns
    -------
    dict
        ``archive_head`` (``"<sha256> (seq N)"``, or None for an empty chain), ``chain_head``,
        ``chain_seq``, ``previous_run_id`` and ``previous_as_of`` (None before the first audit run)
        and ``fleet_trend``: ``[{"as_of", "passed", "registered"}, ...]``, oldest first.
    """
    root = pathlib.Path(archive_root)
    head = chain_head(root) if root.exists() else None
    audits = []
    for run in history_runs(root, dt.date.max) if root.exists() else []:
        manifest = run["manifest"]
        if (
            not isinstance(manifest, dict)
            or manifest.get("kind", "audit") != "audit"
            or "results.json" not in (manifest.get("files") or {})
        ):
            continue
        audits.append((run, manifest))
    audits.sort(key=lambda item: item[0]["seq"])
    previous = audits[-1][0] if audits else None
    newest: dict[str, dict] = {}
    for run, manifest in audits:
        counts = manifest.get("counts") or {}
        full = not (manifest.get("scope") or {}).get("models_requested")
        if (
            full
            and run["as_of"] < as_of.isoformat()
            and isinstance(counts.get("registered"), int)
            and counts["registered"] > 0
        ):
            newest[run["as_of"]] = {
                "as_of": run["as_of"],
                "passed": int(counts.get("pass") or 0),
                "registered": int(counts["registered"]),
            }
    trend = [newest[d] for d in sorted(newest)][-trend_length:] if trend_length > 0 else []
    return {
        "archive_head": f"{head[0]} (seq {head[1]})" if head else None,
        "chain_head": head[0] if head else None,
        "chain_seq": head[1] if head else 0,
        "previous_run_id": previous["run_id"] if previous else None,
        "previous_as_of": previous["as_of"] if previous else None,
        "fleet_trend": trend,
    }


@task(name="read-archive-context", cache_policy=NO_CACHE, persist_result=False)
def context_task(archive: str, as_of: dt.date) -> dict:
    """The chain head this run extends, the previous audit run and the fleet's pass-share trend."""
    return run_context(archive, as_of)


def render_archive_index_file(archive_root: str | os.PathLike) -> pathlib.Path:
    """(Re)write ``<archive>/index.html``, the list of all runs.

    A derived page, not part of any run: it is replaced atomically on every run and is not
    covered by the hash chain (each run's own pages are).
    """
    from .report import render_archive_index

    root = pathlib.Path(archive_root)
    data = render_archive_index(list_runs(root))
    write_replacing(root / "index.html", data)
    return root / "index.html"
