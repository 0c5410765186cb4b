"""One capture run against the fake kernel: the file it writes, partial failures, root, atomicity."""

from __future__ import annotations

import errno
import gzip
import json
import os
from datetime import datetime, timedelta, timezone

import pytest

from tests.capture import fleet
from tests.capture.fakekernel import ABORTED_BY_DRIVE, INVALID_OPCODE, FakeKernel
from triage.capture import run
from triage.capture.commands import Failure
from triage.capture.deviceio import DeviceIO
from triage.capture.devices import Target
from triage.capture.groupmap import parse_group_map
from triage.exitcodes import Exit

NIGHT = datetime(2026, 11, 2, 2, 15, 30, tzinfo=timezone.utc)
ALL = [Target(t.device, "ata") for t in fleet.ATA] + [Target(t.device, "nvme") for t in fleet.NVME]


def capture(tmp_path, faults=None, targets=ALL, group_map=None, now=lambda: NIGHT, kernel=None):
    kernel = kernel or FakeKernel(fleet.drives(faults))
    io = DeviceIO(opener=kernel.open, ioctl=kernel.ioctl, closer=kernel.close)
    result = run.capture_host(targets, tmp_path, group_map, io=io, hostname=fleet.HOST, now=now,
                              geteuid=lambda: 0)
    return result, kernel


def lines(path):
    with gzip.open(path, "rt", encoding="utf-8") as fh:
        return [json.loads(line) for line in fh]


def test_one_file_named_host_and_utc_date_with_one_line_per_drive(tmp_path):
    result, _ = capture(tmp_path)
    assert result.path == tmp_path / "ash-st07-2026-11-02.jsonl.gz"
    assert [r["device"] for r in lines(result.path)] == [t.path for t in ALL]
    assert result.exit_code is Exit.OK and result.failures == []


def test_ata_line_has_exactly_the_contract_fields_and_the_drive_sectors(tmp_path):
    result, _ = capture(tmp_path)
    line = lines(result.path)[0]
    sectors = fleet.drives()["/dev/sda"].payloads
    assert list(line) == ["capture", "host", "device", "slot", "group", "taken_at", "bus",
                          "identify", "smart", "thresholds"]
    assert (line["capture"], line["host"], line["bus"]) == (1, "ash-st07", "ata")
    assert line["identify"] == sectors["identify"].hex()  # lowercase hex, no separators
    assert line["smart"] == sectors["smart"].hex() and line["thresholds"] == sectors["thresholds"].hex()


def test_nvme_line_has_identify_and_health(tmp_path):
    result, _ = capture(tmp_path)
    line = lines(result.path)[3]
    sectors = fleet.drives()["/dev/nvme0"].payloads
    assert list(line)[-2:] == ["identify", "health"] and line["bus"] == "nvme"
    assert len(line["identify"]) == 2 * 4096 and line["identify"] == sectors["identify"].hex()
    assert line["health"] == sectors["health"].hex()


def test_taken_at_is_rfc3339_utc_and_the_file_date_is_the_utc_date(tmp_path):
    evening_in_chicago = datetime(2026, 11, 1, 21, 30, tzinfo=timezone(timedelta(hours=-6)))
    result, _ = capture(tmp_path, now=lambda: evening_in_chicago)
    assert result.path.name == "ash-st07-2026-11-02.jsonl.gz"  # 03:30 UTC on the 2nd
    assert lines(result.path)[0]["taken_at"] == "2026-11-02T03:30:00Z"  # RFC 3339 §5.6, "Z" offset


