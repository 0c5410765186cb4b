"""A saved ranking is reused only when it is the ranking ``rank_store`` would compute.

The reference is the ranking computed afresh on the same store (``reuse=False``): the saved one
must equal it frame by frame, and any change of input -- a new night, an edited rule, another
group configuration or silence threshold, a refit, a new version of the code -- must miss.
"""

from __future__ import annotations

import dataclasses
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from tests.risk.test_rank_state import fleet  # noqa: F401  (the fixture: an invented fleet with a saved model)
from triage.risk import rank as rank_module
from triage.risk import saved
from triage.risk.groups import GroupConfig, GroupRule
from triage.risk.rank import rank_store
from triage.rules import load_rules
from triage.store.dataset import Store

FRAMES = ("drives", "groups", "silent", "not_reporting", "flags", "lost")


def assert_same_ranking(got, expected) -> None:
    for name in FRAMES:
        pd.testing.assert_frame_equal(getattr(got, name), getattr(expected, name), obj=name)
        assert cell_types(getattr(got, name)) == cell_types(getattr(expected, name)), name
    assert (got.model_used, got.horizon_days, got.as_of, got.notes, got.removed) == \
        (expected.model_used, expected.horizon_days, expected.as_of, expected.notes, expected.removed)


def cell_types(frame: pd.DataFrame) -> dict:
    """The Python type of every value in object columns, list items included: renderers treat a
    ``pd.Timestamp`` and a ``datetime`` differently, which ``assert_frame_equal`` does not see."""
    types = {}
    for column in frame.columns[frame.dtypes == object]:
        types[column] = [[type(item).__name__ for item in value] if isinstance(value, list) else type(value).__name__
                         for value in frame[column]]
    return types


@pytest.fixture
def store(fleet, tmp_path):  # noqa: F811  (the imported fixture)
    """A copy of the fleet's store, so that each test saves its own rankings."""
    root = tmp_path / "store"
    shutil.copytree(fleet["root"], root)
    return Store(root)


def computing_forbidden(monkeypatch) -> None:
    def refuse(*args, **kwargs):
        raise AssertionError("the ranking was computed, not read")

    monkeypatch.setattr(rank_module, "_rank_afresh", refuse)


def saved_keys(store: Store) -> list[str]:
    folder = store.derived_dir / saved.RANKINGS_DIR
    return sorted(p.name for p in folder.iterdir() if not p.name.startswith(".")) if folder.is_dir() else []


def test_a_saved_ranking_equals_the_ranking_computed_afresh(store, monkeypatch):
    ruleset = load_rules([], include_defaults=True)
    fresh = rank_store(store, ruleset)
    assert fresh.model_used and len(fresh.lost) and len(fresh.silent) and len(fresh.flags)  # all parts present
    first = rank_store(store, ruleset, reuse=True)  # computes and saves
    assert len(saved_keys(store)) == 1
    computing_forbidden(monkeypatch)
    again = rank_store(store, ruleset, reuse=True)
    assert_same_ranking(first, fresh)
    assert_same_ranking(again, fresh)


def test_ticket_states_are_applied_to_the_saved_ranking(store, tmp_path, monkeypatch):
    from triage.risk.tickets import export_tickets  # noqa: PLC0415

    ruleset = load_rules([], include_defaults=True)
    first = rank_store(store, ruleset, reuse=True)
    tickets = tmp_path / "tickets.csv"
    export_tickets(first.drives, tickets, None, as_of=first.as_of, removed=first.removed, silent=first.silent)
    fresh = rank_store(store, ruleset, tickets=tickets)
    computing_forbidden(monkeypatch)
    again = rank_store(store, ruleset, tickets=tickets, reuse=True)
    assert_same_ranking(again, fresh)
    assert set(again.drives["state"].dropna()) - {None}  # states were filled in


def test_a_new_night_misses(store):
    ruleset = load_rules([], include_defaults=True)
    before = rank_store(store, ruleset, reuse=True)
    night = store.read("snapshots", since=(pd.Timestamp(before.as_of) - pd.Timedelta(hours=12)).to_pydatetime())
    night = night.assign(taken_at=night["taken_at"] + pd.Timedelta(days=1),
                         pending_sectors=night["pending_sectors"].fillna(0) + 50)
    store.commit({"snapshots": night})
    after = rank_store(store, ruleset, reuse=True)
    assert after.as_of > before.as_of
    assert_same_ranking(after, rank_store(store, ruleset))
    assert len(saved_keys(store)) == 2


