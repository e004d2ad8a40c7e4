"""The embedded Prefect server's process: Prefect's own ``uvicorn`` command, its imports first.

``python -m fitaudit.flows.server_process ARGS`` runs ``python -m uvicorn ARGS`` (the command
Prefect runs for its embedded server; :func:`fitaudit.flows.server.start_embedded_server` passes
the same arguments) after importing the server's application module with Python's cyclic garbage
collector paused, and then leaves the imported objects out of the collector's later passes
(:func:`fitaudit.tasks.memory.collector_paused`).  The imports make about 420,000 long-lived
objects and little garbage: with the collector running, its passes over them took 0.3-0.4 s of
the server's 2.1 s of imports on the benchmark machine, and the server's start is what a command
waits for first.  Reference counting frees objects as before.
"""

from __future__ import annotations

import importlib
import runpy
import sys

from fitaudit.tasks.memory import collector_paused

__all__ = ["APP_FACTORY", "main"]

#: The application factory Prefect's embedded server runs (``uvicorn --factory``).
APP_FACTORY = "prefect.server.api.server:create_app"


def main(argv: list[str]) -> None:
    """Import the application's module with the collector paused and frozen, then run uvicorn's
    command line on ``argv``."""
    with collector_paused():
        importlib.import_module(APP_FACTORY.partition(":")[0])
    sys.argv = [sys.argv[0], *argv]
    runpy.run_module("uvicorn", run_name="__main__", alter_sys=True)


if __name__ == "__main__":
    main(sys.argv[1:])
