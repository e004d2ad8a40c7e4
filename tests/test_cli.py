"""The ``fitaudit`` command line: help, exit codes, registry check, verify, serve guard, run."""

from __future__ import annotations

import os
import pathlib
import subprocess
import sys

import pytest

from fitaudit.demo import DEMO_AS_OF, write_demo
from fitaudit.flows.cli import EXIT_FAIL_ON, EXIT_OK, EXIT_USAGE, EXIT_VERIFY, build_parser, main

COMMANDS = [
    ["demo"],
    ["run"],
    ["refit"],
    ["backfill"],
    ["serve"],
    ["verify"],
    ["registry", "check"],
    ["registry", "schema"],
    ["promote"],
    ["signoff"],
]


@pytest.mark.parametrize("cmd", COMMANDS, ids=lambda c: " ".join(c))
def test_every_command_has_help(cmd, capsys):
    with pytest.raises(SystemExit) as exc:
        build_parser().parse_args([*cmd, "--help"])
    assert exc.value.code == 0
    out = capsys.readouterr().out
    assert "usage: fitaudit " + " ".join(cmd) in out


def test_top_level_help_lists_commands_and_exit_codes(capsys):
    with pytest.raises(SystemExit):
        build_parser().parse_args(["--help"])
    out = capsys.readouterr().out
    for name in ("demo", "run", "refit", "serve", "verify", "registry"):
        assert name in out
    assert "Exit codes" in out


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    return write_demo(tmp_path_factory.mktemp("cli-demo"))


def test_registry_check_lists_every_problem_with_file_and_line(demo, capsys):
    assert main(["registry", "check", demo["registry"]]) == EXIT_USAGE  # the demo plants one bad entry
    out = capsys.readouterr().out
    assert "registry.yaml:" in out and "noise" in out and "'gaussian'" in out


def test_registry_check_valid(tmp_path, demo, capsys):
    text = pathlib.Path(demo["registry"]).read_text()
    cut = text.index("  - id: demand-d-40-legacy")
    good = tmp_path / "registry.yaml"
    good.write_text(text[:cut])
    (tmp_path / "data").symlink_to(pathlib.Path(demo["data"]))
    assert main(["registry", "check", str(good)]) == EXIT_OK
    assert "valid" in capsys.readouterr().out


def test_registry_schema_prints_a_json_schema_the_demo_registry_meets(demo, capsys):
    import json

    import jsonschema
    import yaml

    assert main(["registry", "schema"]) == EXIT_OK
    schema = json.loads(capsys.readouterr().out)
    jsonschema.Draft202012Validator.check_schema(schema)  # source: jsonschema's draft 2020-12 metaschema
    validator = jsonschema.Draft202012Validator(schema)
    document = json.loads(json.dumps(yaml.safe_load(pathlib.Path(demo["registry"]).read_text()), default=str))
    # the demo's one planted bad entry ('gaussian' is no noise law) is the only complaint, as with `registry check`
    errors = list(validator.iter_errors(document))
    assert len(errors) == 1 and "'gaussian'" in jsonschema.exceptions.best_match(errors).message
    assert [m["id"] for m in document["models"]][list(errors[0].absolute_path)[1]] == "demand-d-40-legacy"


def test_registry_defaults_to_the_registry_path_setting(demo, monkeypatch, capsys):
    monkeypatch.setenv("PREFECT_INTEGRATIONS_FITAUDIT_REGISTRY_PATH", demo["registry"])
    assert main(["registry", "check"]) == EXIT_USAGE  # the same problems as with the file named
    out = capsys.readouterr().out
    assert "registry.yaml:" in out and "'gaussian'" in out


def test_a_missing_default_registry_is_explained(tmp_path, monkeypatch, capsys):
    monkeypatch.setenv("PREFECT_INTEGRATIONS_FITAUDIT_REGISTRY_PATH", str(tmp_path / "absent.yaml"))
    assert main(["run", "--as-of", "2026-11-30"]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert "no registry given" in err and "absent.yaml" in err and "PREFECT_INTEGRATIONS_FITAUDIT_REGISTRY_PATH" in err


def test_serve_without_a_server_explains_what_is_needed(demo, monkeypatch, capsys):
    monkeypatch.delenv("PREFECT_API_URL", raising=False)
    assert main(["serve", demo["registry"]]) == EXIT_USAGE
    err = capsys.readouterr().err
    assert "long-lived Prefect server" in err and "PREFECT_API_URL" in err and "--start-server" in err


@pytest.mark.server
def test_run_and_verify_through_the_command(demo, prefect_server, tmp_path):
    env = dict(os.environ, PREFECT_API_URL=prefect_server)
    archive = demo["archive"]
    cmd = [
        sys.executable,
        "-m",
        "fitaudit.flows.cli",
        "run",
        demo["registry"],
        "--archive",
        archive,
        "--as-of",
        DEMO_AS_OF.isoformat(),
        "--models",
        "demand-d-02",
        "demand-d-31",
    ]
    ok = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600)
    assert ok.returncode == EXIT_OK, ok.stderr
    assert "report: " in ok.stdout and "error 1" in ok.stdout
    assert "ERROR" not in ok.stderr and "Traceback" not in ok.stderr
    failing = subprocess.run(
        [*cmd, "--fail-on", "error,respecify", "--quiet"], env=env, capture_output=True, text=True, timeout=600
    )
    assert failing.returncode == EXIT_FAIL_ON
    assert failing.stdout.strip().endswith("index.html")
    assert main(["verify", archive]) == EXIT_OK
    manifest = next(pathlib.Path(archive, "runs").rglob("manifest.json"))
    manifest.chmod(0o644)
    manifest.write_bytes(manifest.read_bytes().replace(b'"operator"', b'"0perator"', 1))
    assert main(["verify", archive]) == EXIT_VERIFY