def test_group_map_fills_slot_and_group_by_serial_or_wwn(tmp_path):
    group_map = parse_group_map("QHA7K2M002,ash-r03-bay02,ash-pool-a\n"
                                "wwn:5000cca0aa11bb22,ash-r03-bay03,ash-pool-a\n"
                                "CNV1920A0043,ash-r03-nvme1,ash-pool-n\n")
    result, _ = capture(tmp_path, group_map=group_map)
    placed = {r["device"]: (r["slot"], r["group"]) for r in lines(result.path)}
    assert placed == {
        "/dev/sda": (None, None),
        "/dev/sdb": ("ash-r03-bay02", "ash-pool-a"),
        "/dev/sdc": ("ash-r03-bay03", "ash-pool-a"),  # by the WWN in IDENTIFY words 108-111
        "/dev/nvme0": (None, None),
        "/dev/nvme1": ("ash-r03-nvme1", "ash-pool-n"),
    }


def test_a_failing_drive_is_reported_and_the_others_are_still_written(tmp_path):
    result, _ = capture(tmp_path, {"/dev/sdb": {"smart": ABORTED_BY_DRIVE}})
    assert [r["device"] for r in lines(result.path)] == ["/dev/sda", "/dev/sdc", "/dev/nvme0", "/dev/nvme1"]
    [failure] = result.failures
    assert (failure.device, failure.command, failure.failure) == ("/dev/sdb", "SMART READ DATA", Failure.ABORTED)
    assert result.exit_code is Exit.DEVICE_ERRORS


def test_a_drive_without_the_thresholds_command_is_captured_without_thresholds(tmp_path):
    result, _ = capture(tmp_path, {"/dev/sda": {"thresholds": INVALID_OPCODE}})
    line = lines(result.path)[0]
    assert "thresholds" not in line and "smart" in line
    assert result.exit_code is Exit.OK
    assert result.warnings == ["/dev/sda: captured without thresholds: SMART READ THRESHOLDS: not supported "
                               "(sense key 5h ILLEGAL REQUEST, ASC/ASCQ 20h/00h INVALID COMMAND OPERATION CODE)"]


def test_a_drive_vanishing_mid_run_is_reported_and_its_node_closed(tmp_path):
    gone = OSError(errno.ENODEV, "No such device")
    result, kernel = capture(tmp_path, {"/dev/sdb": {"smart": gone}, "/dev/nvme1": {"health": gone}})
    assert {f.device: f.failure for f in result.failures} == {"/dev/sdb": Failure.GONE, "/dev/nvme1": Failure.GONE}
    assert [r["device"] for r in lines(result.path)] == ["/dev/sda", "/dev/sdc", "/dev/nvme0"]
    assert sorted(kernel.closed) == sorted(t.path for t in ALL)


def test_a_named_device_that_does_not_exist_fails_at_open(tmp_path):
    result, _ = capture(tmp_path, targets=[Target("/dev/sdq", "ata"), ALL[0]])
    assert result.failures[0].command == "open" and result.failures[0].failure is Failure.GONE
    assert len(lines(result.path)) == 1


def test_when_no_drive_can_be_read_no_file_is_written(tmp_path):
    result, _ = capture(tmp_path, targets=[Target("/dev/sdq", "ata")])
    assert result.path is None and list(tmp_path.iterdir()) == []
    assert result.exit_code is Exit.FAILURE  # not the "some drives unreadable" code a unit may accept


def test_an_all_zero_identify_is_bad_data(tmp_path):
    kernel = FakeKernel(fleet.drives())
    kernel.drives["/dev/sda"].payloads["identify"] = bytes(512)
    result, _ = capture(tmp_path, kernel=kernel)
    assert result.failures[0].failure is Failure.BAD_DATA and "all zero" in result.failures[0].detail


def test_a_packet_device_answering_identify_is_not_supported(tmp_path):
    kernel = FakeKernel(fleet.drives())
    identify = bytearray(kernel.drives["/dev/sda"].payloads["identify"])
    identify[1] |= 0x80  # ACS-4 IDENTIFY DEVICE word 0 bit 15 = 1: not an ATA device
    kernel.drives["/dev/sda"].payloads["identify"] = bytes(identify)
    result, _ = capture(tmp_path, kernel=kernel)
    assert result.failures[0].failure is Failure.NOT_SUPPORTED and "word 0 bit 15" in result.failures[0].detail


