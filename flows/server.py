"""Prefect servers that ``fitaudit`` starts for one command: started, tracked, stopped, reaped.

Schedules, event-triggered refits and Dask workers need a long-lived Prefect API (the embedded,
ephemeral server runs no scheduler and every worker process would start its own).  When the user
has no server, ``fitaudit`` can start one on a loopback port for the duration of a command
(:func:`local_server`); otherwise a run uses Prefect's embedded server, a ``uvicorn`` child
process started as the command begins and stopped when it exits (:func:`start_embedded_server`).

A process killed by SIGKILL cannot stop anything, so every server a command starts is recorded in
``<PREFECT_HOME>/fitaudit-servers/<pid>.json`` (its pid and start time, and those of the command
that owns it) and the record is removed when the server stops.  The next ``fitaudit`` command
*reaps* what a killed command left (:func:`reap_stale_servers`): a server whose owner is gone is
stopped (SIGTERM, then SIGKILL after 5 s), identified by pid *and* start time so that a reused pid
is never signalled.  Start times are read from ``/proc`` (Linux); elsewhere nothing is reaped.
"""

from __future__ import annotations

import atexit
import contextlib
import importlib
import json
import os
import pathlib
import shutil
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator

from ._env import QUIET_SETTINGS, prefect_home
from .server_process import APP_FACTORY, remember_schema

__all__ = [
    "local_server",
    "free_port",
    "wait_healthy",
    "start_embedded_server",
    "embedded_server",
    "reap_stale_servers",
    "tracked_servers",
]

_RECORDS = "fitaudit-servers"


