"""The Dask cluster the engine tests run on: a real ``dask.distributed.LocalCluster`` of two worker
processes with one thread each, on loopback only, no dashboard. A task may kill its worker once
before the scheduler gives up on it (``allowed-failures``), so the worker-death tests stay short."""

from __future__ import annotations

from collections.abc import Iterator


def local_cluster() -> Iterator:
    import dask
    import distributed

    with dask.config.set({"distributed.scheduler.allowed-failures": 1}):
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                      host="127.0.0.1", dashboard_address=None) as local:
            yield local