def test_smart_data_with_a_wrong_checksum_is_bad_data(tmp_path):
    kernel = FakeKernel(fleet.drives())
    smart = bytearray(kernel.drives["/dev/sdb"].payloads["smart"])
    smart[511] ^= 0x01  # ACS-3: byte 511 makes the 512 bytes sum to 0 mod 256
    kernel.drives["/dev/sdb"].payloads["smart"] = bytes(smart)
    result, _ = capture(tmp_path, kernel=kernel)
    assert [(f.device, f.failure) for f in result.failures] == [("/dev/sdb", Failure.BAD_DATA)]


def test_a_non_root_run_stops_before_opening_any_device(tmp_path):
    kernel = FakeKernel(fleet.drives())
    io = DeviceIO(opener=kernel.open, ioctl=kernel.ioctl, closer=kernel.close)
    with pytest.raises(run.NeedsRoot, match="needs root"):
        run.capture_host(ALL, tmp_path, io=io, hostname=fleet.HOST, geteuid=lambda: 1000)
    assert kernel.open_flags == {} and list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("host", ["", "a/b", ".hidden"])
def test_a_host_name_unusable_in_a_file_name_is_refused(host):
    with pytest.raises(ValueError, match="cannot be used in a file name"):
        run.capture_file_name(host, NIGHT)


# -- atomic write --------------------------------------------------------------------------------

RECORDS = [{"capture": 1, "device": "/dev/sda"}]


def test_the_final_name_appears_only_by_rename_of_a_complete_dot_file(tmp_path, monkeypatch):
    seen = {}
    real_replace = os.replace

    def watching_replace(source, target):
        seen["source"], seen["target_existed"] = source, os.path.exists(target)
        with gzip.open(source, "rt") as fh:  # the temp file is already whole before the rename
            seen["lines"] = fh.read().splitlines()
        real_replace(source, target)

    monkeypatch.setattr(run.os, "replace", watching_replace)
    path = run.write_capture_file(RECORDS, tmp_path / "ash-st07-2026-11-02.jsonl.gz")
    assert os.path.basename(seen["source"]).startswith(".ash-st07-2026-11-02.jsonl.gz.")
    assert os.path.dirname(seen["source"]) == str(tmp_path)  # same directory: rename(2) is atomic
    assert seen["target_existed"] is False and len(seen["lines"]) == 1
    assert [p.name for p in tmp_path.iterdir()] == [path.name]


def test_a_failed_write_leaves_the_previous_file_untouched_and_no_temp_file(tmp_path, monkeypatch):
    target = tmp_path / "ash-st07-2026-11-02.jsonl.gz"
    target.write_bytes(b"previous run")

    def failing_fsync(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(run.os, "fsync", failing_fsync)
    with pytest.raises(run.OutputError, match="No space left on device"):
        run.write_capture_file(RECORDS, target)
    assert target.read_bytes() == b"previous run"
    assert [p.name for p in tmp_path.iterdir()] == [target.name]


def test_the_temp_file_is_invisible_to_ingest(tmp_path, monkeypatch):
    from triage.ingest.run import find_inputs

    visible = {}

    def look_then_replace(source, target):
        visible["files"] = find_inputs([tmp_path])
        os.rename(source, target)

    monkeypatch.setattr(run.os, "replace", look_then_replace)
    path = run.write_capture_file(RECORDS, tmp_path / "ash-st07-2026-11-02.jsonl.gz")
    assert visible["files"] == [] and find_inputs([tmp_path]) == [path]


def test_the_capture_file_is_readable_by_a_collector_running_as_another_user(tmp_path):
    path = run.write_capture_file(RECORDS, tmp_path / "x.jsonl.gz")
    assert path.stat().st_mode & 0o777 == 0o644
