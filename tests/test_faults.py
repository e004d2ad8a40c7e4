"""Faults: the audit process killed mid-run, I/O failures reading an extract, crashing user code.

* ``fitaudit run`` is SIGKILLed at 20 seeded points spread over a run's duration (the shorter of
  two uninterrupted runs); after every kill only complete runs are visible (chained, or covered by
  their publication journal when the kill fell between the rename and the chain append) and
  ``verify_archive`` is clean, and a rerun gives ``results.json`` byte-identical to an
  uninterrupted run's.
* A pyarrow file system that raises ``OSError`` while files are opened stands for a network file
  system or object store: a transient failure is retried by the staging task (Prefect task
  retries) and the run succeeds; a persistent one gives the source's models ``error`` verdicts
  naming the source while the other source's models are audited.
* Mean functions of ``NonlinearAR`` that raise, exit or return NaN are contained to their model.
"""

from __future__ import annotations

import asyncio
import dataclasses
import errno
import json
import os
import pathlib
import re
import shutil
import signal
import subprocess
import sys
import threading
import time

import fsspec
import numpy as np
import pytest
from pyarrow.fs import FSSpecHandler, PyFileSystem

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))  # tests/: fleet_fixtures, nlar_functions
from fleet_fixtures import (  # noqa: E402
    AR1,
    AS_OF,
    AUDIT,
    AUDITED,
    N_DAYS,
    Fleet,
    ar1,
    days,
    fitted_params,
    long_table,
    promote_production,
    results_of,
    write_parquet,
)

from fitaudit.core.vocabulary import VERDICTS  # noqa: E402
from fitaudit.tasks import extracts  # noqa: E402
from fitaudit.tasks.archive import read_chain, verify_archive  # noqa: E402

pytestmark = pytest.mark.server


def _write_fleet(root: pathlib.Path, archive: pathlib.Path) -> Fleet:
    """Two sources ('steady', 'flaky') of AR(1) series, one production version, one bad series."""
    rng = np.random.default_rng(20260901)
    fleet = Fleet(root)
    steady = {f"s{i}": {"date": days(), "y": ar1(rng)} for i in range(1, 4)}
    steady["s3"]["y"][N_DAYS - 4] = np.nan  # one bad row: an error verdict in every run
    write_parquet(root / "data" / "steady.parquet", long_table(steady))
    write_parquet(
        root / "data" / "flaky.parquet", long_table({f"f{i}": {"date": days(), "y": ar1(rng)} for i in (1, 2)})
    )
    fleet.source("steady", "data/steady.parquet")
    fleet.source("flaky", "data/flaky.parquet")
    for key in steady:
        fleet.model(f"steady-{key}", "steady", key)
    for key in ("f1", "f2"):
        fleet.model(f"flaky-{key}", "flaky", key)
    promote_production(archive, "steady-s1", dict(AR1), fitted_params(AR1, steady["s1"]["y"][: N_DAYS - AUDIT]))
    fleet.write()
    return fleet


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    root = tmp_path_factory.mktemp("faults")
    return root, _write_fleet(root, root / "archive-template")


def _archive(root: pathlib.Path, name: str) -> pathlib.Path:
    """A fresh archive holding the fleet's parameter store."""
    target = root / name
    shutil.copytree(root / "archive-template", target)
    return target


# ------------------------------------------------------------------------------------------
# (a) SIGKILL of the command-line run
# ------------------------------------------------------------------------------------------
def _start_cli(root: pathlib.Path, archive: pathlib.Path, server: str, log) -> subprocess.Popen:
    env = {**os.environ, "PREFECT_API_URL": server}
    cmd = [
        sys.executable,
        "-m",
        "fitaudit.flows.cli",
        "run",
        str(root / "registry.yaml"),
        "--archive",
        str(archive),
        "--as-of",
        AS_OF.isoformat(),
        "--quiet",
    ]
    return subprocess.Popen(cmd, env=env, stdout=log, stderr=log, start_new_session=True)


