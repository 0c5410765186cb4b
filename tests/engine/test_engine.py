"""The map-step engines: results in the order of the items, bounded work in flight, the same
results on a real ``dask.distributed.LocalCluster`` (processes, 2 workers, loopback) as locally,
and one clear error when Dask cannot run the work."""

from __future__ import annotations

import os
import socket
from pathlib import Path

import pytest

from triage.engine import DaskEngine, EngineError, LocalEngine, open_engine


def square(x: int) -> int:
    return x * x


def pid_of(_: int) -> int:
    return os.getpid()


def die_once(marker: str) -> str:
    """Kills the worker running it the first time (the marker file says it ran), then succeeds."""
    path = Path(marker)
    if not path.exists():
        path.write_text("died once")
        os._exit(1)
    return "done"


def always_die(_: int) -> None:
    os._exit(1)


def boom(x: int) -> int:
    raise ValueError(f"bad item {x}")


@pytest.fixture(scope="module")
def cluster():
    distributed = pytest.importorskip("distributed")
    import dask

    with dask.config.set({"distributed.scheduler.allowed-failures": 1}):
        with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                      host="127.0.0.1", dashboard_address=None) as local:
            yield local


def test_local_engine_keeps_the_order_of_the_items():
    with LocalEngine(workers=2) as engine:
        assert list(engine.map(square, range(50))) == [x * x for x in range(50)]


def test_one_local_worker_runs_inline_without_a_pool():
    with LocalEngine(workers=1) as engine:
        assert set(engine.map(pid_of, range(5))) == {os.getpid()}


def test_local_engine_submits_at_most_ahead_items_before_handing_one_back():
    pulled = []

    def items():
        for x in range(10):
            pulled.append(x)
            yield x

    with LocalEngine(workers=2) as engine:
        results = engine.map(square, items(), ahead=3)
        assert next(results) == 0
        assert len(pulled) == 4  # three in flight, then one more once the first came back
        assert list(results) == [x * x for x in range(1, 10)]


def test_a_task_error_reaches_the_caller_as_itself():
    with LocalEngine(workers=2) as engine, pytest.raises(ValueError, match="bad item 0"):
        list(engine.map(boom, range(3)))


def test_dask_engine_gives_the_same_results_in_the_same_order(cluster):
    with DaskEngine(cluster.scheduler_address) as engine:
        assert engine.workers == 2
        assert list(engine.map(square, range(40))) == list(LocalEngine(workers=1).map(square, range(40)))


def test_dask_errors_from_a_task_are_the_task_s_own(cluster):
    with DaskEngine(cluster.scheduler_address) as engine, pytest.raises(ValueError, match="bad item 1"):
        list(engine.map(boom, [1]))


def test_a_task_whose_worker_died_runs_again_elsewhere(cluster, tmp_path):
    with DaskEngine(cluster.scheduler_address) as engine:
        assert list(engine.map(die_once, [str(tmp_path / "marker")])) == ["done"]


def test_workers_dying_every_time_is_one_clear_error(cluster):
    with DaskEngine(cluster.scheduler_address) as engine, pytest.raises(EngineError, match="workers died"):
        list(engine.map(always_die, [1]))


def test_an_unreachable_scheduler_is_one_line_naming_it():
    pytest.importorskip("distributed")
    with socket.socket() as probe:  # a loopback port nobody listens on
        probe.bind(("127.0.0.1", 0))
        port = probe.getsockname()[1]
    with pytest.raises(EngineError, match=f"cannot reach the Dask scheduler at tcp://127.0.0.1:{port}") as caught:
        DaskEngine(f"tcp://127.0.0.1:{port}", timeout_s=2)
    assert "\n" not in str(caught.value)


def test_the_scheduler_variable_selects_dask_unless_local_is_asked_for(monkeypatch):
    monkeypatch.setenv("TRIAGE_SCHEDULER", "tcp://127.0.0.1:1")
    monkeypatch.setattr("triage.engine.CONNECT_TIMEOUT_S", 1)
    assert isinstance(open_engine("local"), LocalEngine)
    with pytest.raises(EngineError):
        open_engine(None)  # the variable names a scheduler nobody runs: an error, never a silent local run
    monkeypatch.delenv("TRIAGE_SCHEDULER")
    assert isinstance(open_engine(None), LocalEngine)


def test_scheduler_with_the_local_engine_is_a_contradiction():
    with pytest.raises(EngineError, match="needs --engine dask"):
        open_engine("local", "tcp://127.0.0.1:8786")
