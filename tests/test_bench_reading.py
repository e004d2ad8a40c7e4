"""bench/reading.py writes the "Reading the goals" prose from the run's rows, never from an older run."""

from bench.reading import reading_the_goals

FLEET = {
    "benchmark": "Fleet throughput",
    "ratio": 4.5,
    "ratio_text": "4.5x",
    "met": False,
    "details": {
        "ours": {
            "server_start_s": 5.0,
            "flow_s": 35.0,
            "counts": {"audited": 1000, "respecify": 40},
            "flow_timings": {"stage_s": 2.0, "audit_s": 10.0, "render_s": 6.0, "publish_s": 8.5},
        },
        "peer": {"series_per_second": 6.25},
    },
}
FIT_ROWS = [
    {"benchmark": "Model fit (micro)", "size": "spec A", "ratio": 12.0, "ratio_text": "12.0x", "met": True,
     "measured": "largest log-likelihood shortfall 0.0e+00"},
    {"benchmark": "Model fit (micro)", "size": "spec B", "ratio": 7.0, "ratio_text": "7.0x", "met": False,
     "measured": "largest log-likelihood shortfall 0.0e+00"},
]  # fmt: skip


def test_numbers_come_from_the_rows():
    text = reading_the_goals([FLEET, *FIT_ROWS])
    assert "**Throughput (goal 20x): missed, 4.5x** (2.2x per core)" in text
    assert "25.0 series/s against the peer's 6.2" in text  # 1000 / (35 + 5)
    assert "the flow alone is 28.6 series/s, 4.6x the peer" in text  # 1000 / 35, over 6.25
    assert "archive writing and run page 2.5 s" in text  # publish runs from the start of render: 8.5 - 6.0
    assert "20x would need the whole fleet in 8 s" in text  # 1000 / (20 * 6.25)
    assert "1 of 2 specs meet it; met at 12.0x to 12.0x" in text
    assert "Missed: spec B at 7.0x" in text


def test_the_median_run_is_read_with_the_times_of_all_first_runs():
    import bench.fleet

    runs = [{"server_start_s": 5.0, "flow_s": f} for f in (36.0, 35.0, 38.5)]
    assert bench.fleet.median_run(runs) is runs[0]  # 41.0 s: between 40.0 and 43.5
    row = {**FLEET, "details": {**FLEET["details"], "first_runs_s": [41.0, 40.0, 43.5]}}
    text = reading_the_goals([row])
    assert "against the peer's 6.2 (the run of median time among 3: 41.0, 40.0, 43.5 s end to end)." in text


def test_a_benchmark_left_out_is_said_to_be_unmeasured():
    text = reading_the_goals([FLEET])
    for name in ("Fit-bound ratio", "Model fits", "Command start-up", "Scale-out", "Peak memory"):
        assert f"**{name}:** not measured in this run." in text
    failed = {"benchmark": "Fleet throughput", "size": "", "measured": "failed: OSError", "met": False}
    assert "**Fleet throughput:** not measured in this run." in reading_the_goals([failed])


def test_cpu_use_is_read_against_the_cpu_goal_1_allows(monkeypatch):
    import bench.fleet

    monkeypatch.setattr(bench.fleet.os, "cpu_count", lambda: 2)
    ours = {
        "flow_s": 20.0,
        "server_start_s": 3.0,
        "cpu_s": {"server_start": {"own": 1.0, "passing": 3.0}, "flow": {"own": 5.0, "lasting": 2.0, "passing": 28.0}},
    }
    row = bench.fleet._cpu_row(1000, ours, {"series_per_second": 6.25})  # goal 1: 1000 / (20 * 6.25) = 8 s
    assert row["met"] is None and abs(row["ratio"] - 39.0 / 16.0) < 1e-12  # 4 + 35 CPU s over 2 cores x 8 s
    assert "goal 1 allows 8.0 s, at most 16.0 CPU s on 2 cores" in row["measured"]
    text = reading_the_goals([FLEET, row])
    assert "**CPU use: 39 CPU seconds, 2.4 times what goal 1 allows** (its wall time 8.0 s on 2 cores)" in text
    assert "busy 1.75 of 2 on average" in text  # 35 CPU s in a 20 s flow
    assert "used 28.0 CPU s, the flow process" in text and "5.0 and the Prefect server 2.0" in text


