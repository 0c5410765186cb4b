"""The packaged default rules on hand-built drive histories: each fires where it should and not
where it should not. Thresholds and their sources are in triage/rules_default/*.toml; the NVMe bit
positions are those of the NVMe Base Specification 2.0, SMART / Health Information log (02h),
byte 0 Critical Warning: bit 0 spare below threshold, 1 temperature, 2 reliability degraded,
3 read-only, 4 volatile memory backup failed.
"""

from __future__ import annotations

import pytest

from triage.rules import Severity, evaluate, load_rules, per_drive

from tests.rules.histories import ata_ssd, frame, hdd, nvme

DEFAULTS = load_rules([])
WEEK = 8  # daily captures on days 0..7: the day-0 capture is the 7-day baseline


def fired(rule_id: str, *drives) -> set[str]:
    flags = evaluate(DEFAULTS, frame(*drives))
    return set(flags.loc[flags["rule_id"] == rule_id, "serial"])


def flat(value, extra):
    """A week of daily captures holding ``value``, then ``extra`` as the last capture."""
    return [value] * (WEEK - 1) + [extra]


# rule id -> (drives where it must fire, drives where it must not)
CASES = {
    "device.prefail-threshold": (
        [hdd("HIT", threshold_tripped=True, prefail_tripped=True)],
        [hdd("MISS", threshold_tripped=True, prefail_tripped=False), nvme("NV")],
    ),
    "device.advisory-threshold": (
        [hdd("HIT", threshold_tripped=True, prefail_tripped=False)],
        [hdd("MISS", threshold_tripped=True, prefail_tripped=True), hdd("OK")],
    ),
    "device.nvme-reliability-degraded": (  # bit 2
        [nvme("HIT", nvme_critical_warning=0b00100)],
        [nvme("MISS", nvme_critical_warning=0b11011), hdd("ATA")],
    ),
    "device.nvme-read-only": (  # bit 3
        [nvme("HIT", nvme_critical_warning=0b01000)],
        [nvme("MISS", nvme_critical_warning=0b10111)],
    ),
    "device.nvme-backup-failed": (  # bit 4
        [nvme("HIT", nvme_critical_warning=0b10000)],
        [nvme("MISS", nvme_critical_warning=0b01111)],
    ),
    "wear.nvme-spare-below-threshold": (  # bit 0
        [nvme("HIT", nvme_critical_warning=0b00001, nvme_spare_pct=4, nvme_spare_threshold_pct=10)],
        [nvme("MISS", nvme_critical_warning=0b11110)],
    ),
    "thermal.nvme-temperature-warning": (  # bit 1
        [nvme("HIT", nvme_critical_warning=0b00010, temperature_c=84)],
        [nvme("MISS", nvme_critical_warning=0b11101, temperature_c=84)],
    ),
    "media.reallocated-present": (
        [hdd("HIT", reallocated_sectors=1)],
        [hdd("MISS", reallocated_sectors=0), nvme("NV")],
    ),
    "media.pending-present": ([hdd("HIT", pending_sectors=1)], [hdd("MISS")]),
    "media.offline-uncorrectable-present": ([hdd("HIT", offline_uncorrectable=2)], [hdd("MISS")]),
    "media.reported-uncorrectable": ([hdd("HIT", reported_uncorrectable=1)], [hdd("MISS")]),
    "media.pending-growth": (
        [hdd("HIT", pending_sectors=flat(0, 8))],
        [hdd("SEVEN", pending_sectors=flat(0, 7)),
         # grew by 12 over 10 days, but only by 5 within the last 7
         hdd("SLOW", pending_sectors=[0, 3, 6, 7, 8, 9, 10, 10, 11, 11, 12])],
    ),
    "media.reallocated-growth": (
        [hdd("HIT", reallocated_sectors=flat(16, 24))],
        [hdd("MISS", reallocated_sectors=flat(16, 23))],
    ),
    "media.offline-uncorrectable-growth": (
        [hdd("HIT", offline_uncorrectable=flat(0, 1))],
        [hdd("MISS", offline_uncorrectable=flat(1, 1))],
    ),
    "media.nvme-media-errors-present": ([nvme("HIT", nvme_media_errors=1)], [nvme("MISS"), hdd("ATA")]),
    "media.nvme-media-errors-growth": (
        [nvme("HIT", nvme_media_errors=flat(2, 3))],
        [nvme("MISS", nvme_media_errors=flat(2, 2))],
    ),
    "wear.nvme-used-90": (
        [nvme("HIT", nvme_used_pct=90), nvme("HIT99", nvme_used_pct=99)],
        [nvme("LOW", nvme_used_pct=89), nvme("FULL", nvme_used_pct=100)],
    ),
    "wear.nvme-used-100": (
        [nvme("HIT", nvme_used_pct=100), nvme("PAST", nvme_used_pct=104)],  # the value may exceed 100
        [nvme("MISS", nvme_used_pct=99)],
    ),
    "thermal.hdd-hot": (
        [hdd("HIT", temperature_c=61)],
        [hdd("AT_LIMIT", temperature_c=60), ata_ssd("SSD", temperature_c=65), nvme("NV", temperature_c=65)],
    ),
    "thermal.ata-ssd-hot": (
        [ata_ssd("HIT", temperature_c=71)],
        [ata_ssd("AT_LIMIT", temperature_c=70), nvme("NV", temperature_c=75), hdd("HDD", temperature_c=58)],
    ),
    "path.crc-rising": (
        [hdd("HIT", crc_errors=[112, 120, 131, 140])],
        [hdd("PAUSE", crc_errors=[112, 120, 120, 140]), hdd("SHORT", crc_errors=[120, 131, 140])],
    ),
    "path.crc-growth": (
        [hdd("HIT", crc_errors=flat(5, 15))],
        [hdd("MISS", crc_errors=flat(5, 14))],
    ),
    "path.command-timeouts-growth": (
        [hdd("HIT", command_timeouts=flat(0, 1))],
        [hdd("MISS", command_timeouts=flat(3, 3))],
    ),
}


