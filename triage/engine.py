"""Where the map steps of ``ingest``, ``fit`` and ``backtest`` run: this machine's cores, or a Dask cluster.

A map step applies one module-level function to independent work items (a group of capture files,
a byte range of one large file, a week of snapshots, a stretch of nights) and hands the results back
*in the order of the items*, so the reduce step that follows (a commit, a merge, a fit) sees the
same sequence whichever engine ran the map: local and Dask runs give identical stores and tables.
At most ``ahead`` items are in flight, so memory is bounded by a few results, not by the input.

* ``LocalEngine`` -- a pool of processes on this machine whose workers die with the run
  (triage/process.py); one worker means no pool at all.
* ``DaskEngine`` -- ``dask.distributed`` (an existing scheduler at ``--scheduler`` /
  ``$TRIAGE_SCHEDULER``, or a cluster of local processes started for the run). Workers must see
  the store and the input files at the same paths as this process (a shared file system). Only
  the reduce step writes to the store, here, so a worker that dies can never half-commit anything:
  its task is retried on another worker (``TASK_RETRIES``) or the run fails with one line.

Dask is an optional extra (``pip install '.[dask]'``); asking for it without it installed is one
clear line, not an ImportError.
"""

from __future__ import annotations

import multiprocessing
import os
from collections import deque
from concurrent.futures import ProcessPoolExecutor
from typing import Any, Callable, Iterable, Iterator

from triage.process import die_with_parent

ENGINES = ("local", "dask")
#: Environment variable naming the Dask scheduler (the ``--scheduler`` option wins).
SCHEDULER_ENV = "TRIAGE_SCHEDULER"
#: Seconds to wait for a scheduler to answer before giving up with one line.
CONNECT_TIMEOUT_S = 10
#: Times a task is run again on another worker after the worker running it died.
TASK_RETRIES = 2

_END = object()


class EngineError(Exception):
    """The engine cannot run the work (Dask not installed, scheduler unreachable, workers dying):
    one line for the operator; nothing has been written to the store by the map step."""


class _Engine:
    name = "engine"
    workers = 1

    def map(self, fn: Callable[[Any], Any], items: Iterable, *, ahead: int | None = None) -> Iterator:
        """``fn(item)`` for each item, yielded in the order of ``items``, at most ``ahead``
        (default: workers + 1) submitted and not yet handed back."""
        ahead = max(1, ahead or self.workers + 1)
        todo = iter(items)
        window: deque = deque()

        def top_up() -> None:
            while len(window) < ahead and (item := next(todo, _END)) is not _END:
                window.append(self._submit(fn, item))

        try:
            top_up()
            while window:
                result = self._result(window.popleft())
                top_up()
                yield result
        finally:  # the consumer stopped early or failed: nothing left running for nobody
            for pending in window:
                pending.cancel()

    def _submit(self, fn, item):  # pragma: no cover - overridden
        raise NotImplementedError

    def _result(self, future):
        return future.result()

    def close(self) -> None:
        pass

    def describe(self) -> str:
        return f"{self.name} ({self.workers} worker{'s' if self.workers != 1 else ''})"

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class _Done:
    """A result computed in this process, shaped like a future."""

    def __init__(self, value):
        self.value = value

    def result(self):
        return self.value

    def cancel(self) -> bool:
        return False


class LocalEngine(_Engine):
    """Processes on this machine (default: one per CPU); with one worker, the work runs inline."""

    name = "local"

    def __init__(self, workers: int | None = None):
        self.workers = max(1, workers or os.cpu_count() or 1)
        self._pool: ProcessPoolExecutor | None = None

    def _submit(self, fn, item):
        if self.workers == 1:
            return _Done(fn(item))
        if self._pool is None:
            context = multiprocessing.get_context("fork") if "fork" in multiprocessing.get_all_start_methods() else None
            # workers die with this process: a killed run leaves no orphan behind (triage/process.py)
            self._pool = ProcessPoolExecutor(max_workers=self.workers, mp_context=context,
                                             initializer=die_with_parent, initargs=(os.getpid(),))
        return self._pool.submit(fn, item)

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


class DaskEngine(_Engine):
    """Tasks on a ``dask.distributed`` cluster: the one at ``scheduler``, else a cluster of local
    processes started for this run (loopback only) and stopped with it."""

    name = "dask"

    def __init__(self, scheduler: str | None = None, *, workers: int | None = None,
                 timeout_s: float | None = None):
        try:
            from distributed import Client, LocalCluster
        except ImportError:
            raise EngineError("the Dask engine needs the optional extra: pip install 'triage[dask]' "
                              "(or '.[dask]' in a checkout)") from None
        self.scheduler = scheduler
        self._cluster = None
        try:
            if scheduler:
                self._client = Client(scheduler, timeout=f"{timeout_s or CONNECT_TIMEOUT_S}s", set_as_default=False)
            else:
                self._cluster = LocalCluster(n_workers=workers or os.cpu_count() or 1, threads_per_worker=1,
                                             processes=True, host="127.0.0.1", dashboard_address=None)
                self._client = Client(self._cluster, set_as_default=False)
        except (OSError, TimeoutError) as exc:
            self.close()
            where = f"the Dask scheduler at {scheduler}" if scheduler else "a local Dask cluster"
            raise EngineError(f"cannot reach {where} ({type(exc).__name__}: {_first_line(exc)}); "
                              "nothing was written") from None
        info = self._client.scheduler_info()
        threads = sum(w.get("nthreads", 1) for w in info.get("workers", {}).values())
        if not threads:
            self.close()
            raise EngineError(f"the Dask scheduler at {scheduler} has no workers; nothing was written")
        self.workers = threads

    def _submit(self, fn, item):
        return self._client.submit(fn, item, pure=False, retries=TASK_RETRIES)

    def _result(self, future):
        from distributed import KilledWorker

        try:
            return future.result()
        except KilledWorker as exc:
            raise EngineError(f"Dask workers died running {_first_line(exc)} "
                              f"(tried {TASK_RETRIES + 1} times); nothing of this run was committed") from None
        except (OSError, TimeoutError) as exc:  # the scheduler went away mid-run
            raise EngineError(f"lost the Dask scheduler ({type(exc).__name__}: {_first_line(exc)}); "
                              "nothing of this run was committed") from None

    def describe(self) -> str:
        where = self.scheduler or "local processes"
        return f"dask at {where} ({self.workers} worker thread{'s' if self.workers != 1 else ''})"

    def close(self) -> None:
        client, cluster = getattr(self, "_client", None), self._cluster
        self._client = self._cluster = None
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()


def open_engine(engine: str | None = None, scheduler: str | None = None, *,
                workers: int | None = None) -> _Engine:
    """The engine a command's ``--engine`` / ``--scheduler`` options ask for.

    No ``engine`` given: Dask when a scheduler is named (option or ``$TRIAGE_SCHEDULER``), else
    local. ``engine="local"`` ignores a scheduler in the environment but not one named explicitly.
    """
    if engine not in (None, *ENGINES):
        raise EngineError(f"unknown engine {engine!r}; use one of {', '.join(ENGINES)}")
    address = scheduler or os.environ.get(SCHEDULER_ENV) or None
    if engine == "local" and scheduler:
        raise EngineError("--scheduler names a Dask scheduler; it needs --engine dask (or no --engine)")
    if engine == "local" or (engine is None and not address):
        return LocalEngine(workers)
    return DaskEngine(address, workers=workers)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip() or type(exc).__name__
    return text.splitlines()[0][:200]