@pytest.mark.parametrize("change", ["rule file", "group config", "silence threshold", "refit", "code"])
def test_a_changed_input_misses(store, tmp_path, monkeypatch, change):
    defaults = load_rules([], include_defaults=True)
    rank_store(store, defaults, reuse=True)
    ruleset, config, hours = defaults, None, rank_module.STALE_HOURS
    if change == "rule file":
        folder = tmp_path / "rules"
        folder.mkdir()
        (folder / "site.toml").write_text(
            '[[rule]]\nid = "site.runs-warm"\ntitle = "Runs warm"\nseverity = "watch"\ncategory = "thermal"\n'
            'when = "temperature_c > 20"\nexplain = "temperature {temperature_c} C"\n'
            'source = "invented for this test"\n')
        ruleset = load_rules([folder], include_defaults=True)
        assert not ruleset.errors, ruleset.errors
    elif change == "group config":
        config = GroupConfig((GroupRule(pattern="*", tolerance=2),))
    elif change == "silence threshold":
        hours = 60.0
    elif change == "refit":
        model = saved_model_dir(store)
        shutil.copytree(model, model.parent / model.name.replace("-v1-", "-v2-"))
    elif change == "code":  # an upgrade: another source file (test_the_code_stamp_... shows what changes it)
        stamp = saved._code_stamp()
        monkeypatch.setattr(saved, "_code_stamp", lambda: [*stamp, ("added.py", 1, 1)])
    fresh = rank_store(store, ruleset, config=config, silent_hours=hours)
    got = rank_store(store, ruleset, config=config, silent_hours=hours, reuse=True)
    assert_same_ranking(got, fresh)
    assert len(saved_keys(store)) == 2  # computed and saved under a key of its own


def test_the_code_stamp_follows_each_source_files_size_and_time(tmp_path):
    # a copy of a package, not the installed one: tests running beside this one read its stamp
    package = tmp_path / "package"
    (package / "sub").mkdir(parents=True)
    source = package / "sub" / "module.py"
    source.write_text("x = 1\n")
    (package / "notes.txt").write_text("not source\n")
    first = saved._code_stamp(package)
    info = source.stat()
    os.utime(source, ns=(info.st_atime_ns, info.st_mtime_ns + 1_000_000_000))
    touched = saved._code_stamp(package)
    source.write_text("x = 10\n")
    os.utime(source, ns=(info.st_atime_ns, info.st_mtime_ns + 1_000_000_000))
    edited = saved._code_stamp(package)
    (package / "notes.txt").write_text("still not source, now longer\n")
    assert len({repr(first), repr(touched), repr(edited)}) == 3
    assert saved._code_stamp(package) == edited


def saved_model_dir(store: Store) -> Path:
    from triage.store.models import latest_model_dir  # noqa: PLC0415

    folder = latest_model_dir(store)
    assert folder is not None
    return folder


def test_an_unreadable_saved_ranking_is_computed_again(store):
    ruleset = load_rules([], include_defaults=True)
    fresh = rank_store(store, ruleset, reuse=True)
    (key,) = saved_keys(store)
    (store.derived_dir / saved.RANKINGS_DIR / key / "drives.parquet").write_bytes(b"not parquet")
    assert_same_ranking(rank_store(store, ruleset, reuse=True), fresh)


def test_a_store_that_cannot_keep_rankings_still_ranks(store):
    store.derived_dir.write_text("a file where the folder would go\n")
    ruleset = load_rules([], include_defaults=True)
    assert_same_ranking(rank_store(store, ruleset, reuse=True), rank_store(store, ruleset))
    assert store.derived_dir.read_text() == "a file where the folder would go\n"


def test_a_stale_current_state_is_not_trusted_nor_saved(store):
    ruleset = load_rules([], include_defaults=True)
    (store.root / "current" / "state.json").write_text("{}\n")  # as if written by another tool
    assert store.state_token() is None
    result = rank_store(store, ruleset, reuse=True)
    assert any(n.startswith("current state rebuilt") for n in result.notes)
    assert saved_keys(store) == []


def test_only_the_newest_rankings_are_kept(store):
    ruleset = load_rules([], include_defaults=True)
    for hours in range(30, 30 + saved.KEEP + 2):
        rank_store(store, ruleset, silent_hours=float(hours), reuse=True)
    assert len(saved_keys(store)) == saved.KEEP


