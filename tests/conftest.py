"""Shared fixtures.  Prefect settings are fixed here, before anything imports prefect."""

from __future__ import annotations

import os
import pathlib
import sys
import tempfile

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")  # threaded BLAS slows small optimisations on 2 cores

import numpy as np  # noqa: E402
import pytest  # noqa: E402

_PREFECT_HOME = pathlib.Path(tempfile.gettempdir()) / f"fitaudit-test-prefect-{os.getuid()}"
os.environ.setdefault("PREFECT_HOME", str(_PREFECT_HOME))
os.environ.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
os.environ.setdefault("DO_NOT_TRACK", "1")
os.environ.setdefault("PREFECT_LOGGING_LEVEL", "WARNING")
os.environ.setdefault("PREFECT_SERVER_LOGGING_LEVEL", "CRITICAL")
os.environ.setdefault("PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS", "120")
os.environ.setdefault("PREFECT_LOGGING_TO_API_WHEN_MISSING_FLOW", "ignore")
os.environ.setdefault("PREFECT_TASKS_DEFAULT_NO_CACHE", "true")

REPO = pathlib.Path(__file__).resolve().parents[1]


def pytest_runtest_setup(item: pytest.Item) -> None:
    """Before a Hypothesis test, stop Prefect's background events client if a flow test left it
    running: its websocket's keepalive pings take their payload from the global ``random`` module
    in another thread (``websockets``' ``ping``), and a draw of Hypothesis that happens to span one
    is reported as a strategy that uses ``random`` (a deprecation warning, an error in later
    Hypothesis versions).  The next event starts a new client."""
    if getattr(getattr(item, "obj", None), "is_hypothesis_test", False) and "prefect.events.worker" in sys.modules:
        from prefect.events.worker import EventsWorker

        EventsWorker.drain_all(timeout=10.0, at_exit=False)


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator; tests that need randomness take this."""
    return np.random.default_rng(20261201)


@pytest.fixture(scope="session")
def repo_root() -> pathlib.Path:
    """The repository root."""
    return REPO


@pytest.fixture(scope="session")
def prefect_server(tmp_path_factory):
    """A real Prefect API for the session: reuse ``PREFECT_API_URL`` if set, else start one.

    Starting ``prefect server start`` costs 15-25 s once per session; every flow test then runs
    against it (Dask workers and served deployments need a real server anyway).
    """
    from prefect.settings import PREFECT_API_URL, temporary_settings

    url = os.environ.get("PREFECT_API_URL")
    if url:
        yield url
        return
    from fitaudit.flows.server import local_server

    log = tmp_path_factory.mktemp("prefect-server") / "server.log"
    with local_server(log_path=str(log), timeout=180) as url:
        with temporary_settings(updates={PREFECT_API_URL: url}):
            yield url
