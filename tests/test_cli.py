"""The ``fitaudit`` command line: help, exit codes, registry check, verify, serve guard, run."""

from __future__ import annotations

import os
import pathlib
import subprocess
import sys

import pytest

from fitaudit.flows.cli import EXIT_FAIL_ON, EXIT_OK, EXIT_USAGE, EXIT_VERIFY, build_parser, main
from fitaudit.tasks.demo import DEMO_AS_OF, write_demo

COMMANDS = [["demo"], ["run"], ["refit"], ["backfill"], ["serve"], ["verify"], ["registry", "check"], ["registry", "schema"], ["promote"], ["signoff"]]


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
    cmd = [sys.executable, "-m", "fitaudit.flows.cli", "run", demo["registry"], "--archive", archive, "--as-of", DEMO_AS_OF.isoformat(), "--models", "demand-d-02", "demand-d-31"]
    ok = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=600)
    assert ok.returncode == EXIT_OK, ok.stderr
    assert "report: " in ok.stdout and "error 1" in ok.stdout
    assert "ERROR" not in ok.stderr and "Traceback" not in ok.stderr
    failing = subprocess.run([*cmd, "--fail-on", "error,respecify", "--quiet"], env=env, capture_output=True, text=True, timeout=600)
    assert failing.returncode == EXIT_FAIL_ON
    assert failing.stdout.strip().endswith("index.html")
    assert main(["verify", archive]) == EXIT_OK
    manifest = next(pathlib.Path(archive, "runs").rglob("manifest.json"))
    manifest.chmod(0o644)
    manifest.write_bytes(manifest.read_bytes().replace(b'"operator"', b'"0perator"', 1))
    assert main(["verify", archive]) == EXIT_VERIFY
