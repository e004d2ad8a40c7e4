"""Starting a local Prefect server for features the embedded server cannot provide.

Schedules, event-triggered refits and Dask workers need a long-lived Prefect API (the embedded,
ephemeral server runs no scheduler and every worker process would start its own).  When the user
has no server, ``fitaudit`` can start one on a loopback port for the duration of a command.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterator

__all__ = ["local_server", "free_port", "wait_healthy"]


def free_port() -> int:
    """A free TCP port on the loopback interface."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_healthy(api_url: str, timeout: float = 120.0, process: subprocess.Popen | None = None) -> None:
    """Poll ``<api_url>/health`` until it answers; raise ``RuntimeError`` on timeout or exit."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if process is not None and process.poll() is not None:
            raise RuntimeError(f"the Prefect server exited with code {process.returncode} before it was ready")
        try:
            with urllib.request.urlopen(f"{api_url}/health", timeout=2) as resp:
                if resp.status == 200:
                    return
        except OSError:
            time.sleep(0.3)
    raise RuntimeError(f"the Prefect server at {api_url} did not become healthy within {timeout:.0f} s")


@contextlib.contextmanager
def local_server(port: int | None = None, log_path: str | None = None, timeout: float = 120.0) -> Iterator[str]:
    """Run ``prefect server start`` on 127.0.0.1 and set ``PREFECT_API_URL`` while inside.

    Uses the current ``PREFECT_HOME`` (its SQLite database persists between runs, so later starts
    skip the migrations).  Yields the API URL; stops the server on exit.
    """
    port = port or free_port()
    api_url = f"http://127.0.0.1:{port}/api"
    prefect_bin = shutil.which("prefect", path=os.path.dirname(sys.executable)) or shutil.which("prefect")
    cmd = [prefect_bin, "server", "start", "--host", "127.0.0.1", "--port", str(port), "--no-ui", "--analytics-off"] if prefect_bin else [sys.executable, "-m", "prefect", "server", "start", "--host", "127.0.0.1", "--port", str(port)]
    env = dict(os.environ)
    env.pop("PREFECT_API_URL", None)
    env.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    env.setdefault("PREFECT_SERVER_UI_ENABLED", "false")
    log = open(log_path, "ab") if log_path else subprocess.DEVNULL
    proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, env=env, start_new_session=True)
    previous = os.environ.get("PREFECT_API_URL")
    try:
        wait_healthy(api_url, timeout, proc)
        os.environ["PREFECT_API_URL"] = api_url
        yield api_url
    finally:
        if previous is None:
            os.environ.pop("PREFECT_API_URL", None)
        else:
            os.environ["PREFECT_API_URL"] = previous
        proc.terminate()
        try:
            proc.wait(timeout=20)
        except subprocess.TimeoutExpired:
            proc.kill()
        if log_path:
            log.close()
