"""The embedded Prefect server's process: Prefect's own ``uvicorn`` command, its imports first.

``python -m fitaudit.flows.server_process ARGS`` runs ``python -m uvicorn ARGS`` (the command
Prefect runs for its embedded server; :func:`fitaudit.flows.server.start_embedded_server` passes
the same arguments) after importing the server's application module with Python's cyclic garbage
collector paused, and then leaves the imported objects out of the collector's later passes
(:func:`fitaudit.tasks.memory.collector_paused`).  The imports make about 420,000 long-lived
objects and little garbage: with the collector running, its passes over them took 0.3-0.4 s of
the server's 2.1 s of imports on the benchmark machine, and the server's start is what a command
waits for first.  Reference counting frees objects as before.

Before the imports it also skips Prefect's schema check (alembic's ``upgrade head``) when that
would change nothing: when the database is at the revision this Prefect version's check left it
at last time (:func:`schema_settled`; 0.17 s of a 3.1 s start on the benchmark machine).
"""

from __future__ import annotations

import contextlib
import importlib
import json
import os
import runpy
import sys

from fitaudit.flows._env import prefect_home
from fitaudit.tasks.memory import collector_paused

__all__ = ["APP_FACTORY", "main", "remember_schema", "schema_settled"]

#: The application factory Prefect's embedded server runs (``uvicorn --factory``).
APP_FACTORY = "prefect.server.api.server:create_app"


#: Prefect's setting for the schema check the server makes at its start.
MIGRATE = "PREFECT_SERVER_DATABASE_MIGRATE_ON_START"
#: In ``PREFECT_HOME``: the Prefect version and the schema revision of the embedded server's database
#: after the last start that checked it (:func:`schema_settled`).
SCHEMA_MEMO = "fitaudit-schema.json"


def _schema_state() -> dict | None:
    """The installed Prefect's version and the schema revision of the embedded server's database
    (``PREFECT_HOME/prefect.db``, Prefect's default, read with :mod:`sqlite3`); None when there is
    no such database or the environment names another one."""
    import importlib.metadata
    import sqlite3

    if any(k.startswith(("PREFECT_SERVER_DATABASE_", "PREFECT_API_DATABASE_")) for k in os.environ):
        return None  # a database of the user's, or a setting for it: Prefect checks it
    db = prefect_home() / "prefect.db"
    if not db.is_file():
        return None
    try:
        with contextlib.closing(sqlite3.connect(f"file:{db}?mode=ro", uri=True, timeout=1.0)) as con:
            revision = sorted(row[0] for row in con.execute("SELECT version_num FROM alembic_version"))
        return {"prefect": importlib.metadata.version("prefect"), "revision": revision}
    except (sqlite3.Error, importlib.metadata.PackageNotFoundError):
        return None


def _memo() -> dict | None:
    try:
        return json.loads((prefect_home() / SCHEMA_MEMO).read_text())
    except (OSError, ValueError):
        return None


def schema_settled() -> bool:
    """Whether the embedded server's database is at the revision that this Prefect version's schema
    check left it at last time (:data:`SCHEMA_MEMO`), so that the check would change nothing."""
    state = _schema_state()
    return state is not None and bool(state["revision"]) and _memo() == state


def remember_schema() -> None:
    """Record the database's schema revision after a start of the server (which answers only after
    its schema check); nothing when a setting of the user's decides the check."""
    state = _schema_state()
    if MIGRATE not in os.environ and state is not None and state["revision"] and _memo() != state:
        with contextlib.suppress(OSError):
            (prefect_home() / SCHEMA_MEMO).write_text(json.dumps(state))


def main(argv: list[str]) -> None:
    """Skip the schema check when it would change nothing, import the application's module with
    the collector paused and frozen, then run uvicorn's command line on ``argv``."""
    if schema_settled():
        os.environ.setdefault(MIGRATE, "false")
    with collector_paused():
        importlib.import_module(APP_FACTORY.partition(":")[0])
    sys.argv = [sys.argv[0], *argv]
    runpy.run_module("uvicorn", run_name="__main__", alter_sys=True)


if __name__ == "__main__":
    main(sys.argv[1:])