def _assert_only_complete_runs(archive: pathlib.Path, reference: bytes) -> int:
    """Every visible run is chained, complete and has the reference results; returns their number."""
    assert verify_archive(archive) == []
    chained = {e["payload"]["path"] for e in read_chain(archive) if e["kind"] == "run"}
    visible = sorted((archive / "runs").glob("*/*")) if (archive / "runs").exists() else []
    # a kill between the folder's rename and its chain append leaves a complete folder that a run
    # journal covers (a "pending" note of verify; the next run's recover() chains it): allowed
    pending = " ".join(p.message for p in verify_archive(archive, include_notes=True) if p.kind == "pending")
    for folder in visible:
        journaled = f"publication of run {folder.name} was interrupted" in pending
        assert folder.relative_to(archive).as_posix() in chained or journaled, f"unchained run visible: {folder}"
        manifest = json.loads((folder / "manifest.json").read_bytes())
        assert {p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file()} == set(
            manifest["files"]
        ) | {"manifest.json"}
        assert (folder / "results.json").read_bytes() == reference, (
            f"{folder}: results differ from the uninterrupted run"
        )
    return len(visible)


@pytest.mark.slow
def test_sigkill_at_20_points_leaves_no_partial_run_and_a_rerun_matches(fleet, prefect_server, tmp_path):
    root, _ = fleet
    with open(tmp_path / "cli.log", "ab") as log:
        reference_archive = _archive(root, "archive-reference")
        durations = []
        for target in (reference_archive, _archive(root, "archive-timing")):  # the first run is cold
            t0 = time.monotonic()
            assert _start_cli(root, target, prefect_server, log).wait(timeout=300) == 0, (
                tmp_path / "cli.log"
            ).read_text()
            durations.append(time.monotonic() - t0)
        duration = min(durations)  # the killed runs are warm: a cold duration puts late points after their end
        (reference_run,) = sorted((reference_archive / "runs").glob("*/*"))
        reference = (reference_run / "results.json").read_bytes()

        archive = _archive(root, "archive-killed")
        rng = np.random.default_rng(20260828)
        killed = 0
        for i in range(20):  # one point in each twentieth of the run's duration
            point = (i + rng.uniform()) * duration / 20
            proc = _start_cli(root, archive, prefect_server, log)
            try:
                proc.wait(timeout=point)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)  # the process and anything it started
                killed += 1
            assert proc.wait(timeout=60) in (0, -signal.SIGKILL)
            _assert_only_complete_runs(archive, reference)
        assert killed >= 15, f"only {killed} of 20 runs were killed before they finished"

        before = _assert_only_complete_runs(archive, reference)
        assert _start_cli(root, archive, prefect_server, log).wait(timeout=300) == 0
    assert _assert_only_complete_runs(archive, reference) == before + 1
    assert (
        verify_archive(archive, include_notes=True) == []
    )  # the rerun's recovery settled every interrupted publication
    work = archive / ".work"  # scratch folders of the killed runs: removed by the rerun's recovery, its own at its end
    assert not (work.exists() and any(work.iterdir())), sorted(p.name for p in work.iterdir())


# ------------------------------------------------------------------------------------------
# (b) I/O failures while reading an extract
# ------------------------------------------------------------------------------------------
class FlakyFiles(FSSpecHandler):
    """Local files whose opening fails with a time-out ``failures`` times (-1: always)."""

    def __init__(self, failures: int):
        super().__init__(fsspec.filesystem("file"))
        self.failures = failures
        self.opened = 0

    def open_input_file(self, path):
        self.opened += 1
        if self.failures != 0:
            self.failures -= 1
            raise OSError(errno.ETIMEDOUT, "simulated time-out of the object store", path)
        return super().open_input_file(path)