def test_idle_phases_split_the_run_where_the_worker_processes_start_and_stop():
    from bench.harness import idle_phases

    # (time, this process, server, workers) cumulative CPU seconds; workers run between t = 2 and t = 4
    samples = [(0, 0, 0, 0), (1, 0.2, 0.8, 0), (2, 1.2, 0.8, 0)]
    samples += [(3, 1.3, 0.8, 1.7), (4, 1.4, 0.9, 3.6), (5, 2.3, 1.0, 3.6)]
    phases = idle_phases(samples, 0, 1, 5, 2)
    assert list(phases) == ["server_start", "before_batches", "batches", "after_batches"]
    expected = {  # (wall, CPU, idle = 2 cores x wall - CPU), by hand from the samples
        "server_start": (1.0, 1.0, 1.0),
        "before_batches": (1.0, 1.0, 1.0),
        "batches": (2.0, 3.9, 0.1),
        "after_batches": (1.0, 1.0, 1.0),
    }
    for name, (wall, cpu, idle) in expected.items():
        got = phases[name]
        assert abs(got["wall_s"] - wall) < 1e-12 and abs(got["cpu_s"] - cpu) < 1e-12
        assert abs(got["idle_core_s"] - idle) < 1e-12
    # the batch stages given by the flow's calls that hand them to the workers (bench.fleet.batch_span):
    # worker CPU before them (an archive check beside staging) stays in the phase before them
    from bench.fleet import batch_span
    from bench.harness import WorkClock

    clock = WorkClock()
    clock.intervals += [(2.0, 3.0, "task.run_local"), (1.5, 1.8, "batches.stage_inputs"), (3.0, 4.0, "task.run_local")]
    assert batch_span(clock) == (2.0, 4.0) and batch_span(WorkClock()) is None
    early = [(0, 0, 0, 0), (1, 0.2, 0.8, 0), (2, 1.2, 0.8, 0.7)] + samples[3:]  # a worker computed before t = 2
    given = idle_phases(early, 0, 1, 5, 2, batch_span(clock))
    # by hand from the samples: CPU 2.7 at t = 2 less 1.0 at t = 1; batch stages from t = 2 to t = 4
    assert abs(given["before_batches"]["cpu_s"] - 1.7) < 1e-12 and abs(given["batches"]["wall_s"] - 2.0) < 1e-12
    assert idle_phases(early, 0, 1, 5, 2)["batches"]["wall_s"] == 3.0  # the worker-CPU rule starts them at t = 1
    # no worker CPU (a small run computes in place): the whole flow is one phase
    alone = idle_phases([(0, 0, 0, 0), (1, 0.5, 0.5, 0), (3, 2.5, 0.6, 0)], 0, 1, 3, 2)
    assert list(alone) == ["server_start", "before_batches"]
    assert abs(alone["before_batches"]["idle_core_s"] - (4.0 - 2.1)) < 1e-12


def test_a_child_not_yet_running_its_own_program_gets_no_role():
    from bench.harness import _role

    class Child:
        def __init__(self, cmdline):
            self._cmdline = cmdline

        def cmdline(self):
            return self._cmdline

    own = ["python", "-m", "bench.fleet", "--child"]
    assert _role(Child(own), own) is None  # forked, not exec'd yet: looked at again at the next sample
    server = ["python", "-m", "fitaudit.flows.server_process", "--factory", "prefect.server.api.server:create_app"]
    assert _role(Child(server), own) == "server"
    # Prefect's own launch command is recognised too
    prefects = ["python", "-m", "uvicorn", "--factory", "prefect.server.api.server:create_app"]
    assert _role(Child(prefects), own) == "server"
    assert _role(Child(["python", "-c", "from multiprocessing.spawn import spawn_main"]), own) == "workers"


def test_the_cpu_row_says_where_the_cores_stood_idle(monkeypatch):
    import bench.fleet

    monkeypatch.setattr(bench.fleet.os, "cpu_count", lambda: 2)
    phases = {
        "server_start": {"wall_s": 3.0, "cpu_s": 4.0, "idle_core_s": 2.0},
        "before_batches": {"wall_s": 3.0, "cpu_s": 3.2, "idle_core_s": 2.8},
        "batches": {"wall_s": 14.0, "cpu_s": 27.0, "idle_core_s": 1.0},
        "after_batches": {"wall_s": 3.0, "cpu_s": 1.8, "idle_core_s": 4.2},
    }
    ours = {
        "flow_s": 20.0,
        "server_start_s": 3.0,
        "cpu_s": {"server_start": {"own": 1.0, "passing": 3.0}, "flow": {"own": 5.0, "lasting": 2.0, "passing": 28.0}},
        "cpu_phases": phases,
    }
    row = bench.fleet._cpu_row(1000, ours, {"series_per_second": 6.25})
    assert "idle core-seconds (sampled every 0.2 s): server start 2.0, flow 8.0" in row["measured"]
    assert "(before the batch stages 2.8, during them 1.0, after them 4.2)" in row["measured"]
    text = reading_the_goals([FLEET, row])
    assert "the cores stood idle for 8.0 core-seconds of the flow: 2.8 before the batch stages" in text
    # 8 idle core-seconds on 2 cores: at most 4 s off the 20 s flow
    assert "shorten the flow by at most 4.0 s, to 16.0 s, against the 8.0 s goal 1 allows" in text
    assert "The server's start left 2.0 core-seconds idle (3.0 s," in text


