"""The invented operator's fleet: sites, hosts, slots, groups, models, identities, clocks."""

from __future__ import annotations

import re
from datetime import datetime

import pandas as pd

from triage.demo import write_sample
from triage.demo.catalog import WWN_COMPANY_ID


def test_hosts_are_named_by_site_and_hold_12_to_36_slots(default_fleet):
    hosts = default_fleet.hosts
    assert hosts["host"].str.fullmatch(r"(ash|birch|cedar)-st\d{2,}").all()
    assert hosts["slots"].between(12, 36).all()
    assert set(hosts["site_name"]) == {"ash", "birch", "cedar"}


def test_groups_belong_to_one_host_and_record_their_tolerance(default_fleet):
    groups = default_fleet.groups
    assert (groups.apply(lambda g: g["group"].startswith(g["host"] + "-g"), axis=1)).all()
    assert set(groups["tolerance"]) == {1, 2}
    assert (groups.loc[groups["layout"] == "double-parity", "tolerance"] == 2).all()
    assert (groups.loc[groups["layout"] == "mirror", "tolerance"] == 1).all()
    members = default_fleet.slots.groupby("group").size()
    recorded = groups.set_index("group")["members"]
    assert (recorded == members.reindex(recorded.index)).all()


def test_fleet_mixes_at_least_five_models_on_both_buses_with_several_firmwares(default_fleet):
    d = default_fleet.drives
    assert d["model"].nunique() >= 5
    assert set(d["bus"]) == {"ata", "nvme"}
    assert (d.groupby("model")["firmware"].nunique() >= 2).all()


def test_serials_are_unique_across_the_fleet(default_fleet):
    assert default_fleet.drives["serial"].is_unique


def test_wwns_are_naa5_with_the_invented_company_id_and_unique(default_fleet):
    wwn = default_fleet.drives["wwn"].dropna()
    assert len(wwn) and wwn.is_unique
    # NAA 5 (IEEE Registered): 4-bit NAA, 24-bit company id, 36-bit vendor part (ANSI T10 SPC)
    values = [int(w, 16) for w in wwn]
    assert all(v >> 60 == 5 for v in values)
    assert all((v >> 36) & 0xFFFFFF == WWN_COMPANY_ID for v in values)


def test_sites_differ_in_temperature(small_truth):
    s = small_truth.snapshots
    hdd = s[(s["bus"] == "ata") & (s["rotation_rpm"] > 0)]
    site = hdd["host"].str.split("-").str[0]
    mean = hdd.groupby(site)["temperature_c"].mean()
    assert mean["cedar"] < mean["ash"] < mean["birch"]


def test_captures_are_taken_between_two_and_three_at_night_local_time(small_lines):
    offsets = set()
    for _, _, obj in small_lines:
        stamp = datetime.fromisoformat(obj["taken_at"])
        local = stamp.hour * 3600 + stamp.minute * 60 + stamp.second
        assert 2 * 3600 <= local < 3 * 3600 + 60, obj["taken_at"]  # + a few seconds per bay
        offsets.add(obj["taken_at"][-6:] if obj["taken_at"][-1] != "Z" else "Z")
    assert len(offsets) > 1


def test_one_file_per_site_per_night_named_site_and_date(small_fleet, small_files):
    names = {p.name for p in small_files}
    days = pd.date_range(small_fleet.spec.start, periods=small_fleet.spec.days).date
    sites = set(small_fleet.hosts["site_name"])
    expected = {f"{s}-{d.isoformat()}.jsonl.gz" for s in sites for d in days}
    assert names == expected | {"removals.csv"}
    assert all(re.fullmatch(r"[a-z]+-\d{4}-\d{2}-\d{2}\.jsonl\.gz", n) for n in expected)


def test_the_sample_stays_small(tmp_path):
    paths = write_sample(tmp_path)
    total = sum(p.stat().st_size for p in paths)
    assert total < 5 * 2**20
    assert len(paths) > 30


def test_progress_is_reported_once_per_night_up_to_the_total(tmp_path):
    from dataclasses import replace

    from triage.demo import generate_fleet, write_captures
    from tests.demo.conftest import SMALL

    calls = []
    write_captures(generate_fleet(replace(SMALL, n_drives=30, days=4)), tmp_path,
                   progress=lambda done, total: calls.append((done, total)))
    assert calls == [(1, 4), (2, 4), (3, 4), (4, 4)]