@pytest.fixture
def flaky_source(monkeypatch):
    """Install a FlakyFiles file system under source 'flaky'; staging retries without delay."""
    from fitaudit.flows import audit as audit_module

    def install(failures: int) -> FlakyFiles:
        handler = FlakyFiles(failures)
        locate = extracts.stores._locate

        def flaky_locate(source, base_dir, io_errors="skip"):
            loc = locate(source, base_dir, io_errors)
            return dataclasses.replace(loc, fs=PyFileSystem(handler)) if source.name == "flaky" else loc

        monkeypatch.setattr(extracts.stores, "_locate", flaky_locate)
        stage = audit_module.stage_inputs_task
        assert stage.retries >= 2 and stage.retry_condition_fn is not None  # the production configuration
        monkeypatch.setattr(audit_module, "stage_inputs_task", stage.with_options(retry_delay_seconds=0))
        return handler

    return install


def test_read_series_raises_io_errors_for_retry_or_names_the_file(fleet, monkeypatch):
    from fitaudit.tasks.registry import load_registry

    root, _ = fleet
    source = load_registry(root / "registry.yaml").sources["flaky"]
    for mode, failures in (("raise", 1), ("skip", -1)):
        handler = FlakyFiles(failures)
        locate = extracts.stores._locate
        monkeypatch.setattr(
            extracts.stores,
            "_locate",
            lambda s, b, io_errors="skip", locate=locate, handler=handler: dataclasses.replace(
                locate(s, b, io_errors), fs=PyFileSystem(handler)
            ),
        )
        if mode == "raise":
            with pytest.raises(TimeoutError, match="simulated time-out"):
                extracts.read_series(source, ["f1"], ["y"], base_dir=root, io_errors="raise")
            assert (
                extracts.read_series(source, ["f1"], ["y"], base_dir=root, io_errors="raise")["f1"].time.size == N_DAYS
            )
        else:
            with pytest.raises(
                extracts.ExtractError,
                match=r"flaky\.parquet: could not be read .*Fix: check that the storage is reachable",
            ):
                extracts.read_series(source, ["f1"], ["y"], base_dir=root, io_errors="skip")
        monkeypatch.undo()


def _stage_task_runs(flow_run_id) -> list:
    """The flow run's staging task runs, oldest first (waits for the server to record them)."""
    from prefect.client.orchestration import get_client
    from prefect.client.schemas.filters import FlowRunFilter, FlowRunFilterId
    from prefect.client.schemas.sorting import TaskRunSort

    async def read():
        async with get_client() as client:
            runs = await client.read_task_runs(
                flow_run_filter=FlowRunFilter(id=FlowRunFilterId(any_=[flow_run_id])),
                sort=TaskRunSort.EXPECTED_START_TIME_ASC,
            )
            return [r for r in runs if r.name.startswith("stage-extracts")]

    for _ in range(60):
        runs = asyncio.run(read())
        if runs and all(r.state is not None and r.state.is_final() for r in runs):
            return runs
        time.sleep(0.5)
    return runs


def _run(fleet, archive: pathlib.Path) -> tuple[dict, dict, object]:
    from fitaudit.flows.audit import audit_flow

    root, _ = fleet
    state = audit_flow(registry=str(root / "registry.yaml"), as_of=AS_OF, archive=str(archive), return_state=True)
    run = state.result()
    return run, results_of(run), state.state_details.flow_run_id


def test_transient_read_failure_is_retried_and_the_run_succeeds(fleet, prefect_server, flaky_source):
    handler = flaky_source(failures=1)
    run, doc, flow_run_id = _run(fleet, _archive(fleet[0], "archive-transient"))
    verdicts = {m["id"]: m["verdict"] for m in doc["models"]}
    assert verdicts["flaky-f1"] in AUDITED and verdicts["flaky-f2"] in AUDITED
    assert handler.failures == 0 and handler.opened > 1  # it failed once, then was read
    (stage,) = _stage_task_runs(flow_run_id)
    assert (
        stage.run_count == 2 and stage.state.is_completed()
    )  # source: one failure, then one retry (stage_inputs_task retries=2)
    manifest = json.loads((pathlib.Path(run["report"]).parent / "manifest.json").read_text())
    assert manifest["source_errors"] == {} and "flaky" in manifest["inputs"]
    assert verify_archive(run["archive"]) == []


