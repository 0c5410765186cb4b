"""The backtest replays its nights either in one loop (in the command's process) or in stretches
that an engine runs anywhere, each from the drive states at its warm-up night. The stretches
give the one loop's result exactly: the warm-up rebuilds the rule window, growth base and
in-service drives of the night-by-night replay. Exactness check of our own decomposition: the
reference is the one-loop replay; the scores themselves are checked against hand counts in
test_backtest.py."""

from __future__ import annotations

import pandas as pd
import pytest

from triage.engine import LocalEngine
from triage.risk import backtest
from triage.risk.backtest import backtest_store
from triage.rules import load_rules
from triage.store.dataset import Store

T0 = pd.Timestamp("2026-01-01T02:00:00Z")
NIGHTS = 70


def history():
    """40 invented drives captured nightly; the first 16 grow reallocated sectors by one a night
    from night 5 (so the growth over 14 days differs from the growth since the first capture),
    and every other one of those fails between nights 30 and 58; two quiet drives fail too."""
    rows, removals = [], []
    for i in range(40):
        serial = f"QS{i:04d}"
        growing = i < 16
        end = 30 + 4 * (i // 2) if growing and i % 2 == 0 else (40 + i if i in (20, 21) else NIGHTS)
        for night in range(min(end + 1, NIGHTS)):
            rows.append({"serial": serial, "model": "QH-HD8T-A" if i % 3 else "Tallow 14T", "firmware": "QA02",
                         "bus": "ata", "host": f"ash-st{i % 4:02d}", "slot": f"bay{i:02d}", "group": None,
                         "taken_at": T0 + pd.Timedelta(days=night), "power_on_hours": 9_000 + 500 * i + 24 * night,
                         "temperature_c": 35 + i % 12, "pending_sectors": 0,
                         "reallocated_sectors": max(0, night - 5) if growing else 0, "prefail_tripped": False})
        if end < NIGHTS:
            removals.append({"serial": serial, "removed_at": T0 + pd.Timedelta(days=end, hours=10),
                             "reason": "failed", "note": None})
    return pd.DataFrame(rows), pd.DataFrame(removals)


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    snapshots, removals = history()
    target = Store(tmp_path_factory.mktemp("fleet"))
    target.commit({"snapshots": snapshots, "removals": removals})  # one batch
    return target


def replay(store, engine=None):
    return backtest_store(store, load_rules([], include_defaults=True), horizon_days=10, refit_days=8,
                          max_false_alarm=0.2, engine=engine)


def test_three_night_stretches_give_the_result_of_the_one_loop_replay(store, monkeypatch):
    monkeypatch.setattr(backtest, "STRETCH_NIGHTS", 3)
    whole = replay(store)
    with LocalEngine(workers=1) as inline:  # stretches, run one after another in this process
        short = replay(store, inline)
    assert whole.methods["failures"].iloc[0] > 0 and len(whole.refits) >= 2
    pd.testing.assert_frame_equal(whole.methods, short.methods, check_exact=True)
    pd.testing.assert_frame_equal(whole.curve, short.curve, check_exact=True)
    pd.testing.assert_frame_equal(whole.forecasts, short.forecasts, check_exact=True)
    assert (whole.operating_point, whole.refits, whole.notes) == (short.operating_point, short.refits, short.notes)
