"""The Dask task runner of ``--dask`` (and of the benchmark's Dask runs), built in one place.

``local:N`` starts a ``distributed.LocalCluster`` of N single-threaded worker processes for the
command; any other value is the address of a running scheduler.

A local cluster's workers are started without the ``MALLOC_TRIM_THRESHOLD_=65536`` that
distributed's nanny puts in every new worker's environment by default
(``distributed.nanny.pre-spawn-environ``).  With it, glibc hands freed heap memory back to the
system after every large free and stops raising its ``mmap`` threshold, so each of the
simulations' temporary arrays is mapped and zeroed afresh: a null table of the candidate search
took 0.54-0.61 s instead of 0.29-0.33 s on our 2-core machine (docs/performance.md).  fitaudit's
work functions already return freed memory after each task where it matters (the flow process
and its own worker processes), so the workers keep glibc's defaults, as fitaudit's own local
worker processes do.  Workers of a scheduler you run yourself keep the environment you gave them;
docs/architecture.md says how to set it for them.
"""

from __future__ import annotations

from typing import Any

__all__ = ["NANNY_TRIM_SETTING", "dask_runner"]

#: The dask setting that puts ``MALLOC_TRIM_THRESHOLD_`` in new workers' environment (None: not set).
NANNY_TRIM_SETTING = "distributed.nanny.pre-spawn-environ.MALLOC_TRIM_THRESHOLD_"


def dask_runner(spec: str) -> Any:
    """A ``prefect_dask.DaskTaskRunner`` for ``spec``: ``local:N`` (N worker processes, default 2) or an address.

    For ``local:N`` the nanny's trim threshold is unset in dask's configuration of this process
    (the cluster is created when the flow starts, and the setting must hold then).
    """
    from prefect_dask import DaskTaskRunner

    if not spec.startswith("local:"):
        return DaskTaskRunner(address=spec)
    import dask

    dask.config.set({NANNY_TRIM_SETTING: None})  # process-wide: the command's own cluster
    n = int(spec.split(":", 1)[1] or 2)
    return DaskTaskRunner(
        cluster_class="distributed.LocalCluster",
        cluster_kwargs={"n_workers": n, "threads_per_worker": 1, "processes": True, "dashboard_address": None},
    )