def free_port() -> int:
    """A free TCP port on the loopback interface."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_healthy(api_url: str, timeout: float = 120.0, process: subprocess.Popen | None = None) -> None:
    """Poll ``<api_url>/health`` until it answers; raise ``RuntimeError`` on timeout or exit."""
    import urllib.request  # here: every command imports this module, few start a server

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
    cmd = (
        [prefect_bin, "server", "start", "--host", "127.0.0.1", "--port", str(port), "--no-ui", "--analytics-off"]
        if prefect_bin
        else [sys.executable, "-m", "prefect", "server", "start", "--host", "127.0.0.1", "--port", str(port)]
    )
    env = dict(os.environ)
    env.pop("PREFECT_API_URL", None)
    env.setdefault("PREFECT_SERVER_ANALYTICS_ENABLED", "false")
    env.setdefault("PREFECT_SERVER_UI_ENABLED", "false")
    log = open(log_path, "ab") if log_path else subprocess.DEVNULL
    proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, env=env, start_new_session=True)
    record = _track(proc.pid, "prefect server start", port, group=True)
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
        _stop(proc, group=True, grace=20.0)
        _untrack(record)
        if log_path:
            log.close()


def _stop(proc: subprocess.Popen, group: bool = False, grace: float = 10.0) -> None:
    """Stop a server this process started and wait for it: SIGTERM, then SIGKILL after ``grace`` seconds
    (to its process group when it runs in a session of its own, as a started ``prefect server`` does)."""
    send = os.killpg if group else os.kill
    for sig in (signal.SIGTERM, signal.SIGKILL):
        if not group and proc.poll() is not None:  # gone (and reaped): its pid may belong to another process now
            return  # (a group is signalled anyway: the leader's children may outlive it)
        with contextlib.suppress(ProcessLookupError, PermissionError):
            send(proc.pid, sig)
        try:
            proc.wait(timeout=grace)
        except subprocess.TimeoutExpired:
            if sig == signal.SIGKILL:
                raise


# ----------------------------------------------------------------------------------------------
# the embedded server and the records of started servers


def start_embedded_server(prepare: Callable[[], object] | None = None) -> str | None:
    """Start Prefect's embedded (ephemeral) server now, recorded for reaping; returns its API URL.

    None, and nothing started, when a Prefect API is configured or the embedded server is
    disabled.  ``prepare`` (the command's own imports) runs while the server starts.

    When fitaudit chose Prefect's settings (:func:`fitaudit.flows._env.configure_prefect`: no
    Prefect configuration of the user's in the environment or in the working directory) and
    Prefect is not imported yet, the server is launched here as Prefect launches its embedded
    server (:func:`_launch_embedded`), ``PREFECT_API_URL`` is set before Prefect is imported, and
    this process stops the server at exit.  The command then neither imports Prefect's server
    modules nor waits for the server before its own imports (on a 2-core machine, from the
    command's start to a client ready for the audit flow: 6.8 s before, 3.5 s now).  Otherwise
    Prefect's ``SubprocessASGIServer`` starts it and Prefect's exit handler stops it, also after
    SIGTERM when the command line turned it into a clean exit.  Either way the record is removed
    once the server is gone, or left for :func:`reap_stale_servers` when the command was killed.
    """
    if _launch_here():
        proc, port = _launch_embedded()
        api_url = os.environ["PREFECT_API_URL"] = f"http://127.0.0.1:{port}/api"
        record = _track(proc.pid, "embedded", port)

        def stop() -> None:  # at exit: the server, then its record
            _stop(proc)
            _untrack(record)

        atexit.register(stop)
        if prepare is not None:
            prepare()
        timeout = os.environ.get(_STARTUP_TIMEOUT, QUIET_SETTINGS[_STARTUP_TIMEOUT])
        wait_healthy(api_url, float(timeout), proc)
        # the schema revision the server's check left (it answers only after the check): off the
        # command's path, in a thread the interpreter joins at exit
        threading.Thread(target=remember_schema, name="fitaudit-schema-memo").start()
        return api_url
    from prefect.settings import PREFECT_API_URL, PREFECT_SERVER_EPHEMERAL_ENABLED

    api_url = None
    if not PREFECT_API_URL.value() and PREFECT_SERVER_EPHEMERAL_ENABLED.value():
        from prefect.server.api.server import SubprocessASGIServer

        holder: dict = {}
        atexit.register(lambda: _untrack(holder.get("record")))  # registered first, so it runs after Prefect's stop
        server = SubprocessASGIServer()  # the instance Prefect's client uses (one per process)
        server.start()
        if server.server_process is not None:
            holder["record"] = _track(server.server_process.pid, "embedded", server.port)
        api_url = server.api_url
    if prepare is not None:
        prepare()
    return api_url


@contextlib.contextmanager
def embedded_server(prepare: Callable[[], object] | None = None) -> Iterator[str | None]:
    """:func:`start_embedded_server`, the command's flow runs on it made without run heartbeats;
    yields its API URL (None: nothing started, Prefect's settings apply unchanged).

    Prefect 3 sends a heartbeat event for each flow run (every 180 s by default) from a thread, so
    that a server's automation can mark a run whose process died as crashed.  The embedded server
    stops with the command and runs no automations, so nothing reads them; and the thread costs
    the end of every run up to a second, because the engine waits for it and it looks for the stop
    only between one-second sleeps (0.5 s on average at the end of an audit run, measured).  A
    server of the user's keeps Prefect's setting.
    """
    url = start_embedded_server(prepare)
    if url is None:
        yield None
        return
    from prefect.settings import temporary_settings

    with temporary_settings(updates={"flows.heartbeat_frequency": None}):
        yield url


#: What a command's process computes with besides its flows' module, imported while the server starts.
#: ``scipy.special``: the null tables and the fleet rules, in the flow process; on first use it cost
#: the run 0.3-0.45 s (the null-table stage, measured), while the process waits about 1.8 s for the
#: server after its other imports.  ``fitaudit.tasks.report`` (Jinja2): the run page, the flow's last
#: step (45 ms, ``python -X importtime``); ``prefect.task_engine``: the first task run (9 ms).  Not
#: ``scipy.stats``: the worker processes compute with it.
WARM_IMPORTS = ("scipy.special", "fitaudit.tasks.report", "prefect.task_engine")


def command_imports(flow_module: str) -> None:
    """The command's imports, made while the embedded server starts: ``flow_module`` (its flows)
    and :data:`WARM_IMPORTS`."""
    for name in (flow_module, *WARM_IMPORTS):
        importlib.import_module(name)


#: Prefect's setting for how long to wait for the embedded server (fitaudit's default in ``QUIET_SETTINGS``).
_STARTUP_TIMEOUT = "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS"
#: Files in the working directory from which Prefect reads settings (besides the environment), each
#: with the text that marks Prefect settings in it ("" : any such file).
_PREFECT_SETTING_FILES = {"prefect.toml": "", ".env": "PREFECT_", "pyproject.toml": "[tool.prefect"}


def _launch_here() -> bool:
    """Whether the embedded server may be launched without asking Prefect's settings: fitaudit set
    them (ephemeral mode on, no API URL, no profile) and no file could change them."""
    env = os.environ
    if os.name != "posix":  # the socket is handed over as an inherited descriptor
        return False
    if "prefect" in sys.modules or "PREFECT_API_URL" in env or "PREFECT_PROFILE" in env:
        return False
    if env.get("PREFECT_SERVER_EPHEMERAL_ENABLED", "").lower() not in ("1", "true"):
        return False
    if "PREFECT_PROFILES_PATH" in env or pathlib.Path(env.get("PREFECT_HOME", "."), "profiles.toml").exists():
        return False
    for name, marker in _PREFECT_SETTING_FILES.items():
        path = pathlib.Path(name)
        if path.is_file() and marker in path.read_text(errors="replace"):
            return False
    return True


#: Settings of the embedded server only (a server of the user's keeps Prefect's).  No catalogue of block
#: types written at its start: to decide whether the catalogue changed, Prefect imports every installed
#: integration first (prefect-dask imports Dask: 0.35 s of a 4.4 s start, measured); a block type is
#: still registered when a block of it is saved, as Prefect does for any block.  No automations: the
#: triggers and actions services (one setting) would evaluate every event of the run against automations
#: the command never installs (``fitaudit serve`` installs them on a server of the user's), and their
#: start made the server's 0.25-0.3 s longer and the run's verdict events 0.2 s slower (measured).
EMBEDDED_SERVER_SETTINGS = {
    "PREFECT_SERVER_REGISTER_BLOCKS_ON_START": "false",
    "PREFECT_SERVER_MEMOIZE_BLOCK_AUTO_REGISTRATION": "false",  # else the integrations are imported anyway
    "PREFECT_SERVER_SERVICES_TRIGGERS_ENABLED": "false",
}


def _launch_embedded() -> tuple[subprocess.Popen, int]:
    """Launch the embedded server on a loopback socket opened here; returns the process and the port.

    The command is the one Prefect 3 runs for its embedded server (``SubprocessASGIServer``:
    ``python -m uvicorn --factory prefect.server.api.server:create_app`` with the ephemeral-mode
    variables, so the same services run), run by :mod:`fitaudit.flows.server_process`, which
    makes the application's imports first with the garbage collector paused; the listening socket
    is handed over with uvicorn's ``--fd``, so the port is known before the server runs and no
    other process can take it.

    uvicorn wraps a handed-over descriptor as a Unix socket, so asyncio does not switch Nagle's
    algorithm off on the connections it accepts, as it does for TCP sockets: every response
    (headers and body written separately) then waited about 40 ms for the client's delayed
    acknowledgement.  ``TCP_NODELAY`` is set on the listening socket instead; Linux copies it to
    every accepted connection (:func:`_loopback_listener`).  The server process skips Prefect's
    schema check when it would change nothing (:func:`~fitaudit.flows.server_process.schema_settled`).
    """
    import importlib.util

    spec = importlib.util.find_spec("prefect")
    if spec is None or not spec.submodule_search_locations:
        raise RuntimeError("fitaudit: Prefect is not installed (pip install prefect)")
    app_dir = str(pathlib.Path(next(iter(spec.submodule_search_locations))).parent)
    sock = _loopback_listener()
    try:
        port = int(sock.getsockname()[1])
        env = {**os.environ, "PREFECT_UI_ENABLED": "0", "PREFECT__SERVER_EPHEMERAL": "1", "PREFECT__SERVER_FINAL": "1"}
        for name, value in EMBEDDED_SERVER_SETTINGS.items():
            env.setdefault(name, value)
        # in this command's process group, as Prefect launches it: a Ctrl-C reaches both
        proc = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "fitaudit.flows.server_process",
                "--app-dir",
                app_dir,
                "--factory",
                APP_FACTORY,
                "--fd",
                str(sock.fileno()),
                "--log-level",
                "error",
                "--lifespan",
                "on",
            ],
            env=env,
            pass_fds=(sock.fileno(),),
        )
    finally:
        sock.close()
    return proc, port


def _loopback_listener() -> socket.socket:
    """A listening TCP socket on a free loopback port, with ``TCP_NODELAY`` for its connections."""
    sock = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    try:
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        sock.bind(("127.0.0.1", 0))
        sock.listen(128)
    except OSError:
        sock.close()
        raise
    return sock


def _records_dir() -> pathlib.Path:
    return prefect_home() / _RECORDS


def _start_time(pid: int) -> str | None:
    """The process's start time in clock ticks since boot (``/proc/<pid>/stat`` field 22), or None."""
    try:
        stat = pathlib.Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    fields = stat[stat.rfind(")") + 2 :].split()
    return fields[19] if len(fields) > 19 and fields[0] != "Z" else None


def _track(pid: int, kind: str, port: int | None, group: bool = False) -> pathlib.Path | None:
    """Record a started server (best effort: an unwritable Prefect home only loses the record)."""
    start = _start_time(pid)
    if start is None:
        return None
    record = {
        "pid": pid,
        "start": start,
        "group": group,
        "kind": kind,
        "port": port,
        "owner_pid": os.getpid(),
        "owner_start": _start_time(os.getpid()),
    }
    path = _records_dir() / f"{pid}.json"
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(json.dumps(record))
    except OSError:
        return None
    return path


def _untrack(path: pathlib.Path | None) -> None:
    """Remove a record once its server is gone (kept, for reaping, while it still runs)."""
    if path is None:
        return
    with contextlib.suppress(OSError, ValueError):
        record = json.loads(path.read_text())
        if _start_time(record["pid"]) != record["start"]:
            path.unlink()


def tracked_servers() -> list[dict]:
    """The recorded servers (each with ``path`` added), for tests and diagnostics."""
    out = []
    for path in sorted(_records_dir().glob("*.json")):
        with contextlib.suppress(OSError, ValueError):
            out.append({**json.loads(path.read_text()), "path": str(path)})
    return out


def reap_stale_servers(grace: float = 5.0) -> list[str]:
    """Stop the servers left by ``fitaudit`` commands that were killed; returns one line per server.

    A recorded server is stopped when the command that started it is no longer running (its pid
    gone, or reused by another process) while the server itself still runs with its recorded start
    time; records of servers that are gone are removed.  Servers of live commands are left alone.
    """
    actions = []
    for record in tracked_servers():
        path = pathlib.Path(record["path"])
        try:
            pid, start = int(record["pid"]), str(record["start"])
            owner_alive = _start_time(int(record["owner_pid"])) == record.get("owner_start")
        except (KeyError, TypeError, ValueError):
            path.unlink(missing_ok=True)
            continue
        if _start_time(pid) != start:
            path.unlink(missing_ok=True)  # already gone
            continue
        if owner_alive:
            continue
        send = os.killpg if record.get("group") else os.kill  # a started `prefect server` has its own process group
        with contextlib.suppress(ProcessLookupError, PermissionError):
            send(pid, signal.SIGTERM)
            deadline = time.monotonic() + grace
            while _start_time(pid) == start and time.monotonic() < deadline:
                time.sleep(0.1)
            if _start_time(pid) == start:
                send(pid, signal.SIGKILL)
        path.unlink(missing_ok=True)
        actions.append(
            f"stopped a Prefect server left running by an interrupted fitaudit command (pid {pid}, port "
            f"{record.get('port')})"
        )
    return actions
