"""Crash safety of the archive: SIGKILL a publishing process and check what is left.

A worker process (forked from a launcher subprocess) publishes runs in a loop; the test kills it
with SIGKILL, then checks, with an oracle independent of the archive code, that every run folder
visible under ``runs/`` is complete (every file present with the bytes the worker wrote), that
``verify_archive`` reports no problem, and that after ``recover()`` the archive is clean and a new
publication completes.  A second set of tests kills the worker exactly at each step of the
publication and purge protocols.
"""

from __future__ import annotations

import datetime as dt
import os
import pathlib
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from fitaudit.tasks import archive

FILES_PER_RUN = 12

# A launcher process imports the archive once, then for each "start" command forks a worker that
# publishes (or purges) and never returns; the test SIGKILLs the worker.  Forking a fresh,
# single-threaded launcher avoids paying the interpreter and numpy/scipy start-up for every kill.
LAUNCHER = r"""
import datetime as dt, os, signal, sys, time, traceback
from fitaudit.tasks import archive

def work(root, mode, kill_step, kill_at, delay):
    seen = {}
    def hook(step):
        seen[step] = seen.get(step, 0) + 1
        if step == kill_step and seen[step] == kill_at:
            os.kill(os.getpid(), signal.SIGKILL)
        time.sleep(delay)
    archive.durable._STEP_HOOK = hook

    def publish(run_id):
        with archive.open_run(root, run_id, 2026) as run:
            for i in range(FILES_PER_RUN):
                run.write_text(f"parts/p{i:02d}.txt", f"{run_id}:{i}\n" * 50)
                time.sleep(delay)
            run.write_text("index.html", f"<p>{run_id}</p>")
            run.finish({"operator": "crash-test", "counts": {"parts": FILES_PER_RUN}})

    if mode == "loop":
        archive.recover(root)
        while True:
            publish(f"20260105-p{os.getpid()}-{os.urandom(3).hex()}")
    elif mode == "publish":
        publish("20260105-crash")
    elif mode == "purge":
        archive.purge_runs(root, before=dt.date(2026, 1, 1), reason="crash test", approved_by="tester")
    elif mode == "promote":
        from fitaudit.tasks import params
        params.promote(root, "m1", 1, approved_by="tester", note="crash test")

print("ready", flush=True)
for line in sys.stdin:
    command, *args = line.split("\t")
    if command == "start":
        root, mode, kill_step, kill_at, delay = args
        pid = os.fork()
        if pid == 0:
            code = 0
            try:
                work(root, mode, kill_step, int(kill_at), float(delay))
            except BaseException:
                traceback.print_exc()
                code = 1
            os._exit(code)
        print(pid, flush=True)
    elif command == "wait":
        _, status = os.waitpid(int(args[0]), 0)
        print(os.waitstatus_to_exitcode(status), flush=True)
""".replace("FILES_PER_RUN", str(FILES_PER_RUN))


class Launcher:
    """Talks to the launcher process: start a worker, wait for it."""

    def __init__(self) -> None:
        self.proc = subprocess.Popen(
            [sys.executable, "-c", LAUNCHER],
            stdin=subprocess.PIPE,
            stdout=subprocess.PIPE,
            text=True,
        )
        assert self.proc.stdout.readline() == "ready\n", "launcher failed to start"

    def _ask(self, *fields: object) -> int:
        self.proc.stdin.write("\t".join(map(str, fields)) + "\n")
        self.proc.stdin.flush()
        return int(self.proc.stdout.readline())

    def start(self, root: pathlib.Path, mode: str, step: str = "-", occurrence: int = 1, delay: float = 0.0) -> int:
        """Fork a worker; return its pid."""
        return self._ask("start", root, mode, step, occurrence, delay)

    def wait(self, pid: int) -> int:
        """Exit code of the worker (negative signal number when killed)."""
        return self._ask("wait", pid)

    def close(self) -> None:
        self.proc.stdin.close()
        self.proc.wait(timeout=30)


@pytest.fixture(scope="module")
def launcher():
    launcher = Launcher()
    yield launcher
    launcher.close()


def _expected_files(run_id: str) -> dict[str, bytes]:
    files = {f"parts/p{i:02d}.txt": f"{run_id}:{i}\n".encode() * 50 for i in range(FILES_PER_RUN)}
    files["index.html"] = f"<p>{run_id}</p>".encode()
    return files


def _assert_visible_runs_complete(root: pathlib.Path) -> set[str]:
    """Oracle independent of the archive code: each visible crash-test run folder holds exactly its files."""
    visible = set()
    for folder in sorted((root / "runs").glob("*/*")):
        on_disk = {p.relative_to(folder).as_posix() for p in folder.rglob("*") if p.is_file()}
        if folder.name.startswith("20260105-"):
            expected = _expected_files(folder.name)
            assert on_disk == set(expected) | {"manifest.json"}, f"partial run visible: {folder}"
            for rel, data in expected.items():
                assert (folder / rel).read_bytes() == data, f"{folder}/{rel} has wrong content"
        visible.add(folder.name)
    return visible


def _chain_run_ids(root: pathlib.Path) -> list[str]:
    return [e["payload"]["run_id"] for e in archive.read_chain(root) if e["kind"] == "run"]


