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
