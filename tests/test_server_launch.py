"""The embedded Prefect server launched by fitaudit itself (flows/server.py ``start_embedded_server``).

A command that found no Prefect configuration of the user's launches the server before it imports
Prefect, so its own imports run while the server starts; any configuration (environment, profile
or a settings file in the working directory) leaves the start to Prefect, as before.
"""

from __future__ import annotations

import contextlib
import json
import os
import pathlib
import socket
import subprocess
import sys
import textwrap
import time
import types

import pytest

from fitaudit.flows import server


@pytest.fixture
def plain_env(monkeypatch, tmp_path):
    """The environment configure_prefect sets up, in an empty working directory, Prefect not imported."""
    for key in ("PREFECT_API_URL", "PREFECT_PROFILE", "PREFECT_PROFILES_PATH"):
        monkeypatch.delenv(key, raising=False)
    monkeypatch.setenv("PREFECT_HOME", str(tmp_path / ".prefect"))
    monkeypatch.setenv("PREFECT_SERVER_EPHEMERAL_ENABLED", "true")
    monkeypatch.chdir(tmp_path)
    monkeypatch.delitem(sys.modules, "prefect", raising=False)  # restored after the test
    return tmp_path


def test_launched_here_only_without_any_prefect_configuration(plain_env, monkeypatch):
    assert server._launch_here()
    monkeypatch.setenv("PREFECT_API_URL", "http://127.0.0.1:4200/api")
    assert not server._launch_here()  # a server of the user's
    monkeypatch.delenv("PREFECT_API_URL")
    monkeypatch.setenv("PREFECT_SERVER_EPHEMERAL_ENABLED", "false")
    assert not server._launch_here()  # the embedded server is switched off
    monkeypatch.setenv("PREFECT_SERVER_EPHEMERAL_ENABLED", "true")
    monkeypatch.setenv("PREFECT_PROFILE", "work")
    assert not server._launch_here()
    monkeypatch.delenv("PREFECT_PROFILE")
    assert server._launch_here()


@pytest.mark.parametrize(
    ("name", "text", "configures"),
    [
        ("prefect.toml", 'api.url = "http://127.0.0.1:4200/api"\n', True),
        (".env", "PREFECT_API_URL=http://127.0.0.1:4200/api\n", True),
        ("pyproject.toml", '[tool.prefect]\napi.url = "http://127.0.0.1:4200/api"\n', True),
        ("pyproject.toml", '[project]\nname = "forecasts"\n', False),
        (".env", "DATABASE_URL=sqlite:///forecasts.db\n", False),
    ],
)
def test_a_settings_file_in_the_working_directory_leaves_the_start_to_prefect(plain_env, name, text, configures):
    # common practice: Prefect 3 reads settings from these files in the working directory
    (plain_env / name).write_text(text)
    assert server._launch_here() is not configures


def test_a_profiles_file_in_the_prefect_home_leaves_the_start_to_prefect(plain_env):
    home = pathlib.Path(os.environ["PREFECT_HOME"])
    home.mkdir(parents=True)
    (home / "profiles.toml").write_text('active = "work"\n')
    assert not server._launch_here()


def test_no_launch_once_prefect_is_imported(plain_env, monkeypatch):
    # Prefect reads its settings when imported: too late to set the API URL (a stand-in module, not a second import)
    monkeypatch.setitem(sys.modules, "prefect", types.ModuleType("prefect"))
    assert not server._launch_here()


_CHILD = textwrap.dedent(
    """
    import json, os, sys, time
    from fitaudit.flows import _env
    _env.configure_prefect()
    from fitaudit.flows.server import start_embedded_server, tracked_servers
    seen = {}
    def prepare():
        seen["prefect imported while the server starts"] = "prefect" in sys.modules
        import fitaudit.flows.audit  # noqa: F401
    url = start_embedded_server(prepare)
    from prefect.client.orchestration import get_client
    with get_client(sync_client=True) as client:
        client.hello()
        seen["client url"] = str(client.api_url)
        seen["block types at start"] = len(client.read_block_types())
        from fitaudit.tasks.extracts.credentials import ObjectStoreCredentials
        ObjectStoreCredentials(endpoint_url="http://127.0.0.1:9000").save("lab", overwrite=True)
        seen["block loaded"] = ObjectStoreCredentials.load("lab").endpoint_url
        seen["block types after a save"] = len(client.read_block_types())
    from fitaudit.flows.server import EMBEDDED_SERVER_SETTINGS
    (pid,) = [r["pid"] for r in tracked_servers()]
    environ = dict(
        item.split("=", 1) for item in open(f"/proc/{pid}/environ").read().split(chr(0)) if "=" in item
    )
    seen["server settings"] = {k: environ.get(k) for k in EMBEDDED_SERVER_SETTINGS}
    print(json.dumps({**seen, "url": url, "env": os.environ.get("PREFECT_API_URL"), "records": tracked_servers()}))
    """
)