def test_the_rank_command_prints_the_same_from_a_saved_ranking(store):
    entry = "import sys; from triage.cli import main; sys.argv[0] = 'triage'; sys.exit(main())"
    argv = [sys.executable, "-c", entry, "rank", "--store", str(store.root), "--format", "json", "--top", "40"]
    first = subprocess.run(argv, capture_output=True, text=True, timeout=300)
    assert saved_keys(store), first.stderr
    second = subprocess.run(argv, capture_output=True, text=True, timeout=300)
    assert first.returncode == second.returncode
    assert first.stdout == second.stdout and '"p_fail"' in first.stdout
    assert first.stderr == second.stderr


def test_ingest_ranks_ahead_with_the_last_ranks_rules_and_options(tmp_path, monkeypatch):
    from typer.testing import CliRunner  # noqa: PLC0415

    from tests.ingest.lines import ata_line  # noqa: PLC0415
    from triage.cli import app  # noqa: PLC0415

    def night(day: int) -> Path:
        path = tmp_path / f"ash-st01-2026-11-{day:02d}.jsonl"
        path.write_text("".join(ata_line(serial=f"QHA000000{n}", taken_at=f"2026-11-{day:02d}T02:1{n}:00Z",
                                         slot=f"bay0{n}") + "\n" for n in range(1, 6)))
        return path

    runner, root = CliRunner(), tmp_path / "store"
    rules = tmp_path / "rules"
    rules.mkdir()
    (rules / "site.toml").write_text(
        '[[rule]]\nid = "site.reallocated-any"\ntitle = "Any reallocation"\nseverity = "watch"\n'
        'category = "media"\nwhen = "reallocated_sectors > 0"\nexplain = "{reallocated_sectors} reallocated"\n'
        'source = "invented for this test"\n')
    for day in (1, 2):
        assert runner.invoke(app, ["ingest", str(night(day)), "--store", str(root)]).exit_code == 0
    first = runner.invoke(app, ["rank", "--store", str(root), "--rules", str(rules), "--stale-hours", "9000",
                                "--format", "json"])
    assert "site.reallocated-any" in first.stdout
    ingested = runner.invoke(app, ["ingest", str(night(3)), "--store", str(root)])
    assert ingested.exit_code == 0 and "ahead for 'triage rank'" in ingested.stderr, ingested.stderr
    store = Store(root)
    expected = rank_store(store, load_rules([rules], include_defaults=True), silent_hours=9000.0)
    computing_forbidden(monkeypatch)
    again = runner.invoke(app, ["rank", "--store", str(root), "--rules", str(rules), "--stale-hours", "9000",
                                "--format", "json"])
    shown = [d["serial"] for d in json.loads(again.stdout)["drives"]]
    assert shown == list(expected.drives["serial"]) and "2026-11-03" in json.loads(again.stdout)["as_of"]


def test_a_ranking_arrow_cannot_hold_is_not_kept_and_the_rank_still_answers(store, monkeypatch):
    ruleset = load_rules([], include_defaults=True)
    fresh = rank_store(store, ruleset)
    odd = fresh.drives.copy()
    odd["state"] = [object()] * len(odd)  # no Arrow type for it
    monkeypatch.setattr(rank_module, "_rank_afresh", lambda *args: dataclasses.replace(fresh, drives=odd))
    got = rank_store(store, ruleset, reuse=True)
    assert got.drives["state"].iloc[0] is odd["state"].iloc[0]
    assert saved_keys(store) == []
    assert not any((store.derived_dir / saved.RANKINGS_DIR).glob(".*"))  # no half-written folder left


def test_ranking_ahead_that_fails_leaves_the_ingest_standing(tmp_path, monkeypatch):
    from typer.testing import CliRunner  # noqa: PLC0415

    from tests.ingest.lines import ata_line  # noqa: PLC0415
    from triage.cli import app  # noqa: PLC0415

    runner, root = CliRunner(), tmp_path / "store"
    for day in (1, 2):
        night = tmp_path / f"n{day}.jsonl"
        night.write_text(ata_line(serial="QHA0000009", taken_at=f"2026-11-0{day}T02:10:00Z") + "\n")
        if day == 2:
            def broken(*args, **kwargs):
                raise RuntimeError("out of luck")

            monkeypatch.setattr(rank_module, "rank_store", broken)
        result = runner.invoke(app, ["ingest", str(night), "--store", str(root)])
        assert result.exit_code == 0, result.output
        if day == 1:
            assert runner.invoke(app, ["rank", "--store", str(root), "--stale-hours", "9000"]).exit_code == 0
    assert "ranking not saved ahead: RuntimeError: out of luck" in result.stderr
    assert len(Store(root).read("snapshots")) == 2  # the night is stored all the same
