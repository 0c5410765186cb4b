"""``triage capture`` run for real, with only the kernel (and the euid / host name) replaced."""

from __future__ import annotations

import errno
import gzip
import json
from pathlib import Path

import pytest
from typer.testing import CliRunner

import triage.capture.run as capture_run
from tests.capture import fleet
from tests.capture.fakekernel import FakeKernel
from triage.capture.deviceio import DeviceIO
from triage.cli import app
from triage.exitcodes import Exit


@pytest.fixture
def host(monkeypatch):
    """A root run on the invented host ash-st07 whose drives answer through the fake kernel."""
    state = {"faults": {}}

    def fake_device_io():
        kernel = FakeKernel(fleet.drives(state["faults"]))
        return DeviceIO(opener=kernel.open, ioctl=kernel.ioctl, closer=kernel.close)

    monkeypatch.setattr(capture_run, "DeviceIO", fake_device_io)
    monkeypatch.setattr(capture_run.os, "geteuid", lambda: 0)
    monkeypatch.setattr(capture_run.socket, "gethostname", lambda: fleet.HOST)
    return state


def invoke(*args):
    return CliRunner().invoke(app, ["capture", *args])


def test_capture_writes_one_file_and_prints_its_path(host, tmp_path):
    result = invoke("--out", str(tmp_path), "/dev/sda", "/dev/nvme0")
    assert result.exit_code == Exit.OK, result.output
    path = Path(result.stdout.strip())
    assert path.parent == tmp_path and path.name.startswith("ash-st07-") and path.name.endswith(".jsonl.gz")
    with gzip.open(path, "rt") as fh:
        assert [json.loads(line)["device"] for line in fh] == ["/dev/sda", "/dev/nvme0"]
    assert "2 of 2 drive(s) written" in result.stderr


def test_a_failing_drive_is_named_on_stderr_and_exits_device_errors(host, tmp_path):
    host["faults"] = {"/dev/sdb": {"identify": OSError(errno.EIO, "Input/output error")}}
    result = invoke("--out", str(tmp_path), "/dev/sda", "/dev/sdb")
    assert result.exit_code == Exit.DEVICE_ERRORS
    assert "triage: capture: /dev/sdb: IDENTIFY DEVICE: I/O error (EIO: Input/output error)" in result.stderr
    assert "1 of 2 drive(s) written" in result.stderr


def test_no_drive_read_at_all_is_a_failure_not_some_drives_unreadable(host, tmp_path):
    host["faults"] = {"/dev/sda": {"identify": OSError(errno.EIO, "Input/output error")}}
    result = invoke("--out", str(tmp_path), "/dev/sda")
    assert result.exit_code == Exit.FAILURE
    assert "none of 1 drive(s) could be read; no file written" in result.stderr
    assert list(tmp_path.iterdir()) == []


def test_group_map_option_places_the_drives(host, tmp_path):
    group_map = tmp_path / "slots.csv"
    group_map.write_text("key,slot,group\nQHA7K2M001,ash-r03-bay01,ash-pool-a\n")
    out = tmp_path / "out"
    out.mkdir()
    result = invoke("--out", str(out), "--group-map", str(group_map), "/dev/sda")
    with gzip.open(result.stdout.strip(), "rt") as fh:
        line = json.loads(fh.readline())
    assert (line["slot"], line["group"]) == ("ash-r03-bay01", "ash-pool-a")


def test_non_root_run_exits_needs_root_with_one_line(host, tmp_path, monkeypatch):
    monkeypatch.setattr(capture_run.os, "geteuid", lambda: 1000)
    result = invoke("--out", str(tmp_path), "/dev/sda")
    assert result.exit_code == Exit.NEEDS_ROOT
    assert result.stderr.count("\n") == 1 and "needs root" in result.stderr
    assert list(tmp_path.iterdir()) == []


def test_a_bad_group_map_line_is_named_and_nothing_is_read(host, tmp_path):
    group_map = tmp_path / "slots.csv"
    group_map.write_text("QHA7K2M001,bay1\n")
    result = invoke("--out", str(tmp_path), "--group-map", str(group_map), "/dev/sda")
    assert result.exit_code == Exit.FAILURE
    assert f"{group_map}:1: expected 3 fields key,slot,group" in result.stderr
    assert [p.name for p in tmp_path.iterdir()] == ["slots.csv"]


def test_a_device_name_that_is_not_a_drive_is_a_usage_error(host, tmp_path):
    result = invoke("--out", str(tmp_path), "/dev/sda1")
    assert result.exit_code == Exit.USAGE and "/dev/sda1: cannot tell how to read" in result.stderr


def test_a_missing_output_folder_is_a_usage_error(host, tmp_path):
    result = invoke("--out", str(tmp_path / "absent"), "/dev/sda")
    assert result.exit_code == Exit.USAGE and "no such directory" in result.stderr


def test_help_shows_a_real_example():
    result = CliRunner().invoke(app, ["capture", "--help"])
    assert "Example: triage capture --out" in result.output


def test_without_devices_the_enumerated_drives_are_read_and_left_out_ones_listed(host, tmp_path, monkeypatch):
    import triage.capture
    from triage.capture.devices import Skipped, Target

    found = [Target("/dev/sda", "ata"), Target("/dev/nvme1", "nvme")]
    monkeypatch.setattr(triage.capture, "enumerate_targets",
                        lambda: (found, [Skipped("/dev/sdc", "removable device")]))
    result = invoke("--out", str(tmp_path))
    assert result.exit_code == Exit.OK
    assert "capture: left out /dev/sdc: removable device" in result.stderr
    with gzip.open(result.stdout.strip(), "rt") as fh:
        assert [json.loads(line)["device"] for line in fh] == ["/dev/sda", "/dev/nvme1"]


def test_a_host_with_no_drive_found_fails_with_a_hint(host, tmp_path, monkeypatch):
    import triage.capture

    monkeypatch.setattr(triage.capture, "enumerate_targets", lambda: ([], []))
    result = invoke("--out", str(tmp_path))
    assert result.exit_code == Exit.FAILURE and "name the devices on the command line" in result.stderr