@pytest.mark.server
def test_the_launched_server_answers_and_is_stopped_and_unrecorded_at_exit(tmp_path):
    import psutil

    env = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_")}
    proc = subprocess.run(
        [sys.executable, "-c", _CHILD], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300
    )
    assert proc.returncode == 0, proc.stderr[-3000:]
    out = json.loads(proc.stdout.strip().splitlines()[-1])
    assert out["prefect imported while the server starts"] is False
    assert out["url"] == out["env"] and out["client url"].rstrip("/") == out["url"]
    # no catalogue of block types written at the start (EMBEDDED_SERVER_SETTINGS), and a block still saves and loads
    assert out["block types at start"] == 0 and out["block types after a save"] == 1
    assert out["block loaded"] == "http://127.0.0.1:9000"
    assert out["server settings"] == {  # no automations either: the triggers and actions services are off
        "PREFECT_SERVER_REGISTER_BLOCKS_ON_START": "false",
        "PREFECT_SERVER_MEMOIZE_BLOCK_AUTO_REGISTRATION": "false",
        "PREFECT_SERVER_SERVICES_TRIGGERS_ENABLED": "false",
    }
    (record,) = out["records"]
    assert record["kind"] == "embedded" and out["url"] == f"http://127.0.0.1:{record['port']}/api"
    deadline = time.monotonic() + 30
    while psutil.pid_exists(record["pid"]) and psutil.Process(record["pid"]).status() != psutil.STATUS_ZOMBIE:
        assert time.monotonic() < deadline, "the embedded server still runs after the command exited"
        time.sleep(0.2)
    assert not list((tmp_path / ".prefect" / "fitaudit-servers").glob("*.json"))
    # a new database: the server made its schema, and the command remembers the revision it left
    memo = json.loads((tmp_path / ".prefect" / "fitaudit-schema.json").read_text())
    assert memo["revision"] and memo["prefect"]
    again = subprocess.run(  # a second start skips the check (tested below) and works as the first
        [sys.executable, "-c", _CHILD], cwd=tmp_path, env=env, capture_output=True, text=True, timeout=300
    )
    assert again.returncode == 0, again.stderr[-3000:]
    assert json.loads(again.stdout.strip().splitlines()[-1])["block loaded"] == "http://127.0.0.1:9000"
    assert json.loads((tmp_path / ".prefect" / "fitaudit-schema.json").read_text()) == memo


def _accepted_nodelay(listener: socket.socket) -> int:
    """TCP_NODELAY of a connection accepted as uvicorn accepts on a handed-over descriptor."""
    wrapped = socket.fromfd(listener.fileno(), socket.AF_UNIX, socket.SOCK_STREAM)  # uvicorn's --fd wrapping
    with wrapped, socket.create_connection(listener.getsockname()):
        conn, _ = wrapped.accept()
        with conn:
            return conn.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY)


def test_connections_to_the_launched_server_do_not_wait_for_acknowledgements():
    """asyncio leaves Nagle's algorithm on for a socket it takes for a Unix socket, and each API
    answer then waited ~40 ms for the delayed acknowledgement; the listener passes TCP_NODELAY on."""
    with server._loopback_listener() as listener:
        assert _accepted_nodelay(listener) != 0
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as plain:  # the same without the option: Nagle on
        plain.bind(("127.0.0.1", 0))
        plain.listen(1)
        assert _accepted_nodelay(plain) == 0


def test_runs_on_the_embedded_server_send_no_heartbeats_a_users_server_keeps_them(monkeypatch):
    """flows/server.py embedded_server: Prefect's heartbeat thread made every run's end wait
    up to a second; only runs on the command's own embedded server go without it."""
    import argparse

    from prefect.settings import get_current_settings

    from fitaudit.flows import cli

    default = get_current_settings().flows.heartbeat_frequency
    assert default is not None  # Prefect 3 sends heartbeats by default
    args = argparse.Namespace(start_server=False, dask=None)
    monkeypatch.delenv("PREFECT_API_URL", raising=False)
    monkeypatch.setattr(server, "start_embedded_server", lambda prepare=None: "http://127.0.0.1:1/api")
    with cli._server_if_needed(args, "fitaudit.flows.audit") as url:
        assert url == "http://127.0.0.1:1/api"
        assert get_current_settings().flows.heartbeat_frequency is None
    assert get_current_settings().flows.heartbeat_frequency == default
    monkeypatch.setenv("PREFECT_API_URL", "http://127.0.0.1:4200/api")  # a server of the user's
    with cli._server_if_needed(args, "fitaudit.flows.audit") as url:
        assert url == "http://127.0.0.1:4200/api"
        assert get_current_settings().flows.heartbeat_frequency == default


