"""``fit`` and ``backtest`` on a real ``dask.distributed.LocalCluster`` (processes, 2 workers,
loopback) give exactly what they give in one process: the saved model's predictions, the
cohort table, the backtest's tables. An unreachable scheduler writes nothing; a worker that dies
mid-fit has its task run again, and workers that keep dying fail the run with one line and no
model saved.

The reference is the one-process run of the same code (engine None), which
``benchmarks/dask_engine.py`` also checks byte for byte against the code before engines existed;
the statistics themselves are checked against outside references in tests/survival and
tests/risk.
"""

from __future__ import annotations

import json
import os
import socket
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from tests.clusters import local_cluster
from tests.survival.fleetsim import simulated_store
from triage.cli import app
from triage.engine import TASK_RETRIES, DaskEngine, EngineError, LocalEngine
from triage.exitcodes import Exit
from triage.risk.backtest import backtest_store
from triage.rules import load_rules
from triage.store.dataset import Store
from triage.survival.model import FleetRiskModel
from triage.survival.run import cohorts_of_store, fit_store

distributed = pytest.importorskip("distributed")
runner = CliRunner()


cluster = pytest.fixture(scope="module")(local_cluster)


@pytest.fixture
def dask_engine(cluster):
    with DaskEngine(cluster.scheduler_address) as engine:
        yield engine


@pytest.fixture(scope="module")
def store_root(tmp_path_factory):
    root = tmp_path_factory.mktemp("fleet")
    simulated_store(root, n_drives=250, days=63, seed=13, scale_hours=25_000)
    return root


def fresh_copy(root: Path, tmp_path: Path) -> Store:
    """The module's store without any saved model, so each fit writes its own."""
    import shutil

    target = tmp_path / "store"
    shutil.copytree(root, target, ignore=shutil.ignore_patterns("models"))
    return Store(target)


def saved_models(store: Store) -> list[Path]:
    return sorted(p for p in store.models_dir.iterdir()) if store.models_dir.is_dir() else []


# -- fit: identical on every engine ----------------------------------------------------------

@pytest.fixture(scope="module")
def fits(store_root, tmp_path_factory, cluster):
    """(one-process fit, Dask fit) of the same store, each saved and loaded back."""
    out = {}
    for name in ("here", "dask"):
        store = fresh_copy(store_root, tmp_path_factory.mktemp(name))
        if name == "dask":
            with DaskEngine(cluster.scheduler_address) as engine:
                _, path = fit_store(store, engine=engine)
        else:
            _, path = fit_store(store)
        out[name] = (store, FleetRiskModel.load(path))
    return out


def test_the_saved_models_predict_the_same_probabilities_locally_and_on_dask(fits, store_root):
    snapshots = Store(store_root).read("snapshots")
    recent = snapshots[snapshots["taken_at"] > snapshots["taken_at"].max() - pd.Timedelta(days=21)]
    here, there = fits["here"][1], fits["dask"][1]
    p_here = here.predict_fail_probability(recent, history=recent).to_numpy()
    p_there = there.predict_fail_probability(recent, history=recent).to_numpy()
    assert np.isfinite(p_here).any()
    assert np.array_equal(p_here, p_there, equal_nan=True)  # the same bits, not merely close


def test_the_saved_models_have_the_same_coefficients_cohorts_and_exclusions(fits):
    here, there = fits["here"][1], fits["dask"][1]
    assert here.landmark_.to_dict() == there.landmark_.to_dict()
    pd.testing.assert_frame_equal(here.cohort_table_, there.cohort_table_, check_exact=True)
    pd.testing.assert_frame_equal(here.exclusions_, there.exclusions_, check_exact=True)


def test_the_cohort_table_is_the_same_locally_and_on_dask(store_root, dask_engine):
    by = ("model", "firmware")
    here, obs_here = cohorts_of_store(Store(store_root), by=by)
    there, obs_there = cohorts_of_store(Store(store_root), by=by, engine=dask_engine)
    assert len(here) >= 2
    pd.testing.assert_frame_equal(here, there, check_exact=True)
    pd.testing.assert_frame_equal(obs_here.episodes, obs_there.episodes, check_exact=True)


def test_a_local_pool_gives_the_same_cohort_table(store_root):
    here, _ = cohorts_of_store(Store(store_root))
    with LocalEngine(workers=2) as engine:
        pooled, _ = cohorts_of_store(Store(store_root), engine=engine)
    pd.testing.assert_frame_equal(here, pooled, check_exact=True)


# -- backtest: identical on every engine -----------------------------------------------------

def test_the_backtest_tables_are_the_same_locally_and_on_dask(store_root, dask_engine):
    rules = load_rules([], include_defaults=True)
    options = {"horizon_days": 14, "refit_days": 9, "max_false_alarm": 0.05}  # several refit blocks
    here = backtest_store(Store(store_root), rules, **options)
    there = backtest_store(Store(store_root), rules, engine=dask_engine, **options)
    assert len(here.refits) >= 2 and here.methods["failures"].iloc[0] > 0
    pd.testing.assert_frame_equal(here.methods, there.methods, check_exact=True)
    pd.testing.assert_frame_equal(here.curve, there.curve, check_exact=True)
    pd.testing.assert_frame_equal(here.forecasts, there.forecasts, check_exact=True)
    assert (here.operating_point, here.refits, here.notes) == (there.operating_point, there.refits, there.notes)


# -- failures: nothing written ---------------------------------------------------------------

def closed_port() -> int:
    with socket.socket() as probe:  # a loopback port nobody listens on
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