def _publish_in_process(root: pathlib.Path, run_id: str, as_of: dt.date) -> None:
    with archive.open_run(root, run_id, as_of.year) as run:
        run.write_text("index.html", f"<p>{run_id}</p>")
        run.finish({"operator": "test"})


def test_sigkill_at_20_random_points(tmp_path, launcher):
    root = tmp_path / "archive"
    rng = np.random.default_rng(20261130)
    for _ in range(20):
        pid = launcher.start(root, "loop", delay=0.002)
        time.sleep(rng.uniform(0.0, 0.35))
        os.kill(pid, signal.SIGKILL)
        assert launcher.wait(pid) == -signal.SIGKILL, "the worker stopped by itself (see its traceback above)"
        _assert_visible_runs_complete(root)
        assert archive.verify_archive(root) == []

    archive.recover(root)
    assert archive.verify_archive(root, include_notes=True) == []
    assert not any((root / ".staging").iterdir()) and not any((root / ".journal").iterdir())
    _publish_in_process(root, "20260112-after-crashes", dt.date(2026, 1, 12))
    assert archive.verify_archive(root, include_notes=True) == []
    assert sorted(_chain_run_ids(root)) == sorted(_assert_visible_runs_complete(root))
    assert len(_chain_run_ids(root)) >= 2  # the children did publish between kills


# Steps of RunWriter.finish in protocol order; the run is visible from "renamed" on.
PUBLISH_STEPS = [
    ("file-written", 3),
    ("staged", 1),
    ("journal-written", 1),
    ("renamed", 1),
    ("append-journal-written", 1),
    ("chain-appended", 1),
    ("run-appended", 1),
    ("journal-removed", 1),
]


@pytest.mark.parametrize("step,occurrence", PUBLISH_STEPS, ids=[s for s, _ in PUBLISH_STEPS])
def test_sigkill_at_each_publication_step(tmp_path, launcher, step, occurrence):
    root = tmp_path / "archive"
    _publish_in_process(root, "20251229-before", dt.date(2025, 12, 29))
    pid = launcher.start(root, "publish", step, occurrence)
    assert launcher.wait(pid) == -signal.SIGKILL, f"the worker never reached step {step}"

    visible = _assert_visible_runs_complete(root)
    assert archive.verify_archive(root) == []
    actions = archive.recover(root)
    assert archive.verify_archive(root, include_notes=True) == []
    published = [s for s, _ in PUBLISH_STEPS].index(step) >= [s for s, _ in PUBLISH_STEPS].index("renamed")
    assert ("20260105-crash" in visible) == published
    assert ("20260105-crash" in _chain_run_ids(root)) == published
    if step in ("staged", "journal-written"):
        assert actions, "recover() should have removed the staging folder or rolled back"
    _publish_in_process(root, "20260112-after", dt.date(2026, 1, 12))
    assert archive.verify_archive(root, include_notes=True) == []


# Steps of purge_runs in protocol order; the purge is logged (and so completed) from the append journal on.
PURGE_STEPS = ["purge-journal-written", "append-journal-written", "chain-appended", "purge-appended", "purge-moved"]


@pytest.mark.parametrize("step", PURGE_STEPS)
def test_sigkill_at_each_purge_step(tmp_path, launcher, step):
    root = tmp_path / "archive"
    _publish_in_process(root, "20251229-old", dt.date(2025, 12, 29))
    _publish_in_process(root, "20260105-new", dt.date(2026, 1, 5))
    pid = launcher.start(root, "purge", step)
    assert launcher.wait(pid) == -signal.SIGKILL, f"the worker never reached step {step}"

    assert archive.verify_archive(root) == []
    archive.recover(root)
    assert archive.verify_archive(root, include_notes=True) == []
    purged = PURGE_STEPS.index(step) >= PURGE_STEPS.index("append-journal-written")
    assert (root / "runs/2025/20251229-old").exists() != purged
    assert any(e["kind"] == "purge" for e in archive.read_chain(root)) == purged
    assert (root / "runs/2026/20260105-new/manifest.json").is_file()


# Steps of record_promotion in protocol order; the promotion is recorded from "chain-appended" on.
PROMOTE_STEPS = [
    "promotion-journal-written",
    "promotion-written",
    "append-journal-written",
    "chain-appended",
    "promotion-appended",
]


@pytest.mark.parametrize("step", PROMOTE_STEPS)
def test_sigkill_at_each_promotion_step(tmp_path, launcher, step):
    from fitaudit.tasks import params

    root = tmp_path / "archive"
    params.write_version(
        root,
        "m1",
        spec={"family": "arima", "order": [1, 0, 0]},
        noise={"law": "normal"},
        params={"ar1": 0.5, "sigma2": 1.0},
        status="candidate",
        created_by="test",
        lineage={},
    )
    pid = launcher.start(root, "promote", step)
    assert launcher.wait(pid) == -signal.SIGKILL, f"the worker never reached step {step}"

    assert archive.verify_archive(root) == []  # pending, not a problem
    archive.recover(root)
    assert archive.verify_archive(root, include_notes=True) == []
    promoted = (root / "params/m1/2.json").exists()
    recorded = (
        [e for e in archive.read_chain(root) if e["kind"] == "promotion"] if (root / "chain.jsonl").exists() else []
    )
    assert promoted == (len(recorded) == 1) == (PROMOTE_STEPS.index(step) >= PROMOTE_STEPS.index("promotion-written"))
    assert (params.production_version(root, "m1") is not None) == promoted
