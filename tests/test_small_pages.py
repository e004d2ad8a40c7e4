"""tasks/memory.py: ``small_pages`` sets the process's "no transparent huge pages" flag while
inside and puts back the flag it found; staging runs inside it."""

from __future__ import annotations

import subprocess
import sys
import textwrap

import pytest

from fitaudit.tasks import memory

linux = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="prctl is Linux's")


def _flag_in_child(code: str) -> str:
    # a child process: the flag is the whole process's, and a test run must not leave it changed
    proc = subprocess.run([sys.executable, "-c", textwrap.dedent(code)], capture_output=True, text=True, check=False)
    assert proc.returncode == 0, proc.stderr
    return proc.stdout.strip()


@linux
def test_the_flag_is_set_inside_and_restored_on_leaving_also_on_error():
    out = _flag_in_child(
        """
        from fitaudit.tasks import memory
        prctl = memory._prctl()
        flag = lambda: prctl(memory._PR_GET_THP_DISABLE, 0, 0, 0, 0)
        seen = [flag()]
        with memory.small_pages() as asked:
            seen.append(flag())
            with memory.small_pages():  # nested: the inner one restores the flag it found (set)
                pass
            seen.append(flag())
        seen.append(flag())
        try:
            with memory.small_pages():
                raise KeyError
        except KeyError:
            seen.append(flag())
        print(asked, *seen)
        """
    )
    assert out == "True 0 1 1 0 0"


@linux
def test_a_flag_set_before_is_kept():
    out = _flag_in_child(
        """
        from fitaudit.tasks import memory
        prctl = memory._prctl()
        prctl(memory._PR_SET_THP_DISABLE, 1, 0, 0, 0)
        with memory.small_pages():
            pass
        print(prctl(memory._PR_GET_THP_DISABLE, 0, 0, 0, 0))
        """
    )
    assert out == "1"


def test_elsewhere_nothing_is_asked(monkeypatch):
    monkeypatch.setattr(memory.sys, "platform", "darwin")
    with memory.small_pages() as asked:
        assert asked is False


@linux
def test_staging_runs_in_small_pages_and_gives_them_back(monkeypatch):
    from fitaudit.tasks import batches

    prctl = memory._prctl()
    seen = []

    def stage(*args, **kwargs):
        seen.append(prctl(memory._PR_GET_THP_DISABLE, 0, 0, 0, 0))
        return "staged"

    monkeypatch.setattr(batches, "stage_inputs", stage)
    before = prctl(memory._PR_GET_THP_DISABLE, 0, 0, 0, 0)
    assert batches.stage_inputs_task.fn(None, None, "unused") == "staged"
    assert seen == [1]
    assert prctl(memory._PR_GET_THP_DISABLE, 0, 0, 0, 0) == before