def test_the_command_imports_its_flows_and_the_flow_process_modules_while_the_server_starts():
    code = textwrap.dedent(
        """
        import json, sys
        from fitaudit.flows.server import WARM_IMPORTS, command_imports
        command_imports("fitaudit.flows.audit")
        print(json.dumps({m: m in sys.modules for m in ("fitaudit.flows.audit", *WARM_IMPORTS, "scipy.stats")}))
        """
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    loaded = json.loads(out.stdout)
    assert loaded == {
        "fitaudit.flows.audit": True,
        "scipy.special": True,
        "fitaudit.tasks.report": True,
        "prefect.task_engine": True,
        "scipy.stats": False,  # the worker processes compute with it, not the flow process
    }


def test_a_command_that_audits_starts_its_workers_while_the_embedded_server_starts(monkeypatch):
    """flows/cli.py: `run` and `backfill` start the worker processes their runs will ask for during
    the server's start (flows/audit.py start_workers_early); other commands start none."""
    import argparse

    import fitaudit.flows.audit as audit
    from fitaudit.flows import cli

    started: list[int] = []
    monkeypatch.delenv("PREFECT_API_URL", raising=False)
    monkeypatch.setattr(server, "command_imports", lambda module: None)
    monkeypatch.setattr(audit, "start_workers_early", started.append)

    def start(prepare=None):
        prepare()
        return "http://127.0.0.1:1/api"

    monkeypatch.setattr(server, "start_embedded_server", start)
    args = argparse.Namespace(start_server=False, dask=None)
    with cli._server_if_needed(args, "fitaudit.flows.audit", 1000):
        pass
    with cli._server_if_needed(args, "fitaudit.flows.demo"):
        pass
    assert started == [1000]


def test_the_workers_a_run_asks_for_follow_the_processes_setting():
    from fitaudit.flows.audit import AUTO_PROCESSES_MIN_MODELS, _requested_processes
    from fitaudit.tasks.workers import default_processes

    assert _requested_processes(0, AUTO_PROCESSES_MIN_MODELS) == default_processes()  # every CPU
    assert _requested_processes(0, AUTO_PROCESSES_MIN_MODELS - 1) == 1  # a small run computes in place
    assert _requested_processes(3, 10) == 3  # as set


def _schema_db(home: pathlib.Path, revision: str) -> None:
    import sqlite3

    home.mkdir(parents=True, exist_ok=True)
    with sqlite3.connect(home / "prefect.db") as con:
        con.execute("CREATE TABLE IF NOT EXISTS alembic_version (version_num VARCHAR(32) NOT NULL)")
        con.execute("DELETE FROM alembic_version")
        con.execute("INSERT INTO alembic_version VALUES (?)", (revision,))


def test_the_schema_check_is_skipped_only_at_the_revision_this_prefect_left(plain_env, monkeypatch):
    from fitaudit.flows import server_process

    home = plain_env / ".prefect"
    MIGRATE = server_process.MIGRATE
    started = []  # the schema-check setting in force when uvicorn would have started
    monkeypatch.setattr(sys, "argv", list(sys.argv))  # main() sets uvicorn's command line there
    monkeypatch.setattr(server_process, "collector_paused", contextlib.nullcontext)  # no gc.freeze in pytest
    monkeypatch.setattr(server_process.importlib, "import_module", lambda name: None)
    monkeypatch.setattr(server_process.runpy, "run_module", lambda *a, **k: started.append(os.environ.get(MIGRATE)))

    def check_skipped() -> bool:  # what the server process decides at its start
        monkeypatch.delenv(MIGRATE, raising=False)
        server_process.main([])
        return started.pop() == "false"

    assert not check_skipped()  # no database yet
    _schema_db(home, "3b86c5ea017a")
    assert not check_skipped()  # a database, but no record of a check
    server_process.remember_schema()
    assert check_skipped()
    _schema_db(home, "aaaaaaaaaaaa")  # another revision (another Prefect version wrote it): check again
    assert not check_skipped()
    server_process.remember_schema()
    assert check_skipped()
    memo = json.loads((home / "fitaudit-schema.json").read_text())
    (home / "fitaudit-schema.json").write_text(json.dumps({**memo, "prefect": "0.0.1"}))  # Prefect upgraded
    assert not check_skipped()
    server_process.remember_schema()
    monkeypatch.setenv("PREFECT_SERVER_DATABASE_CONNECTION_URL", "postgresql+asyncpg://db/prefect")
    assert not check_skipped()  # a database of the user's: never skipped
    monkeypatch.delenv("PREFECT_SERVER_DATABASE_CONNECTION_URL")
    monkeypatch.setenv(MIGRATE, "true")
    server_process.main([])
    assert started.pop() == "true"  # the user's own setting wins
