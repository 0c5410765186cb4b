"""Saving a fitted model: unique and atomic, whatever runs at the same time."""

from __future__ import annotations

import os
from concurrent.futures import ThreadPoolExecutor

import pytest

from tests.survival.fleetsim import simulate_fleet
from triage.survival import FleetRiskModel


@pytest.fixture(scope="module")
def fitted():
    snapshots, removals, _ = simulate_fleet(n_drives=400, days=60, seed=5, scale_hours=20_000)
    return FleetRiskModel(horizon_days=30).fit(snapshots, removals)


def test_saves_at_the_same_moment_get_distinct_numbers_and_all_load(fitted, tmp_path):
    # What 'triage fit' and 'nightly --refit-days 0' at once did: both wrote the same temporary folder.
    with ThreadPoolExecutor(max_workers=8) as pool:
        paths = list(pool.map(lambda _: fitted.save(tmp_path), range(16)))
    numbers = sorted(int(p.name.split("-")[2][1:]) for p in paths)
    assert numbers == list(range(1, 17))
    assert all(FleetRiskModel.load(p).horizon_days == 30 for p in paths)
    assert not list(tmp_path.glob(".*"))  # no temporary folder left


def test_saves_straddling_a_clock_second_still_get_distinct_numbers(fitted, tmp_path, monkeypatch):
    # The stamp is part of the folder name, so two saves reading different seconds once both took
    # the same v<N> under different names. A clock that ticks at every reading forces that case.
    import itertools
    from datetime import datetime, timedelta, timezone

    import triage.survival.model as model_module

    ticks = itertools.count()

    class TickingClock(datetime):
        @classmethod
        def now(cls, tz=None):
            return datetime(2026, 1, 1, tzinfo=timezone.utc) + timedelta(seconds=next(ticks))

    monkeypatch.setattr(model_module, "datetime", TickingClock)
    with ThreadPoolExecutor(max_workers=8) as pool:
        paths = list(pool.map(lambda _: fitted.save(tmp_path), range(16)))
    assert sorted(int(p.name.split("-")[2][1:]) for p in paths) == list(range(1, 17))


def test_a_killed_fits_temporary_folder_is_removed_at_the_next_save(fitted, tmp_path):
    # pid 2**22 + 1 is above Linux's pid_max ceiling (4194304, proc(5)): no such process.
    stale = tmp_path / f".fleet-risk-dead.{2**22 + 1}.beef.tmp"
    stale.mkdir()
    (stale / "model.json").write_text("{")
    live = tmp_path / f".fleet-risk-live.{os.getpid()}.beef.tmp"
    live.mkdir()
    fitted.save(tmp_path)
    assert not stale.exists() and live.exists()
