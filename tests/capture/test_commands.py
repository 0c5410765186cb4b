"""Read-only by construction: only the five allow-listed commands ever reach the ioctl."""

from __future__ import annotations

import dataclasses
import errno
import os
import struct

import pytest

from tests.capture import fleet
from tests.capture.fakekernel import ABORTED_BY_DRIVE, UNIT_ATTENTION_RESET, FakeKernel
from triage.capture import commands, nvme, sat
from triage.capture.commands import (
    ALLOWED,
    IDENTIFY_DEVICE,
    NVME_SMART_HEALTH_LOG,
    SMART_READ_DATA,
    Command,
    CommandRefused,
    DeviceError,
    Failure,
    issue,
)
from triage.capture.deviceio import DeviceIO


def kernel_and_io(faults=None):
    kernel = FakeKernel(fleet.drives(faults))
    return kernel, DeviceIO(opener=kernel.open, ioctl=kernel.ioctl, closer=kernel.close)


def nvme_image(opcode, cdw10, data_len=512, nsid=0xFFFFFFFF):
    image = bytearray(nvme.smart_health_log_command())
    image[0] = opcode
    struct.pack_into("<I", image, 4, nsid)
    struct.pack_into("<I", image, 36, data_len)
    struct.pack_into("<I", image, 40, cdw10)
    return bytes(image)


# Commands that must never be sent: writes, state changes, and near-misses of the allowed ones.
FORBIDDEN_ATA = {
    # ACS-3 SMART ENABLE OPERATIONS: B0h feature D8h (changes drive state)
    "SMART ENABLE OPERATIONS": sat.pio_data_in_cdb(0xB0, features=0xD8, lba_mid=0x4F, lba_high=0xC2),
    # ACS-3 SMART EXECUTE OFF-LINE IMMEDIATE: B0h feature D4h (starts a self-test)
    "SMART EXECUTE OFF-LINE IMMEDIATE": sat.pio_data_in_cdb(0xB0, features=0xD4, lba_mid=0x4F, lba_high=0xC2),
    # ACS-3 SET FEATURES EFh; SECURITY ERASE UNIT F4h; WRITE SECTORS 30h
    "SET FEATURES": sat.pio_data_in_cdb(0xEF, features=0x02),
    "SECURITY ERASE UNIT": sat.pio_data_in_cdb(0xF4),
    "WRITE SECTORS": bytes([0x85, 0x0A, 0x06, 0, 0, 0, 1, 0, 0, 0, 0, 0, 0, 0x40, 0x30, 0]),
    # IDENTIFY DEVICE asking for two sectors: same command, different transfer
    "IDENTIFY x2": sat.pio_data_in_cdb(0xEC, sectors=2),
}
FORBIDDEN_NVME = {
    # NVMe Base 2.0 admin opcodes: Format NVM 80h, Sanitize 84h, Firmware Commit 10h, Set Features 09h
    "Format NVM": nvme_image(0x80, 0),
    "Sanitize": nvme_image(0x84, 0),
    "Firmware Commit": nvme_image(0x10, 0),
    "Set Features": nvme_image(0x09, 0),
    # Get Log Page of another log (01h Error Information) with the health log's length
    "Get Log Page 01h": nvme_image(0x02, (0x7F << 16) | 0x8000 | 0x01),
}


def test_allow_list_is_exactly_the_five_read_commands():
    assert {c.name for c in ALLOWED} == {
        "IDENTIFY DEVICE", "SMART READ DATA", "SMART READ THRESHOLDS",
        "Identify Controller", "Get Log Page 02h",
    }
    assert isinstance(ALLOWED, frozenset)


def test_allowed_commands_cannot_be_altered_in_place():
    with pytest.raises(dataclasses.FrozenInstanceError):
        IDENTIFY_DEVICE.request = FORBIDDEN_ATA["WRITE SECTORS"]  # type: ignore[misc]


@pytest.mark.parametrize("name", sorted(FORBIDDEN_ATA))
def test_issue_refuses_an_ata_command_outside_the_list_before_any_ioctl(name):
    kernel, io = kernel_and_io()
    handle = io.open("/dev/sda")
    forged = Command("IDENTIFY DEVICE", "ata", FORBIDDEN_ATA[name], 512)  # even under a listed name
    with pytest.raises(CommandRefused):
        issue(io, handle, forged)
    assert kernel.sent == []


@pytest.mark.parametrize("name", sorted(FORBIDDEN_NVME))
def test_issue_refuses_an_nvme_command_outside_the_list_before_any_ioctl(name):
    kernel, io = kernel_and_io()
    handle = io.open("/dev/nvme0")
    with pytest.raises(CommandRefused):
        issue(io, handle, Command("Get Log Page 02h", "nvme", FORBIDDEN_NVME[name], 512))
    assert kernel.sent == []