def test_persistent_read_failure_is_reported_on_the_source_models_only(fleet, prefect_server, flaky_source):
    handler = flaky_source(failures=-1)
    run, doc, flow_run_id = _run(fleet, _archive(fleet[0], "archive-persistent"))
    records = {m["id"]: m for m in doc["models"]}
    for model_id in ("flaky-f1", "flaky-f2"):
        message = " ".join(records[model_id]["reasons"])
        assert records[model_id]["verdict"] == "error"
        assert re.search(rf"model '{model_id}': source 'flaky' \(uri 'data/flaky\.parquet'", message), message
        assert re.search(
            r"flaky\.parquet: could not be read \(\[Errno 110\] simulated time-out of the object store", message
        ), message
        assert "check that the storage is reachable" in message
    assert records["steady-s1"]["verdict"] in AUDITED and records["steady-s2"]["verdict"] in AUDITED
    assert records["steady-s3"]["verdict"] == "error"  # its own bad row, as in every run
    runs = _stage_task_runs(flow_run_id)
    assert [r.run_count for r in runs] == [
        3,
        1,
    ]  # source: stage_inputs_task retries=2, then audit_flow stages once with os_errors="record"
    assert runs[0].state.is_failed() and runs[1].state.is_completed()
    assert handler.opened >= 4
    assert doc["summary"]["registered"] == sum(doc["summary"][v] for v in VERDICTS) == 5
    manifest = json.loads((pathlib.Path(run["report"]).parent / "manifest.json").read_text())
    assert set(manifest["source_errors"]) == {"flaky"}
    assert verify_archive(run["archive"]) == []


# ------------------------------------------------------------------------------------------
# (c) a crash inside one model's fit
# ------------------------------------------------------------------------------------------
CRASHES = {
    "nlar-raises": (
        "nlar_functions:broken",
        r"the mean function 'nlar_functions:broken' raised ValueError: division by the wrong column",
    ),
    "nlar-exits": ("fleet_fixtures:mean_exits", r"the mean function 'fleet_fixtures:mean_exits' raised SystemExit: 3"),
    "nlar-divides-by-zero": ("fleet_fixtures:mean_divides_by_zero", r"raised ZeroDivisionError"),
    "nlar-not-finite": ("fleet_fixtures:mean_not_finite", r"(not finite|non-finite|NaN)"),
    "nlar-wrong-shape": ("nlar_functions:wrong_length", r"returned shape \(197,\); expected \(198,\)"),
    "nlar-no-module": ("no_such_module_for_fitaudit:f", r"cannot import module 'no_such_module_for_fitaudit'"),
}


def test_crash_in_a_user_mean_function_is_contained_to_its_model(prefect_server, tmp_path):
    from fitaudit.flows.audit import audit_flow

    rng = np.random.default_rng(3)
    fleet = Fleet(tmp_path)
    series = {name: {"date": days(), "y": ar1(rng)} for name in [*CRASHES, "nlar-ok", "arima-ok"]}
    write_parquet(tmp_path / "data" / "main.parquet", long_table(series))
    fleet.source("main", "data/main.parquet")
    start = {"c": 25.0, "a1": 0.4, "a2": 0.1}
    for model_id, (function, _) in CRASHES.items():
        fleet.model(
            model_id,
            "main",
            model_id,
            spec={"family": "nonlinear-ar", "function": function, "lags": [1, 2], "start": start},
        )
    fleet.model(
        "nlar-ok",
        "main",
        "nlar-ok",
        spec={"family": "nonlinear-ar", "function": "nlar_functions:linear_ar2", "lags": [1, 2], "start": start},
    )
    fleet.model("arima-ok", "main", "arima-ok")
    fleet.write()
    run = audit_flow(registry=str(tmp_path / "registry.yaml"), as_of=AS_OF, archive=str(tmp_path / "archive"))
    doc = results_of(run)
    records = {m["id"]: m for m in doc["models"]}
    assert (
        run["timings"]
        and json.loads((pathlib.Path(run["report"]).parent / "manifest.json").read_text())["batches"] == 1
    )
    for model_id, (_, pattern) in CRASHES.items():
        message = " ".join(records[model_id]["reasons"])
        assert records[model_id]["verdict"] == "error", (model_id, message)
        assert f"model {model_id!r}" in message and re.search(pattern, message), (model_id, message)
    assert records["nlar-ok"]["verdict"] in AUDITED and records["arima-ok"]["verdict"] in AUDITED
    assert verify_archive(run["archive"]) == []
    # theta reaches the user's function in the order of `start` (c, a1, a2), whatever the staging
    # does to key order: the fit of linear_ar2 equals ordinary least squares (numpy.linalg.lstsq)
    y = series["nlar-ok"]["y"][-200:]
    ols = np.linalg.lstsq(np.column_stack([np.ones(198), y[1:-1], y[:-2]]), y[2:], rcond=None)[0]
    fitted = records["nlar-ok"]["audit"]["fitted"]["params"]
    np.testing.assert_allclose([fitted["c"], fitted["a1"], fitted["a2"]], ols, rtol=1e-5)


