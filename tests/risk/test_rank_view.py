"""``triage rank`` reads what it shows of a saved ranking straight from Arrow (triage.risk.view,
saved.load_view), without pandas. The reference is the same command computing the ranking: the
output must be the same, byte for byte, in every format and with every filter."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from datetime import datetime, timezone

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from tests.risk.test_rank_state import HOSTS, fleet  # noqa: F401  (the fixture: an invented fleet with a saved model)
from triage.cli import app
from triage.risk import rank as rank_module
from triage.risk import saved
from triage.risk.score import missing, moment_text
from triage.risk.view import RowFilter, plain
from triage.store.dataset import Store

runner = CliRunner()

FILTERS = [
    [],
    ["--top", "3"],
    ["--site", "qh", "--top", "500"],
    ["--host", HOSTS[1], "--host", HOSTS[2]],
    ["--group", "*-g[03]", "--severity", "watch", "--severity", "replace-soon"],
    ["--site", "nowhere"],
]


@pytest.fixture
def store(fleet, tmp_path):  # noqa: F811  (the imported fixture)
    root = tmp_path / "store"
    shutil.copytree(fleet["root"], root)
    return Store(root)


def rank(store: Store, *args: str, columns: int = 200):
    return runner.invoke(app, ["rank", "--store", str(store.root), *args], env={"COLUMNS": str(columns)})


@pytest.mark.parametrize("fmt", ["table", "csv", "json"])
@pytest.mark.parametrize("filters", FILTERS, ids=lambda f: " ".join(f) or "none")
def test_a_saved_ranking_shows_exactly_what_the_computed_one_shows(store, monkeypatch, fmt, filters):
    shutil.rmtree(store.derived_dir, ignore_errors=True)
    computed = rank(store, "--format", fmt, *filters)
    assert computed.exit_code in (0, 8), computed.output
    monkeypatch.setattr(rank_module, "_rank_afresh", lambda *a, **k: pytest.fail("computed, not read"))
    read = rank(store, "--format", fmt, *filters)
    assert (read.exit_code, read.stdout, read.stderr) == (computed.exit_code, computed.stdout, computed.stderr)


def test_the_fixture_has_every_part_a_report_shows(store):
    # what the comparison above covers: drives with a model's P(fail), a degraded group's caution,
    # silent drives, and a site, host or drive not reporting
    shown = json.loads(rank(store, "--format", "json", "--top", "500").stdout)
    assert shown["drives"] and all(d["p_fail"] is not None for d in shown["drives"])
    assert shown["degraded_groups"] and shown["not_reporting"]
    assert any(d["evidence"] for d in shown["drives"])


def test_the_narrow_table_is_the_same_too(store, monkeypatch):
    shutil.rmtree(store.derived_dir, ignore_errors=True)
    computed = rank(store, "--top", "8", columns=80)
    monkeypatch.setattr(rank_module, "_rank_afresh", lambda *a, **k: pytest.fail("computed, not read"))
    assert rank(store, "--top", "8", columns=80).stdout == computed.stdout


def test_rank_on_a_saved_ranking_imports_no_pandas(store):
    entry = ("import sys; from triage.cli import main; sys.argv[0] = 'triage'\n"
             "try:\n    main()\nexcept SystemExit:\n    pass\n"
             "print('pandas' in sys.modules, 'pyarrow.dataset' in sys.modules, file=sys.stderr)")
    argv = [sys.executable, "-c", entry, "rank", "--store", str(store.root), "--site", "qh", "--format", "csv"]
    subprocess.run(argv, capture_output=True, text=True, timeout=300, check=True)  # computes and saves
    second = subprocess.run(argv, capture_output=True, text=True, timeout=300, check=True)
    assert second.stderr.splitlines()[-1] == "False False", second.stderr


def test_ticket_states_are_read_from_the_whole_ranking(store, tmp_path):
    # --tickets needs every flagged drive's key: that run takes the pandas path and still answers
    tickets = tmp_path / "tickets.csv"
    assert runner.invoke(app, ["tickets", "--out", str(tickets), "--store", str(store.root)]).exit_code in (0, 4, 8)
    shown = json.loads(rank(store, "--format", "json", "--tickets", str(tickets)).stdout)
    assert {d["state"] for d in shown["drives"] if d["rules"]} == {"new"}


def test_a_corrupt_saved_ranking_is_computed_and_replaced(store):
    rank(store, "--format", "csv")
    (key,) = [p for p in (store.derived_dir / saved.RANKINGS_DIR).iterdir() if not p.name.startswith(".")]
    (key / "drives.parquet").write_bytes(b"not parquet")
    expected = rank(store, "--format", "csv")
    assert expected.stdout.startswith("rank,")
    assert (key / "drives.parquet").read_bytes()[:4] == b"PAR1"  # replaced by the ranking computed


def test_a_row_filter_keeps_drives_matching_every_filter_in_rank_order():
    hosts = ["ash-r1-n01", "ash-r1-n02", "elm-r1-n01", None, "ash-r1-n01"]
    groups = ["g1", "g2", None, "g1", "g3"]
    severities = ["watch", None, "replace-now", "watch", "check-path"]
    counts = [1, 0, 2, 1, 1]
    assert RowFilter().kept(hosts, groups, severities) == [0, 1, 2, 3, 4]
    assert RowFilter(site=["ash"]).kept(hosts, groups, severities) == [0, 1, 4]
    assert RowFilter(host=["*n01"], group=["g[13]"]).kept(hosts, groups, severities) == [0, 4]
    assert RowFilter(severity=["watch"], top=1).kept(hosts, groups, severities) == [0]
    assert RowFilter(flagged_only=True).kept(hosts, groups, severities, counts) == [0, 2, 3, 4]
    with pytest.raises(ValueError, match="unknown severity"):
        RowFilter(severity=["soonish"])


def test_plain_values_are_the_same_from_pandas_and_from_arrow():
    stamp = datetime(2026, 11, 28, 2, 41, tzinfo=timezone.utc)
    assert plain(np.float64("nan")) is None and plain(pd.NaT) is None and plain(pd.NA) is None
    assert plain(np.int64(7)) == 7 and type(plain(np.int64(7))) is int
    assert plain(pd.Timestamp(stamp)).isoformat() == stamp.isoformat()
    assert plain([np.int64(1), None]) == [1, None]


def test_moment_text_without_pandas_matches_pandas():
    # pandas' own conversion as the reference (pd.Timestamp.tz_convert / tz_localize)
    for value in (datetime(2026, 11, 28, 2, 41, 59, tzinfo=timezone.utc), pd.Timestamp("2026-11-28 03:41+01:00"),
                  pd.Timestamp("2026-11-28 02:41"), np.datetime64("2026-11-28T02:41")):
        reference = pd.Timestamp(value)
        reference = reference.tz_convert("UTC") if reference.tzinfo else reference.tz_localize("UTC")
        assert moment_text(value) == reference.strftime("%Y-%m-%d %H:%M UTC")
    assert moment_text(None) == moment_text(pd.NaT) == moment_text(float("nan")) == "never"
    assert missing(pd.NA) and not missing(0.0)


def test_saved_times_read_without_pandas_equal_arrows_own_conversion():
    # Arrow's to_pylist (which uses pandas for zone names and nanoseconds) is the reference
    import pyarrow as pa

    moments = [pd.Timestamp("2026-01-02 03:04:05.123456", tz="UTC"), None, pd.Timestamp("1969-12-31 23:59:59", tz="UTC")]
    table = pa.table({
        "ns": pa.array(moments, pa.timestamp("ns", tz="UTC")),
        "us_paris": pa.array(moments, pa.timestamp("us", tz="Europe/Paris")),
        "s_lists": pa.array([[moments[0].floor("s")], None, []], pa.list_(pa.timestamp("s", tz="UTC"))),
    })
    got, reference = saved._rows(table), table.to_pylist()
    for row, expected in zip(got, reference):
        assert row["ns"] == expected["ns"] and row["us_paris"] == expected["us_paris"]
        assert row["s_lists"] == expected["s_lists"]
        assert all(v is None or v.utcoffset().total_seconds() == 0 for v in (row["ns"], row["us_paris"]))