def test_the_run_with_kept_tables_is_read_beside_the_first():
    import bench.fleet

    first = {**FLEET["details"]["ours"], "flow_timings": {"calibration_s": 1.0, "candidates_s": 4.0}}
    kept = {
        "server_start_s": 3.0,
        "flow_s": 17.0,
        "flow_timings": {"calibration_s": 0.25, "candidates_s": 2.0},
        "tables": {"calibration_tables": 9, "calibration_tables_reused": 9},
    }
    row = bench.fleet._kept_row(1000, first, kept, {"series_per_second": 6.25}, same=True)
    assert abs(row["ratio"] - 1000 / 20.0 / 6.25) < 1e-12 and row["met"] is None  # 1000 series in 3 + 17 s
    assert "flow 35.0 -> 17.0 s (null tables 1.0 -> 0.2 s, candidate search 4.0 -> 2.0 s)" in row["measured"]
    assert "9 of the run's 9 shared tables reused" in row["measured"]
    text = reading_the_goals([FLEET, row])
    assert "**Tables kept (the next run of the same fleet): 8.0x the peer** (no goal)" in text
    assert "results.json was identical to each first run's." in text
    differing = bench.fleet._kept_row(1000, first, kept, {"series_per_second": 6.25}, same=False)
    assert differing["met"] is False and "DIFFERENT from each first run's" in differing["measured"]
    assert "NOT identical to every first run's: a defect." in reading_the_goals([FLEET, differing])


def test_cpu_used_splits_this_process_the_lasting_children_and_the_passing_ones():
    from bench.harness import CpuSnapshot, cpu_used

    before = CpuSnapshot(own=1.0, waited=0.5, running={10: 1.0})  # pid 10: a server
    after = CpuSnapshot(own=4.0, waited=7.5, running={10: 3.0, 11: 0.5})  # 11: a worker still running
    # passing: 7.5 - 0.5 = 7.0 of children waited for meanwhile, plus 0.5 of the worker started meanwhile
    assert cpu_used(before, after) == {"own": 3.0, "lasting": 2.0, "passing": 7.5}


def test_a_child_waited_for_counts_as_passing():
    import subprocess
    import sys

    from bench.harness import CpuSnapshot, cpu_used

    before = CpuSnapshot.now()
    burn = "import time\nwhile time.process_time() < 0.2: pass"  # at least 0.2 s of CPU, however long it takes
    subprocess.run([sys.executable, "-c", burn], check=True)
    used = cpu_used(before, CpuSnapshot.now())
    # the burner counts as passing, never as lasting (which holds only children running at both snapshots,
    # such as a server another test left running, whose CPU may tick meanwhile: below the burner's 0.2 s)
    assert used["passing"] >= 0.2 and used["lasting"] < 0.2


def test_the_timeline_finds_the_whole_process_tree():
    """bench/harness.py descendants: the children's lists in /proc give the same processes as
    psutil's scan of every process (a child and its own child)."""
    import os
    import subprocess
    import sys
    import time

    import psutil

    from bench.harness import descendants

    sleeper = "import time; time.sleep(30)"
    code = f"import subprocess, sys, time; p = subprocess.Popen([sys.executable, '-c', {sleeper!r}]); time.sleep(30)"
    child = subprocess.Popen([sys.executable, "-c", code])
    try:
        below = psutil.Process(child.pid)
        for _ in range(100):  # until the grandchild runs
            if below.children(recursive=True):
                break
            time.sleep(0.1)
        # the started subtree only: other tests' processes may come and go beside it
        (grandchild,) = below.children(recursive=True)
        assert descendants(child.pid) == [grandchild.pid]
        assert {child.pid, grandchild.pid} <= set(descendants(os.getpid()))
    finally:
        for p in psutil.Process(child.pid).children(recursive=True):
            p.kill()
        child.kill()
        child.wait()
