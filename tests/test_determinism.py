"""Determinism: the same registry, extract, as-of date and seed give byte-identical ``results.json``.

One small fleet produces every verdict kind (pass, refit, respecify, insufficient, error and a
rejected registry entry) with ARIMA, exponential smoothing and SETAR models.  Its ``results.json``
must not change between runs, archives, batch sizes, the number of worker threads, or the
interpreter's hash seed (a separate process); run ids, clock times and timings belong to the
manifest only.  A different policy seed must change the document (so the comparison can fail).
tests/test_flows.py compares the Dask runner with the default one.
"""

from __future__ import annotations

import json
import os
import pathlib
import re
import shutil
import subprocess
import sys

import numpy as np
import pytest

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))  # tests/: fleet_fixtures
from fleet_fixtures import (  # noqa: E402
    AR1,
    AS_OF,
    AUDIT,
    N_DAYS,
    Fleet,
    ar1,
    days,
    fitted_params,
    long_table,
    promote_production,
    write_parquet,
)

from fitaudit.core.vocabulary import VERDICTS  # noqa: E402

pytestmark = pytest.mark.server

SMOOTHING = {"family": "smoothing", "trend": None, "seasonal": "add", "period": 7}
SETAR = {"family": "nonlinear-ar", "function": "setar", "lags": [1]}


