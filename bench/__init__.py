"""fitaudit's benchmark suite (``python -m bench``; see ``docs/performance.md``).

Every comparison is a ratio measured in the same run, on the same machine: the fleet audit
against a by-hand peer pipeline, orchestration against computation, two Dask workers against
one, and the memory of growing fleets.  Benchmarks are scripts, never timed tests.
"""