def _bad_registry(demo, tmp_path) -> pathlib.Path:
    """The demo registry without the policy's justification (a registry-level problem), next to the demo's data."""
    text = pathlib.Path(demo["registry"]).read_text()
    bad = tmp_path / "registry.yaml"
    bad.write_text(text.replace("  justification: >-", "  justificatio: >-", 1))
    (tmp_path / "data").symlink_to(pathlib.Path(demo["data"]))
    return bad


def test_a_bad_registry_exits_2_before_any_flow_starts(demo, tmp_path, monkeypatch, capsys):
    import fitaudit.flows.cli as cli

    bad = _bad_registry(demo, tmp_path)

    def no_server(args):
        raise AssertionError("a Prefect server (and so a flow run) was started for a registry that cannot be used")

    monkeypatch.setattr(cli, "_server_if_needed", no_server)
    for command in (
        ["run", str(bad)],
        ["refit", str(bad), "--model", "demand-d-07"],
        ["backfill", str(bad), "--start", "2026-11-02", "--end", "2026-11-30"],
    ):
        assert main([*command, "--archive", str(tmp_path / "archive")]) == EXIT_USAGE
        err = capsys.readouterr().err
        assert f"{bad}:" in err and "policy.justification: missing" in err and "Traceback" not in err
    # the whole output of the command: a few lines, no traceback
    done = subprocess.run(
        [sys.executable, "-m", "fitaudit.flows.cli", "run", str(bad), "--archive", str(tmp_path / "archive")],
        env=dict(os.environ, PREFECT_HOME=str(tmp_path / "prefect")),
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == EXIT_USAGE and "Traceback" not in done.stderr and len(done.stderr.splitlines()) <= 4, (
        done.stderr
    )
    assert not (tmp_path / "archive").exists()  # nothing was started


def test_a_registry_problem_is_never_retried():
    from prefect.states import Failed

    from fitaudit.tasks.registry import RegistryError, load_registry_task
    from fitaudit.tasks.registry.loader import _transient

    assert load_registry_task.retry_condition_fn is _transient and load_registry_task.retries == 2
    assert (
        _transient(load_registry_task, None, Failed(data=RegistryError([]))) is False
    )  # a registry problem fails at once
    assert (
        _transient(load_registry_task, None, Failed(data=OSError(5, "Input/output error"))) is True
    )  # a file share that hiccups


@pytest.mark.server
def test_run_logs_reach_the_prefect_api_under_a_telling_name(prefect_server, tmp_path):
    import asyncio

    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterName, LogFilter, LogFilterFlowRunId
    from prefect.client.schemas.sorting import FlowRunSort

    env = dict(
        os.environ, PREFECT_API_URL=prefect_server, PREFECT_HOME=str(tmp_path / "prefect")
    )  # a fresh home: fitaudit writes its logging.yml
    env.pop("PREFECT_LOGGING_CONFIG_PATH", None)
    own = write_demo(tmp_path / "demo")  # the module's demo archive is altered on purpose by the verify test
    cmd = [
        sys.executable,
        "-m",
        "fitaudit.flows.cli",
        "run",
        own["registry"],
        "--archive",
        own["archive"],
        "--as-of",
        DEMO_AS_OF.isoformat(),
        "--models",
        "demand-d-02",
    ]
    done = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600)
    assert done.returncode == EXIT_OK, done.stderr
    assert " INFO " not in done.stderr  # the console stays quiet: INFO goes to the API only
    run_id = done.stdout.split()[1]
    name = f"audit {DEMO_AS_OF.isoformat()} registry.yaml, 1 model"  # a run of some models says so

    async def read():
        async with get_client() as client:
            runs = await client.read_flow_runs(
                flow_run_filter=FlowRunFilter(name=FlowRunFilterName(any_=[name])),
                sort=FlowRunSort.START_TIME_DESC,
                limit=1,
            )
            logs = await client.read_logs(
                log_filter=LogFilter(flow_run_id=LogFilterFlowRunId(any_=[runs[0].id])), limit=200
            )
            return runs[0], logs

    flow_run, logs = asyncio.run(read())
    assert flow_run.state.is_completed()
    messages = [(log.level, log.message, log.task_run_id) for log in logs]
    assert all(level >= 20 for level, _, _ in messages)  # INFO and above (logging.INFO = 20)
    assert any(
        f"audit {run_id} as of {DEMO_AS_OF.isoformat()}" in m for _, m, _ in messages
    )  # the flow's own summary line
    assert any(task is not None and "batch " in m for _, m, task in messages)  # a task run's line
    assert any("chain head" in m for _, m, _ in messages)  # the publication names the head it made


def test_flows_stop_after_the_policys_timeout(demo):
    from fitaudit.flows.audit import audit_flow
    from fitaudit.flows.cli import _timeout
    from fitaudit.tasks.registry import load_registry

    reg = load_registry(demo["registry"])
    assert (
        reg.policy.flow_timeout_minutes == 240
    )  # source: the registry schema's default (tasks/registry/schema.py Policy)
    assert _timeout(audit_flow, reg).timeout_seconds == 240 * 60
    assert _timeout(audit_flow, reg, scale=5).timeout_seconds == 5 * 240 * 60  # a backfill of five dates
    assert audit_flow.timeout_seconds is None  # the decorated flow itself is left as it is