# ------------------------------------------------------------------------------------------
# (d) a user mean function that never returns
# ------------------------------------------------------------------------------------------
def test_time_limit_interrupts_python_code_in_the_main_thread_only():
    from nlar_functions import never_returns

    from fitaudit.tasks.workers import TimeLimitExceeded, can_limit_time, time_limit

    assert can_limit_time()  # pytest runs tests in the main thread
    with pytest.raises(TimeLimitExceeded, match="time limit of 0.3 s"):
        with time_limit(0.3) as on:
            assert on
            never_returns(None, None, None)  # catches Exception, not the BaseException of the limit
    with time_limit(0) as on:  # 0 disables
        assert not on
    seen = []
    worker = threading.Thread(target=lambda: seen.append(time_limit(5).__enter__()))
    worker.start()
    worker.join()
    assert seen == [False]  # not enforced outside the main thread (task threads, Dask workers)


def test_model_that_never_returns_gets_an_error_and_the_run_completes(prefect_server, tmp_path, monkeypatch):
    """In the local worker processes the per-model time limit stops a hanging user function."""
    from fitaudit.flows.audit import audit_flow

    monkeypatch.setenv("PREFECT_INTEGRATIONS_FITAUDIT_PROCESSES", "2")  # worker processes even for a small run
    monkeypatch.setenv("PREFECT_INTEGRATIONS_FITAUDIT_MODEL_TIME_LIMIT_S", "4")
    rng = np.random.default_rng(5)
    fleet = Fleet(tmp_path)
    series = {name: {"date": days(), "y": ar1(rng)} for name in ["nlar-hangs", "arima-a", "arima-b"]}
    write_parquet(tmp_path / "data" / "main.parquet", long_table(series))
    fleet.source("main", "data/main.parquet")
    start = {"c": 25.0, "a1": 0.4, "a2": 0.1}
    fleet.model(
        "nlar-hangs",
        "main",
        "nlar-hangs",
        spec={"family": "nonlinear-ar", "function": "nlar_functions:never_returns", "lags": [1, 2], "start": start},
    )
    fleet.model("arima-a", "main", "arima-a")
    fleet.model("arima-b", "main", "arima-b")
    fleet.write()
    run = audit_flow(
        registry=str(tmp_path / "registry.yaml"), as_of=AS_OF, archive=str(tmp_path / "archive"), batch_size=1
    )
    records = {m["id"]: m for m in results_of(run)["models"]}
    message = " ".join(records["nlar-hangs"]["reasons"])
    assert records["nlar-hangs"]["verdict"] == "error", message
    # source: the message contract of DEVELOPERS.md, "Nothing is lost" (names the model, the cause and the fix)
    assert "model 'nlar-hangs'" in message and "time limit of 4 s per model" in message and "raise the limit" in message
    assert records["arima-a"]["verdict"] in AUDITED and records["arima-b"]["verdict"] in AUDITED
    assert verify_archive(run["archive"]) == []
