"""The Dask runner of ``--dask`` (fitaudit.flows.runners): local workers start without the nanny's trim threshold.

distributed's nanny puts ``MALLOC_TRIM_THRESHOLD_=65536`` in every new worker's environment by
default (distributed.yaml, ``distributed.nanny.pre-spawn-environ``); with it the null tables of
the candidate search took about 1.9 times as long (docs/performance.md).  Checked on real worker
processes of a ``distributed.LocalCluster``, the cluster class the runner names.
"""

from __future__ import annotations

import copy
import os

import pytest

pytest.importorskip("prefect_dask")
distributed = pytest.importorskip("distributed")
dask = pytest.importorskip("dask")

from fitaudit.flows.runners import NANNY_TRIM_SETTING, dask_runner  # noqa: E402


def _worker_environment(kwargs: dict) -> str | None:
    """``MALLOC_TRIM_THRESHOLD_`` as a worker process of a LocalCluster with ``kwargs`` sees it."""
    with distributed.LocalCluster(**kwargs) as cluster, distributed.Client(cluster) as client:
        (value,) = client.run(lambda: os.environ.get("MALLOC_TRIM_THRESHOLD_")).values()
    return value


@pytest.fixture
def dask_config(monkeypatch):
    """dask's configuration and the process environment restored after the test (the nanny writes
    its pre-spawn variables into the parent's environment)."""
    monkeypatch.delenv("MALLOC_TRIM_THRESHOLD_", raising=False)
    saved = copy.deepcopy(dask.config.config)
    yield
    dask.config.config.clear()
    dask.config.config.update(saved)


def test_local_workers_start_without_the_nanny_trim_threshold(dask_config):
    runner = dask_runner("local:1")
    kwargs = runner.cluster_kwargs
    assert runner.cluster_class == "distributed.LocalCluster"
    assert kwargs == {"n_workers": 1, "threads_per_worker": 1, "processes": True, "dashboard_address": None}
    assert dask.config.get(NANNY_TRIM_SETTING) is None
    assert _worker_environment(kwargs) is None
    # the setting is what made the difference: distributed's default puts the variable there
    # source: distributed's distributed.yaml, nanny.pre-spawn-environ
    with dask.config.set({NANNY_TRIM_SETTING: 65536}):
        assert _worker_environment(kwargs) == "65536"


def test_an_address_is_used_as_it_is(dask_config):
    # distributed's default (source: its distributed.yaml); other tests may have unset it
    with dask.config.set({NANNY_TRIM_SETTING: 65536}):
        runner = dask_runner("tcp://127.0.0.1:8786")
        assert runner.address == "tcp://127.0.0.1:8786"
        assert dask.config.get(NANNY_TRIM_SETTING) == 65536  # a cluster of the user's keeps its own settings
