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


#: A local worker process (fitaudit.tasks.workers) as it runs: each call arrives pickled (a
#: function by module and name, plain arguments), is unpickled, which imports the function's
#: module and the arguments' classes, and runs.  Reports the flow's libraries that got loaded.
_WORKER = """
import json, pickle, sys
for call in sys.argv[1:]:
    with open(call, "rb") as fh:
        fn, args = pickle.load(fh)
    fn(*args)
print(json.dumps(sorted(m for m in ("prefect", "pyarrow", "pandas", "fsspec") if m in sys.modules)))
"""

_FLOW_LIBRARIES = ("prefect", "pyarrow", "pandas", "fsspec")


def _loaded_after_import(module: str, libraries: tuple[str, ...]) -> list[str]:
    code = (
        f"import importlib, json, sys; importlib.import_module({module!r}); "
        f"print(json.dumps(sorted(m for m in {libraries!r} if m in sys.modules)))"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_the_audit_work_module_loads_none_of_the_flows_libraries():
    """The module of the audit's plain functions, which a local worker imports to audit a batch or
    search candidates, loads neither Prefect, pyarrow, pandas, fsspec nor Jinja2; nor does its
    package, whose ``@task`` wrappers load on first use."""
    libraries = (*_FLOW_LIBRARIES, "jinja2")
    assert _loaded_after_import("fitaudit.tasks.audit.work", libraries) == []
    assert _loaded_after_import("fitaudit.tasks.audit", libraries) == []
    assert _loaded_after_import("fitaudit.tasks.audit.task", ("prefect",)) == ["prefect"]  # the wrappers do


def test_a_local_worker_audits_and_renders_a_batch_without_the_flows_libraries(tmp_path):
    """What the batch tasks hand a local worker, run as the worker runs it (warm-up, the audit of a
    staged batch, the records and pages of its outcomes), loads neither Prefect, pyarrow, pandas nor
    fsspec: a worker holds the work's libraries only (docs/architecture.md §1.2)."""
    import pickle

    import numpy as np

    sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))  # tests/: fleet_fixtures
    from fleet_fixtures import AS_OF, Fleet, ar1, days, long_table, write_parquet

    from fitaudit.tasks.audit import audit_batch_spilled, finalize
    from fitaudit.tasks.batches import stage_inputs
    from fitaudit.tasks.outcomes import render_parcels, render_pickled
    from fitaudit.tasks.registry import load_registry
    from fitaudit.tasks.results import results_head
    from fitaudit.tasks.workers import _warm

    rng = np.random.default_rng(11)
    fleet = Fleet(tmp_path)
    write_parquet(tmp_path / "data" / "x.parquet", long_table({k: {"date": days(), "y": ar1(rng)} for k in "ab"}))
    fleet.source("x", "data/x.parquet")
    for k in "ab":
        fleet.model(f"m-{k}", "x", k)
    reg = load_registry(fleet.write())
    (batch,) = stage_inputs(reg, AS_OF, tmp_path / "work").batches
    light = finalize(audit_batch_spilled(batch.path, reg.policy), reg.policy)  # the flow's side of the run
    (parcel,), (name,), (spilled,) = render_parcels(light, [light], [batch.path])
    head = results_head(
        as_of=AS_OF.isoformat(), registry={"path": "registry.yaml", "sha256": reg.sha256}, policy={}, tool_version="0"
    )
    meta = {
        "run_id": "20260828-T010203Z-abcd",
        "started_utc": "2026-08-28T01:02:03Z",
        "finished_utc": "2026-08-28T01:04:00Z",
        "operator": "test",
        "tool_version": "0",
        "code_commit": "292b527",
        "prefect_version": "3",
    }
    pages = tmp_path / "pages"
    calls = []
    for i, call in enumerate(
        [
            (_warm, ()),
            (audit_batch_spilled, (batch.path, reg.policy, None, 0.0)),
            (render_pickled, (parcel, head, meta, str(pages), name, spilled)),
        ]
    ):
        calls.append(tmp_path / f"call-{i}.pickle")
        calls[-1].write_bytes(pickle.dumps(call))
    done = subprocess.run(
        [sys.executable, "-c", _WORKER, *map(str, calls)], capture_output=True, text=True, timeout=600
    )
    assert done.returncode == 0, done.stderr
    assert sorted(p.name for p in (pages / "models").iterdir()) == ["m-a.html", "m-b.html"]  # the work was done
    assert json.loads(done.stdout.strip().splitlines()[-1]) == []


_WORKER_PROBE = """
import json, sys
import numpy as np
from fitaudit.core._scipy import warm_imports
from fitaudit.core.audit import audit_series
from fitaudit.core.settings import AuditSettings

warm_imports()  # what a local worker process does before its first batch (tasks/workers.py)
rng = np.random.default_rng(7)
y = 50.0 + np.cumsum(rng.normal(size=400)) * 0.1 + 3.0 * np.sin(np.arange(400) * 2 * np.pi / 7)
settings = AuditSettings(replicates=99)
specs = [
    {"family": "arima", "order": [1, 0, 0], "trend": "c"},  # no MA part: the CSS Jacobian filters with a = [1]
    {"family": "arima", "order": [1, 0, 1], "seasonal": [0, 1, 1, 7]},
    {"family": "smoothing", "trend": "add", "damped": True, "seasonal": "add", "period": 7},
]
verdicts = [audit_series(y, spec, noise="normal", production=None, settings=settings).verdict for spec in specs]
loaded = sorted(m for m in ("scipy.signal", "scipy.stats", "scipy.integrate") if m in sys.modules)
import scipy.signal  # later, as usual: the package and its compiled module as scipy leaves them
from fitaudit.core._scipy import lfilter
b, a = np.array([1.0, 0.3]), np.array([1.0, -0.6, 0.2])
usual = hasattr(scipy.signal, "_sigtools") and np.array_equal(lfilter(b, a, y), scipy.signal.lfilter(b, a, y))
print(json.dumps({"verdicts": verdicts, "loaded": loaded, "usual": bool(usual)}))
"""


def test_a_workers_fits_and_checks_import_neither_scipy_signal_nor_stats():
    """A local worker imports only what the fits and checks use (core/_scipy.py ``warm_imports``):
    the ARIMA and smoothing fits reach scipy's compiled filter without the ``scipy.signal`` package,
    whose imports (``scipy.stats`` among them) took 0.4-0.7 s of each worker's start."""
    done = subprocess.run([sys.executable, "-c", _WORKER_PROBE], capture_output=True, text=True, timeout=300)
    out = json.loads(done.stdout.strip().splitlines()[-1])
    assert len(out["verdicts"]) == 3 and "error" not in out["verdicts"]
    assert out["loaded"] == []
    assert out["usual"]  # source: scipy.signal.lfilter, imported afterwards the usual way