def nightly_options(tmp_path: Path) -> list[str]:
    """A nightly run's own options: an (empty) incoming folder and the ticket file."""
    (tmp_path / "incoming").mkdir(exist_ok=True)
    return ["--dumps", str(tmp_path / "incoming"), "--out", str(tmp_path / "tickets.csv")]


@pytest.mark.parametrize("command", ["fit", "backtest", "nightly"])
def test_an_unreachable_scheduler_is_one_line_and_writes_nothing(store_root, tmp_path, monkeypatch, command):
    monkeypatch.setattr("triage.engine.CONNECT_TIMEOUT_S", 2)
    store = fresh_copy(store_root, tmp_path)
    before = sorted(p.relative_to(store.root) for p in store.root.rglob("*"))
    address = f"tcp://127.0.0.1:{closed_port()}"
    extra = nightly_options(tmp_path) if command == "nightly" else []
    result = runner.invoke(app, [command, "--engine", "dask", "--scheduler", address, "--store", str(store.root),
                                 *extra])
    assert not (tmp_path / "tickets.csv").exists()
    assert result.exit_code == Exit.FAILURE
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and address in lines[0] and "nothing was written" in lines[0]
    assert sorted(p.relative_to(store.root) for p in store.root.rglob("*")) == before
    assert not saved_models(store)


def die_once_then(task: tuple):
    """Kills the worker running it the first time (the marker file says it ran), then runs the
    real map step: a worker lost mid-fit."""
    marker, fn, item = task
    path = Path(marker)
    if not path.exists():
        path.write_text("died once")
        os._exit(1)
    return fn(item)


def always_die(_task) -> None:
    os._exit(1)


class LosingEngine(DaskEngine):
    """A Dask engine whose second task kills its worker (once, or every time it runs)."""

    def __init__(self, scheduler: str, marker: Path, every_time: bool):
        super().__init__(scheduler)
        self.marker, self.every_time, self.submitted = str(marker), every_time, 0

    def _submit(self, fn, item):
        self.submitted += 1
        if self.submitted != 2:
            return super()._submit(fn, item)
        killer = always_die if self.every_time else die_once_then
        return self._client.submit(killer, (self.marker, fn, item), pure=False, retries=TASK_RETRIES)


@pytest.fixture
def killing(cluster):
    """The cluster, brought back to two workers after the test killed some (the nanny restarts them)."""
    yield cluster
    with distributed.Client(cluster, set_as_default=False) as client:
        client.wait_for_workers(2, timeout=60)


def test_a_worker_dying_mid_fit_has_its_task_run_again_and_the_same_model_comes_out(fits, store_root, tmp_path,
                                                                                     killing):
    cluster = killing
    store = fresh_copy(store_root, tmp_path)
    with LosingEngine(cluster.scheduler_address, tmp_path / "died", every_time=False) as engine:
        _, path = fit_store(store, engine=engine)
    assert (tmp_path / "died").exists()
    assert FleetRiskModel.load(path).landmark_.to_dict() == fits["here"][1].landmark_.to_dict()


def test_workers_that_keep_dying_fail_the_fit_with_one_line_and_no_model_saved(store_root, tmp_path, killing):
    cluster = killing
    store = fresh_copy(store_root, tmp_path)
    with LosingEngine(cluster.scheduler_address, tmp_path / "died", every_time=True) as engine:
        with pytest.raises(EngineError) as caught:
            fit_store(store, engine=engine)
    assert "\n" not in str(caught.value) and "nothing of this run was committed" in str(caught.value)
    assert not saved_models(store)


def test_fit_on_the_dask_engine_from_the_command_line(store_root, tmp_path, cluster):
    store = fresh_copy(store_root, tmp_path)
    result = runner.invoke(app, ["fit", "--scheduler", cluster.scheduler_address, "--format", "json",
                                 "--store", str(store.root)])
    assert result.exit_code == Exit.OK, result.output
    assert "map steps on dask at" in result.stderr
    assert json.loads(result.stdout) and len(saved_models(store)) == 1


def test_fit_without_an_engine_option_runs_in_its_own_process(store_root, tmp_path, monkeypatch):
    monkeypatch.delenv("TRIAGE_SCHEDULER", raising=False)
    store = fresh_copy(store_root, tmp_path)
    result = runner.invoke(app, ["fit", "--format", "json", "--store", str(store.root)])
    assert result.exit_code == Exit.OK, result.output
    assert "fit: map steps on this process" in result.stderr and len(saved_models(store)) == 1


def test_nightly_on_the_dask_engine_writes_the_same_tickets_and_model(store_root, tmp_path, cluster):
    """The nightly run's refit (no model saved yet) and ingest on the cluster, against the same
    run with no engine option: the same ticket file, a model predicting the same."""
    out = {}
    for name, options in (("here", []), ("dask", ["--engine", "dask", "--scheduler", cluster.scheduler_address])):
        work = tmp_path / name
        work.mkdir()
        store = fresh_copy(store_root, work)
        result = runner.invoke(app, ["nightly", "--store", str(store.root), "--stale-hours", "100000",
                                     *nightly_options(work), *options])
        assert result.exit_code in (Exit.OK, Exit.NEW_FLAGS, Exit.USAGE), result.output  # USAGE: the folder is empty
        (model_dir,) = saved_models(store)
        out[name] = ((work / "tickets.csv").read_text(), FleetRiskModel.load(model_dir))
    assert out["here"][0] == out["dask"][0] and out["here"][0].count("\n") > 1
    latest = Store(store_root).read("snapshots").sort_values("taken_at").groupby("serial").tail(1)
    pd.testing.assert_series_equal(out["here"][1].predict_fail_probability(latest),
                                   out["dask"][1].predict_fail_probability(latest))
