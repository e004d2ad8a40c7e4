"""Crash-safe, tamper-evident archive of audit runs (docs/architecture.md §3).

Layout under the archive root::

    runs/<YYYY>/<run-id>/   one folder per published run; manifest.json lists every other file
    chain.jsonl             hash-chained log: one canonical-JSON line per run, promotion, purge, sign-off
    params/<model>/<n>.json parameter versions (written by fitaudit.tasks.params), checked by verify
    .staging/               run folders being written (private)
    .journal/               intents written before a step that must be completed or rolled back (private)
    .trash/                 purged run folders being deleted (private)
    .fingerprints/          digests of source files by version, reused by staging (private; a cache, not evidence)
    .tables/                simulated null tables, reused by later runs (private; a cache, not evidence)
    .lock                   lock file serialising every change to chain.jsonl and runs/

Publication protocol (``RunWriter.finish``)
-------------------------------------------
1. Every file is written once into ``.staging/<run-id>.<hex>/`` (never overwritten); the
   staging folder is ``flock``-ed by its writer so ``recover`` leaves a live one alone.
2. Every staged file is fsynced (several at a time), then ``manifest.json`` (caller's fields +
   ``run_id``, ``as_of``, ``schema_version`` and ``files``: SHA-256 and size of every other file)
   is written and fsynced, and every staged folder is fsynced.
3. Under the archive lock: the chain is checked, then ``.journal/run-<run-id>.json`` records the
   intended chain payload (run id, path, as-of date, manifest SHA-256).
4. The staging folder is renamed to ``runs/<YYYY>/<run-id>/`` (atomic; the run becomes visible whole).
5. The ``run`` entry is appended to ``chain.jsonl`` (see below), then the journal is removed.

A chain append first writes ``.journal/append.json`` (byte offset and the exact line), then writes the
line with one ``O_APPEND`` write and fsyncs, then removes the journal.  ``chain.jsonl`` therefore only
ever grows; an interrupted append is finished by writing the rest of the journaled line.

``verify_archive`` accepts a run folder that is missing from the chain only when a run journal covers
it (and the folder matches the journaled manifest hash): such a folder is a *pending* note, not a
problem.  ``recover`` completes such a publication (appends the entry) or, when the rename had not
happened, rolls it back; it also finishes interrupted appends, promotions and purges and deletes
abandoned staging folders.

Promotion protocol (``record_promotion``)
-----------------------------------------
Under the archive lock: ``.journal/promotion-<model>.json`` records the new ``promoted`` parameter
version (its full record) and the intended chain payload; the version file is written once; the
``promotion`` entry is appended; the journal is removed.  ``recover`` appends the entry when the file
was written, or drops the journal when it was not, so a crash leaves both or neither.  A promoted
version that no chain entry records is a problem for ``verify_archive`` and is refused by the
production-version lookup (``production_snapshot``).

Damage
------
A run refuses to append to an archive that ``verify_archive`` rejects (``require_intact``).  When the
originals cannot be restored, ``acknowledge_damage`` appends an ``acknowledgement`` entry naming each
problem (and recording, as found, run folders and promoted versions whose chain entries were lost);
``verify_archive`` then reports those problems as ``acknowledged`` notes and the archive can continue.

Modules
-------
``layout`` (names, paths, run ids), ``problems`` (``ArchiveError``, ``ArchiveProblem``), ``durable``
(fsync, journal files, appends, the crash tests' step hook), ``lock`` (the archive lock), ``chain``
(the hash chain and its head), ``records`` (the runs the chain records), ``checks`` (run folders and
parameter files against their records), ``journals`` (reading interrupted work), ``verify``
(``verify_archive``), ``writer`` (publishing a run, work folders), ``promotions`` (promotions and the
production-version lookup), ``recovery``, ``retention`` (purges), ``listing`` (runs read back),
``signoff``, ``damage`` (refusing and acknowledging damage).
"""

from __future__ import annotations

from .chain import append_chain, chain_head, parse_head, read_chain
from .damage import acknowledge_damage, require_intact
from .layout import CHAIN_KINDS, MANIFEST_SCHEMA_VERSION, SAFE_NAME, new_run_id
from .listing import history_runs, list_runs
from .problems import NOTE_KINDS, ArchiveError, ArchiveProblem
from .promotions import ProductionSnapshot, production_snapshot, record_promotion
from .recovery import recover
from .retention import purge_runs
from .signoff import record_signoff
from .verify import verify_archive
from .writer import PublishedRun, RunWriter, WorkFolder, open_run, open_work_folder

__all__ = [
    "SAFE_NAME",
    "CHAIN_KINDS",
    "NOTE_KINDS",
    "MANIFEST_SCHEMA_VERSION",
    "ArchiveError",
    "ArchiveProblem",
    "PublishedRun",
    "RunWriter",
    "WorkFolder",
    "open_work_folder",
    "new_run_id",
    "open_run",
    "append_chain",
    "read_chain",
    "verify_archive",
    "recover",
    "list_runs",
    "record_signoff",
    "purge_runs",
    "record_promotion",
    "ProductionSnapshot",
    "production_snapshot",
    "acknowledge_damage",
    "require_intact",
    "chain_head",
    "parse_head",
    "history_runs",
]
