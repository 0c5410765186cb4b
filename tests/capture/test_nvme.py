"""NVMe admin pass-through: the ioctl number, the command structure, the two commands, status codes.

Sources: Linux <linux/nvme_ioctl.h> (struct nvme_passthru_cmd, NVME_IOCTL_ADMIN_CMD) and
<asm-generic/ioctl.h> (_IOC bit layout); NVMe Base Specification 2.0, figures "Opcodes for Admin
Commands" (Get Log Page 02h, Identify 06h), "Identify - Command Dword 10" (CNS bits 7:0),
"Get Log Page - Command Dword 10" (LID 7:0, LSP 14:8, RAE 15, NUMDL 31:16, 0's based),
"Get Log Page - Command Dword 11" (NUMDU 15:0), "Status Field" and "Generic Command Status
Values" (figure numbers omitted: from memory they moved between revisions).
"""

from __future__ import annotations

import ctypes
import struct

import pytest

from triage.capture import nvme
from triage.capture.sense import Outcome

# <linux/nvme_ioctl.h>, field by field: (name, byte offset, size) of struct nvme_passthru_cmd
HEADER_LAYOUT = [
    ("opcode", 0, 1), ("flags", 1, 1), ("rsvd1", 2, 2), ("nsid", 4, 4), ("cdw2", 8, 4),
    ("cdw3", 12, 4), ("metadata", 16, 8), ("addr", 24, 8), ("metadata_len", 32, 4),
    ("data_len", 36, 4), ("cdw10", 40, 4), ("cdw11", 44, 4), ("cdw12", 48, 4), ("cdw13", 52, 4),
    ("cdw14", 56, 4), ("cdw15", 60, 4), ("timeout_ms", 64, 4), ("result", 68, 4),
]


def test_passthru_structure_has_the_header_layout_and_is_72_bytes():
    for name, offset, size in HEADER_LAYOUT:
        field = getattr(nvme.NvmePassthruCmd, name)
        assert (field.offset, field.size) == (offset, size), name
    assert ctypes.sizeof(nvme.NvmePassthruCmd) == 72


def test_admin_ioctl_number_is_iowr_n_41_of_72_bytes():
    # _IOWR = dir 3 (read|write) in bits 31:30, size 72 = 48h in bits 29:16, type 'N' = 4Eh in
    # 15:8, nr 41h in 7:0 -> C0484E41h (asm-generic/ioctl.h)
    assert nvme.NVME_IOCTL_ADMIN_CMD == 0xC0484E41


def test_identify_controller_command_image_byte_by_byte():
    expected = bytearray(72)
    expected[0] = 0x06  # opcode: Identify
    struct.pack_into("<I", expected, 4, 0)  # NSID 0: Identify Controller is not per namespace
    struct.pack_into("<I", expected, 36, 4096)  # data_len: the 4096-byte data structure
    struct.pack_into("<I", expected, 40, 0x00000001)  # CDW10: CNS 01h, CNTID 0
    assert nvme.identify_controller_command() == bytes(expected)


def test_smart_health_log_command_image_byte_by_byte():
    expected = bytearray(72)
    expected[0] = 0x02  # opcode: Get Log Page
    struct.pack_into("<I", expected, 4, 0xFFFFFFFF)  # NSID FFFFFFFFh: controller-wide log
    struct.pack_into("<I", expected, 36, 512)  # data_len: 512-byte log page
    # CDW10: NUMDL = 512 / 4 - 1 = 127 = 7Fh in bits 31:16, RAE = 1 (bit 15), LID 02h in 7:0
    struct.pack_into("<I", expected, 40, (0x7F << 16) | 0x8000 | 0x02)
    struct.pack_into("<I", expected, 44, 0)  # CDW11: NUMDU = 0
    assert nvme.smart_health_log_command() == bytes(expected)
    assert struct.unpack_from("<I", expected, 40)[0] == 0x007F8002


def test_admin_request_points_at_a_buffer_of_the_commanded_length():
    request = nvme.build_admin_request(nvme.identify_controller_command(), 4096)
    assert request.command.addr == ctypes.addressof(request.data)
    assert len(request.data) == 4096


def test_admin_request_with_a_length_other_than_the_command_says_is_refused():
    with pytest.raises(ValueError, match="asks for 4096 bytes"):
        nvme.build_admin_request(nvme.identify_controller_command(), 512)


@pytest.mark.parametrize(
    "value, outcome",
    [
        (0x0000, Outcome.OK),
        (0x0001, Outcome.NOT_SUPPORTED),  # SCT 0, SC 01h Invalid Command Opcode
        (0x4002, Outcome.NOT_SUPPORTED),  # DNR + SCT 0, SC 02h Invalid Field in Command
        (0x0109, Outcome.NOT_SUPPORTED),  # SCT 1, SC 09h Invalid Log Page (Get Log Page specific)
        (0x0007, Outcome.ABORTED),  # SCT 0, SC 07h Command Abort Requested
        (0x0281, Outcome.MEDIUM_ERROR),  # SCT 2 (media and data integrity), SC 81h
        (0x0006, Outcome.OTHER),  # SCT 0, SC 06h Internal Error
    ],
)
def test_completion_status_maps_to_an_outcome(value, outcome):
    assert nvme.NvmeStatus(value).outcome() is outcome


def test_status_description_names_type_and_code():
    status = nvme.NvmeStatus(0x4109)
    assert status.do_not_retry  # bit 14, NVMe Base 2.0 "Status Field"
    assert status.describe() == "NVMe Invalid Log Page (SCT 1h, SC 09h)"
