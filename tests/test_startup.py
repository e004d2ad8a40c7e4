"""The commands that need no Prefect do not import it (``verify``, ``signoff``, ``promote`` and
``--help`` not numpy either; ``registry check`` builds every model spec, which needs numpy but not
scipy: core imports scipy's modules on first use, core/_scipy.py).

Each command runs in a fresh interpreter, the way the ``fitaudit`` script starts it, and reports
which heavy libraries ended up in ``sys.modules``.  Start-up *time* is measured in bench/startup.py,
never asserted here.
"""

from __future__ import annotations

import json
import pathlib
import subprocess
import sys

import pytest

EXAMPLE_REGISTRY = pathlib.Path(__file__).resolve().parents[1] / "examples" / "registry.yaml"

_PROBE = """
import json, sys
from fitaudit.flows.cli import main
try:
    rc = main(sys.argv[1:])
except SystemExit as exc:
    rc = exc.code
print(json.dumps({"rc": rc, "loaded": sorted(m for m in ("prefect", "numpy", "scipy", "pandas") if m in sys.modules)}))
"""


def _probe(args: list[str], cwd: pathlib.Path) -> dict:
    done = subprocess.run([sys.executable, "-c", _PROBE, *args], cwd=cwd, capture_output=True, text=True, timeout=300)
    return json.loads(done.stdout.strip().splitlines()[-1])


@pytest.fixture
def archive(tmp_path: pathlib.Path) -> pathlib.Path:
    folder = tmp_path / "archive"
    folder.mkdir()
    return folder


def test_registry_check_does_not_import_prefect_or_scipy(tmp_path):
    out = _probe(["registry", "check", str(EXAMPLE_REGISTRY)], tmp_path)
    assert out["rc"] == 0  # the annotated example registry is valid
    assert out["loaded"] == ["numpy"]  # model specs, noise laws and settings are built without scipy or Prefect


def test_registry_check_from_the_environment_setting_does_not_import_prefect(tmp_path, monkeypatch):
    """With no registry argument the path comes from the ``registry_path`` setting; its environment
    variable (the highest-priority source of Prefect's settings) is read without loading Prefect."""
    monkeypatch.setenv("PREFECT_INTEGRATIONS_FITAUDIT_REGISTRY_PATH", str(EXAMPLE_REGISTRY))
    out = _probe(["registry", "check"], tmp_path)
    assert out["rc"] == 0  # the example registry, found through the setting
    assert out["loaded"] == ["numpy"]


def test_verify_does_not_import_prefect(tmp_path, archive):
    out = _probe(["verify", str(archive)], tmp_path)
    assert out["rc"] == 0  # an empty archive folder is intact
    assert out["loaded"] == []  # neither Prefect nor numpy, scipy or pandas: the archive is files and hashes


@pytest.mark.parametrize(
    "args",
    [
        ["signoff", "{archive}", "no-such-run", "--name", "A. Reviewer", "--role", "test"],
        ["promote", "{archive}", "no-such-model", "2", "--by", "A. Reviewer", "--note", "test"],
    ],
    ids=["signoff", "promote"],
)
def test_signoff_and_promote_do_not_import_prefect(tmp_path, archive, args):
    out = _probe([a.format(archive=archive) for a in args], tmp_path)
    assert out["rc"] == 1  # refused: no such run or version (their imports come first, so all are loaded)
    assert out["loaded"] == []


def test_help_loads_no_heavy_library(tmp_path):
    out = _probe(["--help"], tmp_path)
    assert out["rc"] == 0
    assert out["loaded"] == []


def test_verify_inside_an_archive_leaves_nothing_behind(tmp_path):
    """`fitaudit verify` run from inside a run folder must not create Prefect's home there: the
    folder would be an added file of the run (found while auditing the demo archive)."""
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_")}
    code = "import sys; from fitaudit.flows.cli import main; sys.exit(main(['verify', sys.argv[1]]))"
    subprocess.run([sys.executable, "-c", code, str(tmp_path)], cwd=tmp_path, env=env, capture_output=True, timeout=120)
    assert not (tmp_path / ".prefect").exists()
