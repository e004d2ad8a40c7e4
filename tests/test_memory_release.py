"""tasks/memory.py: freed memory goes back to the operating system, and nothing else changes."""

from __future__ import annotations

import subprocess
import sys
import textwrap

import pytest

pytestmark = pytest.mark.skipif(not sys.platform.startswith("linux"), reason="resident set read from /proc")

_RSS = """
def rss():
    for line in open('/proc/self/status'):
        if line.startswith('VmRSS'):
            return int(line.split()[1]) * 1024
"""


def _run(code: str) -> str:
    proc = subprocess.run(
        [sys.executable, "-c", textwrap.dedent(_RSS) + textwrap.dedent(code)], capture_output=True, text=True
    )
    assert proc.returncode == 0, proc.stderr
    return proc.stdout.strip()


def test_pyarrow_pool_returns_freed_read_buffers(tmp_path):
    # two reads of a 2-million-row Parquet file, freed: pyarrow's pool keeps their pages (about
    # 110 MB here, measured) until released; the data read back are unchanged by the release
    out = _run(
        f"""
        import numpy as np, pyarrow as pa, pyarrow.parquet as pq
        from fitaudit.tasks.memory import release_freed_memory
        path = {str(tmp_path / "x.parquet")!r}
        n = 2_000_000
        values = np.random.default_rng(1).normal(size=n)
        keys = pa.array(np.arange(n) % 1000).cast(pa.string())
        pq.write_table(pa.table({{'k': keys, 'v': values}}), path)
        for _ in range(2):
            table = pq.read_table(path)
            total = table.column('v').to_numpy().sum()
            del table
        before = rss()
        done = release_freed_memory()
        after = rss()
        again = pq.read_table(path).column('v').to_numpy()
        print(done['pyarrow'], done['malloc_trim'], before - after, bool(np.array_equal(again, values)))
        """
    )
    asked_pool, asked_trim, released, same = out.split()
    assert asked_pool == "True" and same == "True"
    assert int(released) > 20 * 2**20  # common practice: a margin well below the 110 MB measured


def test_malloc_heap_returns_freed_small_arrays():
    # 2,000 numpy arrays of 64 KB (below glibc's mmap threshold, so on the heap), freed except the
    # last: the heap's top cannot shrink, only malloc_trim returns the free pages below it
    out = _run(
        """
        import numpy as np
        from fitaudit.tasks.memory import release_freed_memory
        small = [np.ones(8000) for _ in range(2000)]
        last = small[-1]
        del small
        before = rss()
        done = release_freed_memory()
        print(done['malloc_trim'], before - rss(), float(last.sum()))
        """
    )
    asked, released, kept = out.split()
    if asked != "True":
        pytest.skip("not glibc: no malloc_trim")
    assert int(released) > 64 * 2**20  # common practice: half of the 125 MB freed
    assert float(kept) == 8000.0  # the array still in use is untouched


def test_never_imports_pyarrow():
    # the local worker processes call it too and must not load pyarrow for it
    out = _run(
        """
        import sys
        from fitaudit.tasks.memory import release_freed_memory
        done = release_freed_memory()
        print(done['pyarrow'], 'pyarrow' in sys.modules)
        """
    )
    assert out == "False False"


def test_a_local_worker_returns_a_calls_freed_memory():
    # tasks.workers runs each call handed to a worker process through _run_and_release: the same
    # churn of small arrays as above (its result, the last array, stays in use at the heap's top)
    # leaves its heap pages resident when called plainly and returns them when called through the
    # wrapper, whose result is the call's own
    out = _run(
        """
        import numpy as np
        from fitaudit.tasks.workers import _run_and_release
        def churn():
            small = [np.ones(8000) for _ in range(2000)]
            return small[-1]
        base = rss()
        plain = churn()
        kept_plain = rss() - base
        from fitaudit.tasks.memory import release_freed_memory
        release_freed_memory()
        base = rss()
        wrapped = _run_and_release(churn)
        print(float(plain.sum()), float(wrapped.sum()), kept_plain, rss() - base)
        """
    )
    plain, wrapped, kept_plain, kept_wrapped = out.split()
    if int(kept_plain) < 64 * 2**20:
        pytest.skip("this allocator returned the freed pages by itself")
    assert plain == wrapped == "8000.0"
    assert int(kept_wrapped) < 16 * 2**20  # common practice: well below the 64 MB kept by the plain call