def _write_fleet(root: pathlib.Path, seed: int = 8) -> Fleet:
    rng = np.random.default_rng(20261005)
    archive = root / "archive-template"
    fleet = Fleet(root)
    fleet.policy["seed"] = seed
    t = days()
    weekly = np.tile([1.5, 1.0, 0.5, 0.0, -0.5, -1.0, -1.5], N_DAYS // 7 + 1)[:N_DAYS]
    heavy = 50.0 + rng.standard_t(2.2, N_DAYS)
    series = {
        "pass": ar1(rng),
        "refit": ar1(rng),
        "respecify": np.round(heavy, 3),
        "smoothing": np.round(50.0 + weekly + rng.normal(0, 0.5, N_DAYS), 3),
        "setar": ar1(rng, phi=0.3),
        "short": ar1(rng)[-50:],
        "error": ar1(rng),
    }
    series["error"][N_DAYS - 3] = np.nan
    rows = {k: {"date": t[-len(y) :], "y": y} for k, y in series.items()}
    write_parquet(root / "data" / "fleet.parquet", long_table(rows))
    fleet.source("fleet", "data/fleet.parquet")
    fleet.model("det-pass", "fleet", "pass")
    fleet.model("det-refit", "fleet", "refit")
    fleet.model("det-respecify", "fleet", "respecify")
    fleet.model("det-smoothing", "fleet", "smoothing", spec=SMOOTHING)
    fleet.model("det-setar", "fleet", "setar", spec=SETAR)
    fleet.model("det-short", "fleet", "short")
    fleet.model("det-error", "fleet", "error")
    fleet.model("det-rejected", "fleet", "pass", colour="teal")
    promote_production(archive, "det-pass", dict(AR1), fitted_params(AR1, series["pass"][: N_DAYS - AUDIT]))
    shifted = fitted_params(AR1, series["refit"][: N_DAYS - AUDIT])
    shifted["intercept"] += 2.0  # the production level is off by about four standard deviations
    promote_production(archive, "det-refit", dict(AR1), shifted)
    fleet.write()
    return fleet


@pytest.fixture(scope="module")
def fleet_root(tmp_path_factory):
    root = tmp_path_factory.mktemp("determinism")
    _write_fleet(root)
    return root


def _archive(root: pathlib.Path, name: str) -> str:
    target = root / name
    shutil.copytree(root / "archive-template", target)
    return str(target)


def _run(root: pathlib.Path, archive_name: str, **options) -> tuple[bytes, dict]:
    from fitaudit.flows.audit import audit_flow

    flow = audit_flow.with_options(task_runner=options.pop("task_runner")) if "task_runner" in options else audit_flow
    run = flow(registry=str(root / "registry.yaml"), as_of=AS_OF, archive=_archive(root, archive_name), **options)
    folder = pathlib.Path(run["report"]).parent
    return (folder / "results.json").read_bytes(), json.loads((folder / "manifest.json").read_bytes())


@pytest.fixture(scope="module")
def reference(fleet_root, prefect_server):
    return _run(fleet_root, "archive-reference", batch_size=2)


def test_the_fleet_shows_every_verdict(reference):
    doc = json.loads(reference[0])
    verdicts = {m["id"]: m["verdict"] for m in doc["models"]}
    assert verdicts == {
        "det-pass": "pass",
        "det-refit": "refit",
        "det-respecify": "respecify",
        "det-smoothing": "pass",
        "det-setar": "pass",
        "det-short": "insufficient",
        "det-error": "error",
        "det-rejected": "error",
    }
    assert doc["summary"]["registered"] == sum(doc["summary"][v] for v in VERDICTS) == 8


def test_results_carry_no_run_id_clock_time_or_timing(fleet_root, reference):
    from fitaudit.tasks.params import production_version

    results, manifest = reference
    text = results.decode()
    assert manifest["run_id"] not in text
    assert str(fleet_root) not in text  # nor where the registry and extract live (det-rejected names its file and line)
    # the only clock times are the production versions' creation times: facts about the inputs
    inputs = {production_version(fleet_root / "archive-template", m).created_at for m in ("det-pass", "det-refit")}
    assert set(re.findall(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(?:\.\d+)?Z", text)) == inputs
    assert not re.search(r'"[a-z_]*(timings?|_s|elapsed|seconds)"\s*:', text)
    assert manifest["timings"]["total_s"] > 0 and manifest["timings"]["per_model"]  # they live in the manifest


@pytest.mark.parametrize(
    "options",
    [
        {"batch_size": 2},  # the same run again, into another archive
        {"batch_size": 1},
        {"batch_size": 0},  # automatic: one batch
    ],
    ids=["rerun", "batch-1", "batch-auto"],
)
def test_same_inputs_give_byte_identical_results(fleet_root, reference, options):
    results, manifest = _run(fleet_root, f"archive-{'-'.join(f'{k}{v}' for k, v in options.items())}", **options)
    assert results == reference[0]
    assert manifest["run_id"] != reference[1]["run_id"]


def test_one_worker_thread_gives_the_same_results(fleet_root, reference):
    from prefect.task_runners import ThreadPoolTaskRunner

    results, manifest = _run(
        fleet_root, "archive-one-thread", batch_size=1, task_runner=ThreadPoolTaskRunner(max_workers=1)
    )
    assert manifest["task_runner"] == "ThreadPoolTaskRunner"
    assert results == reference[0]


def test_a_rerun_into_the_same_archive_gives_the_same_results(fleet_root, reference, prefect_server):
    # the second run takes every null table from the archive's .tables folder instead of
    # simulating it (docs/architecture.md §2.4): the results must not change by a byte
    from fitaudit.flows.audit import audit_flow

    archive = _archive(fleet_root, "archive-twice")
    runs = [
        audit_flow(registry=str(fleet_root / "registry.yaml"), as_of=AS_OF, archive=archive, batch_size=2)
        for _ in range(2)
    ]
    assert [(pathlib.Path(r["report"]).parent / "results.json").read_bytes() for r in runs] == [reference[0]] * 2
    manifests = [json.loads((pathlib.Path(r["report"]).parent / "manifest.json").read_bytes()) for r in runs]
    prepared = [m["calibration_tables"] for m in manifests]
    assert prepared[0] == prepared[1] > 0
    assert [m["calibration_tables_reused"] for m in manifests] == [0, prepared[0]]
    assert len(list((pathlib.Path(archive) / ".tables").glob("*.npz"))) >= prepared[0]


def test_a_run_that_may_not_reuse_tables_keeps_none(fleet_root, reference, monkeypatch):
    monkeypatch.setenv("PREFECT_INTEGRATIONS_FITAUDIT_REUSE_NULL_TABLES", "false")
    results, manifest = _run(fleet_root, "archive-no-reuse", batch_size=2)
    assert results == reference[0] and manifest["calibration_tables_reused"] == 0
    assert not (fleet_root / "archive-no-reuse" / ".tables").exists()


def test_another_seed_changes_the_results(tmp_path, reference, prefect_server):
    _write_fleet(tmp_path, seed=9)
    results, _ = _run(tmp_path, "archive-seed-9", batch_size=2)
    assert results != reference[0]
    ours, theirs = json.loads(results), json.loads(reference[0])
    assert ours["run"]["policy"]["seed"] == 9 and theirs["run"]["policy"]["seed"] == 8


@pytest.mark.slow
def test_another_process_and_hash_seed_gives_the_same_results(fleet_root, reference, prefect_server):
    archive = _archive(fleet_root, "archive-subprocess")
    env = {**os.environ, "PREFECT_API_URL": prefect_server, "PYTHONHASHSEED": "12345"}
    cmd = [
        sys.executable,
        "-m",
        "fitaudit.flows.cli",
        "run",
        str(fleet_root / "registry.yaml"),
        "--archive",
        archive,
        "--as-of",
        AS_OF.isoformat(),
        "--batch-size",
        "3",
        "--quiet",
    ]
    out = subprocess.run(cmd, env=env, capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    report = pathlib.Path(out.stdout.strip().splitlines()[-1])
    assert (report.parent / "results.json").read_bytes() == reference[0]
