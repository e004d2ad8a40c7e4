"""Publishing a run: results twins, report pages and manifest into the archive; history back out.

:func:`publish_run` writes ``results.json`` (the document, deterministic), ``results.parquet``
(one row per model), the HTML pages rendered from the document, and ``manifest.json`` (hashes,
inputs' fingerprints, versions, seeds, timings) through :class:`~fitaudit.tasks.archive.RunWriter`,
which makes the run visible only when complete and links it into the hash chain.
:func:`load_history` reads earlier verdicts back from the archive for trends and persistence.
"""

from __future__ import annotations

import datetime as dt
import getpass
import importlib.metadata
import io
import os
import pathlib
import platform
import socket
import subprocess
from typing import Any, Mapping, Sequence

import pyarrow as pa
import pyarrow.parquet as pq

from ._io import canonical_json
from .archive import PublishedRun, list_runs, new_run_id, open_run
from .results import results_rows

__all__ = ["publish_run", "load_history", "package_versions", "code_commit", "render_archive_index_file", "HISTORY_LENGTH"]

HISTORY_LENGTH = 7  # earlier audits kept per model (the report shows these plus the current one)


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
        out = subprocess.run(["git", "-C", str(here), "rev-parse", "HEAD"], capture_output=True, text=True, timeout=5, check=False)
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


def _parquet_bytes(rows: Sequence[Mapping[str, Any]]) -> bytes:
    table = pa.Table.from_pylist(list(rows)) if rows else pa.table({"model_id": pa.array([], pa.string())})
    buf = io.BytesIO()
    pq.write_table(table, buf, compression="zstd")
    return buf.getvalue()


def publish_run(
    archive_root: str | os.PathLike,
    doc: dict,
    pages: Mapping[str, bytes],
    manifest: dict,
    *,
    run_id: str | None = None,
) -> PublishedRun:
    """Write a complete run folder and link it into the chain (visible only when complete).

    ``doc`` is the results document; ``pages`` maps relative paths (``index.html``,
    ``models/<safe-id>.html``, ...) to bytes; ``manifest`` holds the caller's run metadata
    (``finish`` adds every file's SHA-256 and size).
    """
    as_of = dt.date.fromisoformat(doc["run"]["as_of"])
    run_id = run_id or new_run_id(as_of)
    writer = open_run(archive_root, run_id, as_of.year, as_of=as_of)
    with writer:
        writer.write_bytes("results.json", canonical_json(doc))
        writer.write_bytes("results.parquet", _parquet_bytes(results_rows(doc)))
        for rel, data in sorted(pages.items()):
            writer.write_bytes(rel, data)
        published = writer.finish(dict(manifest, run_id=run_id, as_of=as_of.isoformat()))
    return published


def load_history(archive_root: str | os.PathLike, before: dt.date, model_ids: Sequence[str] | None = None, limit: int = HISTORY_LENGTH) -> dict[str, list[dict]]:
    """Earlier verdicts per model (oldest first), from the runs with an as-of date before ``before``.

    For each as-of date only the newest run counts (a rerun supersedes).  Reads each run's
    ``results.parquet`` (a few columns).
    """
    root = pathlib.Path(archive_root)
    if not (root / "chain.jsonl").exists():
        return {}
    newest: dict[str, dict] = {}
    for run in list_runs(root):
        if run["purged"] or not run["as_of"] or dt.date.fromisoformat(run["as_of"]) >= before:
            continue
        newest[run["as_of"]] = run  # oldest first in the chain, so the last wins
    wanted = set(model_ids) if model_ids is not None else None
    history: dict[str, list[dict]] = {}
    cols = ["model_id", "verdict", "production_r_max", "refit_r_max", "production_p_value", "refit_p_value"]
    for as_of in sorted(newest)[-limit:]:
        path = root / newest[as_of]["path"] / "results.parquet"
        try:
            table = pq.read_table(path, columns=cols).to_pylist()
        except (OSError, pa.ArrowInvalid, KeyError):
            continue
        for row in table:
            mid = row["model_id"]
            if wanted is not None and mid not in wanted:
                continue
            use_prod = row.get("production_r_max") is not None
            history.setdefault(mid, []).append(
                {
                    "as_of": as_of,
                    "verdict": row["verdict"],
                    "r_max": row["production_r_max"] if use_prod else row.get("refit_r_max"),
                    "p_value": row["production_p_value"] if use_prod else row.get("refit_p_value"),
                    "run_id": newest[as_of]["run_id"],
                }
            )
    return history


def render_archive_index_file(archive_root: str | os.PathLike) -> pathlib.Path:
    """(Re)write ``<archive>/index.html``, the list of all runs.

    A derived page, not part of any run: it is replaced atomically on every run and is not
    covered by the hash chain (each run's own pages are).
    """
    from .report import render_archive_index

    root = pathlib.Path(archive_root)
    data = render_archive_index(list_runs(root))
    tmp = root / f".index.html.{os.getpid()}.tmp"
    tmp.write_bytes(data)
    os.replace(tmp, root / "index.html")
    return root / "index.html"
