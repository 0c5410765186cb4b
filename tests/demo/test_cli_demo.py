"""`triage demo` runs the whole pipeline on the invented fleet and ends with the ranked report."""

from __future__ import annotations

import csv
import json

import pytest
from typer.testing import CliRunner

from triage.cli import app
from triage.demo import FleetSpec, NotADemoFolder, prepare_demo_folder
from triage.exitcodes import Exit
from triage.store.dataset import Store
from triage.survival import latest_model

#: Big enough for a few failures (so the model is fitted), small enough for a couple of seconds.
FLEET = ["--seed", "7", "--drives", "300", "--days", "60"]


def _demo(work, *extra):
    return CliRunner().invoke(app, ["demo", *FLEET, "--work", str(work), *extra])


@pytest.fixture(scope="module")
def first_run(tmp_path_factory):
    work = tmp_path_factory.mktemp("demo") / "work"
    return work, _demo(work, "--format", "json", "--top", "10")


def test_demo_ingests_fits_ranks_and_writes_tickets(first_run):
    work, result = first_run
    assert result.exit_code == 0, result.output
    store = Store(work / "store")
    assert len(store.days("snapshots")) == 60
    assert latest_model(store) is not None  # the pipeline refitted the survival model
    with open(work / "tickets.csv", newline="", encoding="utf-8") as fh:
        tickets = list(csv.DictReader(fh))
    assert tickets and {t["state"] for t in tickets} == {"new"}


def test_demo_ends_with_the_ranked_report_of_flagged_drives(first_run):
    from triage.risk.score import tier_index

    _, result = first_run
    output = json.loads(result.stdout)
    report = output["drives"]
    assert output["as_of"] and 0 < len(report) <= 10
    assert [r["rank"] for r in report] == sorted(r["rank"] for r in report)
    assert all(r["rules"] and r["evidence"] and r["state"] == "new" for r in report)
    # action tier first, then score inside a tier (docs/ranking.md)
    order = [(tier_index(r["severity"]), -r["score"]) for r in report]
    assert order == sorted(order)


def test_second_demo_of_the_same_fleet_reuses_the_store(first_run):
    work, _ = first_run
    again = _demo(work, "--format", "json")
    assert again.exit_code == 0, again.output
    assert "0 new row(s)" in again.stderr
    with open(work / "tickets.csv", newline="", encoding="utf-8") as fh:
        states = {t["state"] for t in csv.DictReader(fh)}
    assert "new" not in states and "ongoing" in states


def test_demo_refuses_a_folder_it_did_not_write(tmp_path):
    (tmp_path / "keep.txt").write_text("operator notes\n")
    result = _demo(tmp_path)
    assert result.exit_code == Exit.USAGE
    assert "holds no demo.json" in result.stderr
    assert (tmp_path / "keep.txt").read_text() == "operator notes\n"


def test_another_fleet_in_the_same_folder_starts_afresh(tmp_path):
    folder, reused = prepare_demo_folder(tmp_path / "w", FleetSpec(seed=1, n_drives=20, days=3))
    folder.store.mkdir()
    (folder.store / "old").write_text("x")
    assert not reused
    assert prepare_demo_folder(tmp_path / "w", FleetSpec(seed=1, n_drives=20, days=3))[1]
    folder, reused = prepare_demo_folder(tmp_path / "w", FleetSpec(seed=2, n_drives=20, days=3))
    assert not reused and not folder.store.exists()


def test_a_file_in_place_of_the_folder_is_refused(tmp_path):
    (tmp_path / "w").write_text("")
    with pytest.raises(NotADemoFolder, match="not a directory"):
        prepare_demo_folder(tmp_path / "w", FleetSpec(seed=1, n_drives=20, days=3))