def test_every_default_rule_has_a_case_here():
    assert set(CASES) == {rule.id for rule in DEFAULTS.rules}


@pytest.mark.parametrize("rule_id", sorted(CASES))
def test_default_rule_fires_where_it_should(rule_id):
    hits, _ = CASES[rule_id]
    assert fired(rule_id, *hits) == {drive[0]["serial"] for drive in hits}


@pytest.mark.parametrize("rule_id", sorted(CASES))
def test_default_rule_stays_quiet_where_it_should(rule_id):
    _, misses = CASES[rule_id]
    assert fired(rule_id, *misses) == set()


def test_a_healthy_mixed_fleet_raises_no_flag():
    history = frame(hdd("QHA001", days=range(WEEK)), ata_ssd("QHS001", days=range(WEEK)),
                    nvme("QHN001", days=range(WEEK)))
    assert evaluate(DEFAULTS, history).empty


def test_crc_growth_routes_to_check_path_and_never_to_replacement():
    history = frame(hdd("QHA007", crc_errors=[0, 4, 9, 15, 22, 30, 37, 45]))
    flags = evaluate(DEFAULTS, history)
    assert set(flags["rule_id"]) == {"path.crc-rising", "path.crc-growth"}
    assert set(flags["severity"]) == {"check-path"} and set(flags["category"]) == {"path"}
    drive = per_drive(flags).iloc[0]
    assert not drive.replace_drive
    assert not Severity(drive.severity).replaces_drive


def test_pending_growth_evidence_states_the_numbers():
    flags = evaluate(DEFAULTS, frame(hdd("QHA002", pending_sectors=[0, 0, 0, 0, 0, 0, 24, 24])))
    row = flags[flags["rule_id"] == "media.pending-growth"].iloc[0]
    assert row.evidence == "pending sectors 0 -> 24 in 7 days"
    assert row.severity == "replace-soon"


def test_crc_rising_evidence_states_the_run():
    flags = evaluate(DEFAULTS, frame(hdd("QHA003", crc_errors=[112, 120, 131, 140])))
    row = flags[flags["rule_id"] == "path.crc-rising"].iloc[0]
    assert row.evidence.startswith("CRC errors rose on 3 consecutive captures (112 -> 140)")


def test_spare_below_threshold_is_replace_now_and_wear():
    flags = evaluate(DEFAULTS, frame(nvme("QHN002", nvme_critical_warning=1, nvme_spare_pct=4)))
    row = flags[flags["rule_id"] == "wear.nvme-spare-below-threshold"].iloc[0]
    assert (row.severity, row.category) == ("replace-now", "wear")
    assert "available spare 4% is below the threshold 10%" in row.evidence


def test_the_default_set_needs_eight_days_of_history():
    # longest default window is 7 days (growth rules), plus one day for the baseline capture
    assert DEFAULTS.window_days == 8