def test_device_io_itself_refuses_commands_outside_the_list():
    # The boundary checks too, so code that skips issue() still cannot send anything else.
    kernel, io = kernel_and_io()
    handle = io.open("/dev/sda")
    with pytest.raises(CommandRefused):
        io.sg_io(handle, FORBIDDEN_ATA["SMART ENABLE OPERATIONS"], 512)
    with pytest.raises(CommandRefused):
        io.nvme_admin(io.open("/dev/nvme0"), FORBIDDEN_NVME["Format NVM"], 512)
    with pytest.raises(CommandRefused):
        io.sg_io(handle, SMART_READ_DATA.request, 4096)  # right bytes, wrong length
    assert kernel.sent == []


def test_a_listed_command_with_its_ata_bus_swapped_is_refused():
    kernel, io = kernel_and_io()
    with pytest.raises(CommandRefused):
        io.nvme_admin(io.open("/dev/nvme0"), IDENTIFY_DEVICE.request, 512)


def test_devices_are_opened_read_only():
    kernel, io = kernel_and_io()
    io.open("/dev/sda")
    assert kernel.open_flags["/dev/sda"] & os.O_ACCMODE == os.O_RDONLY


def test_issue_returns_the_sector_the_drive_sent():
    kernel, io = kernel_and_io()
    data = issue(io, io.open("/dev/sda"), SMART_READ_DATA)
    assert data == fleet.drives()["/dev/sda"].payloads["smart"]
    assert [s.command for s in kernel.sent] == [SMART_READ_DATA.request]


def test_unit_attention_is_retried_once_then_succeeds():
    kernel, io = kernel_and_io({"/dev/sda": {"identify": [UNIT_ATTENTION_RESET]}})
    data = issue(io, io.open("/dev/sda"), IDENTIFY_DEVICE)
    assert data == fleet.drives()["/dev/sda"].payloads["identify"]
    assert len(kernel.sent) == 2


def test_a_second_unit_attention_gives_up():
    kernel, io = kernel_and_io({"/dev/sda": {"identify": [UNIT_ATTENTION_RESET] * 2}})
    with pytest.raises(DeviceError) as caught:
        issue(io, io.open("/dev/sda"), IDENTIFY_DEVICE)
    assert len(kernel.sent) == 2 and caught.value.failure is Failure.IO_ERROR


def test_aborted_smart_read_says_smart_may_be_disabled():
    kernel, io = kernel_and_io({"/dev/sda": {"smart": ABORTED_BY_DRIVE}})
    with pytest.raises(DeviceError) as caught:
        issue(io, io.open("/dev/sda"), SMART_READ_DATA)
    assert caught.value.failure is Failure.ABORTED
    assert "SMART is disabled" in str(caught.value)


def test_device_vanishing_during_an_ioctl_is_device_not_present():
    kernel, io = kernel_and_io({"/dev/nvme0": {"health": OSError(errno.ENODEV, "No such device")}})
    with pytest.raises(DeviceError) as caught:
        issue(io, io.open("/dev/nvme0"), NVME_SMART_HEALTH_LOG)
    assert caught.value.failure is Failure.GONE and "ENODEV" in caught.value.detail


def test_nvme_invalid_log_page_status_is_not_supported():
    kernel, io = kernel_and_io({"/dev/nvme0": {"health": 0x4109}})  # DNR, SCT 1, SC 09h
    with pytest.raises(DeviceError) as caught:
        issue(io, io.open("/dev/nvme0"), NVME_SMART_HEALTH_LOG)
    assert caught.value.failure is Failure.NOT_SUPPORTED and "Invalid Log Page" in str(caught.value)


def test_a_node_that_is_not_a_scsi_device_is_not_supported_by_the_real_kernel():
    # The real ioctl on /dev/null: Linux answers ENOTTY for SG_IO on a non-SCSI node.
    io = DeviceIO()
    handle = io.open(os.devnull)
    try:
        with pytest.raises(DeviceError) as caught:
            issue(io, handle, IDENTIFY_DEVICE)
    finally:
        io.close(handle)
    assert caught.value.failure is Failure.NOT_SUPPORTED


def test_failure_kinds_cover_every_outcome():
    assert set(commands._FAILURE_OF_OUTCOME) == set(commands.Outcome) - {commands.Outcome.OK}


def test_a_refusal_is_never_mistaken_for_a_device_error():
    # Per-device handling catches OSError and DeviceError; a refusal must pass through both.
    assert not issubclass(CommandRefused, (OSError, DeviceError))
