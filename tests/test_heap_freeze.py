"""tasks/memory.py: the imports' objects are left out of the garbage collector's passes, in the
worker processes for their life and in the flow process for the run, and nothing else changes."""

from __future__ import annotations

import gc

import pytest

from fitaudit.tasks.memory import freeze_heap, heap_frozen
from fitaudit.tasks.workers import local_workers, run_local


@pytest.fixture
def thawed():
    """Each test starts and ends with nothing frozen (the test process is never frozen otherwise)."""
    gc.unfreeze()
    yield
    gc.unfreeze()


def test_heap_frozen_freezes_what_exists_and_thaws_on_leaving(thawed):
    keep = [{"a": [1, 2]} for _ in range(1000)]  # tracked objects that exist on entry
    with heap_frozen() as frozen:
        assert frozen >= len(keep)
        gc.collect()  # a full pass does not thaw them (a frozen object freed meanwhile leaves the count)
        assert gc.get_freeze_count() >= len(keep)
    assert gc.get_freeze_count() == 0
    with pytest.raises(RuntimeError), heap_frozen():
        raise RuntimeError("a failing run")
    assert gc.get_freeze_count() == 0  # thawed on error too


def test_frozen_objects_are_still_freed_by_reference_counting(thawed):
    import weakref

    class Box:
        pass

    box = Box()
    ref = weakref.ref(box)
    assert freeze_heap() > 0
    del box
    assert ref() is None


def test_local_workers_freeze_their_imports(thawed):
    with local_workers(2) as token:
        counts = {run_local(token, gc.get_freeze_count) for _ in range(4)}
    # the work's modules, numpy, scipy, pydantic and Jinja2: well over ten thousand objects in each worker
    assert min(counts) > 10_000
    assert gc.get_freeze_count() == 0  # the caller's heap is left as it was


def test_collector_paused_makes_the_block_without_passes_and_freezes_what_it_made(thawed):
    from fitaudit.tasks.memory import collector_paused

    assert gc.isenabled()
    with collector_paused():
        assert not gc.isenabled()
        made = [{"a": [i]} for i in range(1000)]  # tracked objects, as imports make
    assert gc.isenabled()
    assert gc.get_freeze_count() >= len(made)
    gc.unfreeze()
    gc.disable()  # a collector paused before stays paused; and it resumes on error too
    try:
        with pytest.raises(KeyError), collector_paused():
            raise KeyError
        assert not gc.isenabled()
    finally:
        gc.enable()
    with pytest.raises(KeyError), collector_paused():
        raise KeyError
    assert gc.isenabled()


def test_the_embedded_servers_process_imports_its_application_paused_then_runs_uvicorns_command():
    import subprocess
    import sys
    import textwrap

    # uvicorn's command line replaced by a recorder: what it would run with, and the collector's state
    code = textwrap.dedent(
        """
        import gc, runpy, sys
        seen = []
        def record(name, **kw):
            seen.append((name, kw, sys.argv[1:], gc.isenabled(), gc.get_freeze_count()))
        runpy.run_module = record
        from fitaudit.flows import server_process
        server_process.main(["--factory", server_process.APP_FACTORY, "--fd", "3"])
        name, kw, argv, enabled, frozen = seen[0]
        imported = "prefect.server.api.server" in sys.modules
        print(name, kw["run_name"], " ".join(argv), enabled, imported, frozen > 100_000)
        """
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=False)
    assert out.returncode == 0, out.stderr
    assert out.stdout.split() == [
        "uvicorn",
        "__main__",
        "--factory",
        "prefect.server.api.server:create_app",
        "--fd",
        "3",
        "True",
        "True",
        "True",
    ]
